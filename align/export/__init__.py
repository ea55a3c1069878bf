"""``align export RUN_DIR --out DIR``: the text side in the forms a retrieval stack loads, the image
side's contract, and a card.

    DIR/export.json        what is here and the checks run at export, with their results
    DIR/adapter/           lora: peft's adapter_config.json + adapter_model.safetensors, the
                           projection and the tokenizer (a full or scratch tower's trained weights
                           are the whole tower: text_encoder/ holds them, once)
    DIR/text_encoder/      merged, self-contained encoder (plain ``transformers.AutoModel``), its
                           tokenizer, projection.safetensors, head.json + README.md (pool, project,
                           normalise); also a sentence-embedding model folder (``SentenceTransformer(DIR)``:
                           modules.json, 1_Pooling/, 2_Dense/, 3_Normalize/)
    DIR/text_encoder.onnx  input_ids, attention_mask (int64, dynamic batch and sequence) ->
                           embedding (B, D), L2-normalised
    DIR/image_side.json    the frozen tower: name, weights sha256, preprocessing, pooling, norm
    DIR/card.json, CARD.md recipe, data manifest hash, metrics, embedding size, temperature, use, limits

Every export is checked before it is kept: the merged encoder reloaded from disk, the sentence-embedding
folder (loaded by sentence-transformers where it is installed) and the ONNX model (run by onnxruntime) must
reproduce the trained tower's embeddings within ``TOLERANCE`` on padded
batches of several shapes. The folder is written under a temporary name and swapped in at the end.

    writers.py  adapter, merged encoder, ONNX, head.json
    sentence.py the sentence-embedding module files in the merged encoder's folder
    checks.py   reloading each form and comparing it with the trained tower
    card.py     image_side.json and the card
"""
from __future__ import annotations

import shutil
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import torch
from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

from .. import __version__
from .. import artifacts as A
from ..fileio import check_output_dir, publish_dir, write_json_atomic, write_text_atomic
from ..recipe import Recipe
from ..run import RunDir
from ..text import TextKind, TextTower, text_kind
from ..features import trained_image_side
from ..vision import FrozenImageTower
from .card import build_card, image_side_record, render_card
from .checks import (TOLERANCE, check_onnx, check_reloaded, check_sentence_model, enforce, max_abs_difference,
                     onnx_runner)
from .sentence import write_sentence_modules
from .writers import FORMAT_VERSION, ONNX_OPSET, export_onnx, text_head, write_adapter, write_text_encoder

__all__ = ["TOLERANCE", "enforce", "export_run", "max_abs_difference", "onnx_runner"]


@dataclass
class _Trained:
    """The run as trained, and what the export needs to know about it."""

    run: RunDir
    recipe: Recipe
    tower: TextTower
    kind: TextKind
    loss_fn: torch.nn.Module
    checkpoint: Path
    image_tower: FrozenImageTower | None  # None: trained against stored vectors alone
    image_side: dict  # the fingerprint trained against (the tower's, with stored vectors when used)


def export_run(run_dir: str | Path, out: str | Path, *, checkpoint: str | Path | None = None, onnx: bool = True,
               console: Console | None = None) -> dict:
    """Export a checkpoint of ``run_dir`` into ``out``; returns export.json's content.

    The default checkpoint is the best-validating one when the run kept one, else the newest."""
    console = console or Console(stderr=True)
    started = time.perf_counter()
    run, out = RunDir(run_dir), Path(out)
    check_output_dir(out, A.EXPORT_INFO, "export")
    recipe = run.recipe()
    steps = ["loading the run", "adapter", "merged encoder", "checking the merged encoder",
             "checking the sentence-embedding folder"] + \
            (["ONNX", "checking ONNX with onnxruntime"] if onnx else []) + ["image side and card"]
    out.parent.mkdir(parents=True, exist_ok=True)
    temp = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.partial-"))
    try:
        with Progress(TextColumn("[bold]export[/bold] {task.description}"), BarColumn(), TimeElapsedColumn(),
                      console=console, transient=True) as progress:
            task = progress.add_task(steps[0], total=len(steps))
            phases = iter(steps[1:])

            def phase() -> None:
                progress.update(task, advance=1, description=next(phases))

            trained = _load_trained(run, recipe, checkpoint)
            checks = _write_and_check_text(trained, temp, onnx, phase, console)
            phase()
            info = _write_records(trained, temp, checks, onnx)
            info["export_seconds"] = round(time.perf_counter() - started, 2)
            write_json_atomic(temp / A.EXPORT_INFO, info)
            progress.update(task, completed=len(steps))
        publish_dir(temp, out)
    except BaseException:
        shutil.rmtree(temp, ignore_errors=True)
        raise
    console.print(f"[green]exported[/green] {run.path} ({run.describe(trained.checkpoint)}) to {out} in "
                  f"{info['export_seconds']:.1f}s; merged vs trained {checks['merged_max_abs_diff']:.2e}")
    return info


def _load_trained(run: RunDir, recipe: Recipe, checkpoint: str | Path | None) -> _Trained:
    """The run as trained, against the tower it was trained with (refused if that changed)."""
    recorded = run.progress(run.checkpoint(checkpoint)).get("tower") or {}
    image_tower, image_side = trained_image_side(recipe.vision, recorded)  # None: stored vectors alone
    loaded = run.load_trained(image_side["feature_dim"], checkpoint, recipe)
    run.check_tower(loaded.checkpoint, image_side)
    return _Trained(run, recipe, loaded.tower, text_kind(loaded.tower.kind), loaded.loss_fn, loaded.checkpoint,
                    image_tower, image_side)


def _write_and_check_text(trained: _Trained, temp: Path, onnx: bool, phase, console: Console) -> dict:
    """Adapter (kinds that train one), merged encoder and ONNX, each checked against the trained tower."""
    tower, kind = trained.tower, trained.kind
    head = text_head(tower, trained.image_side["feature_dim"])
    phase()
    if kind.writes_adapter:
        write_adapter(tower, kind, temp / A.EXPORT_ADAPTER, head, trained.recipe.text)
    phase()
    write_text_encoder(tower, kind, temp / A.EXPORT_TEXT_ENCODER, head)
    write_sentence_modules(temp / A.EXPORT_TEXT_ENCODER, tower.projection.weight, tower.max_length)
    phase()
    checks, captions, batches = check_reloaded(tower, kind, temp / A.EXPORT_TEXT_ENCODER, temp / A.EXPORT_ADAPTER,
                                               trained.recipe)
    phase()
    checks |= check_sentence_model(tower, temp / A.EXPORT_TEXT_ENCODER, captions)
    if onnx:
        phase()
        export_onnx(temp / A.EXPORT_TEXT_ENCODER, temp / A.EXPORT_ONNX)
        phase()
        checks |= check_onnx(tower, temp / A.EXPORT_ONNX, batches)
        console.print(f"ONNX vs torch on batches {checks['onnx_checked_shapes']}: largest abs "
                      f"difference {checks['onnx_max_abs_diff']:.2e} (allowed {TOLERANCE:g})")
    return checks


def _write_records(trained: _Trained, temp: Path, checks: dict, onnx: bool) -> dict:
    """image_side.json and the card; returns export.json's content (written last, by the caller)."""
    write_json_atomic(temp / A.IMAGE_SIDE, image_side_record(trained.image_tower, trained.image_side))
    card = build_card(trained.recipe, trained.run.path, trained.checkpoint,
                      trained.run.progress(trained.checkpoint).get("step"), trained.tower, trained.kind,
                      trained.loss_fn, trained.image_side, checks)
    write_json_atomic(temp / A.CARD_JSON, card)
    write_text_atomic(temp / A.CARD_MD, render_card(card))
    dim = trained.image_side["feature_dim"]
    adapter = A.EXPORT_ADAPTER if trained.kind.writes_adapter else None
    return {"format_version": FORMAT_VERSION, "align_version": __version__, "kind": trained.tower.kind,
            "embedding_dim": dim, "max_length": trained.tower.max_length,
            "trained_weights": adapter or A.EXPORT_TEXT_ENCODER,
            "parts": {"adapter": adapter, "text_encoder": A.EXPORT_TEXT_ENCODER,
                      "sentence_model": A.EXPORT_TEXT_ENCODER, "onnx": A.EXPORT_ONNX if onnx else None,
                      "image_side": A.IMAGE_SIDE, "card": [A.CARD_JSON, A.CARD_MD]},
            "onnx_io": {"inputs": {"input_ids": ["batch", "sequence"], "attention_mask": ["batch", "sequence"]},
                        "output": {"embedding": ["batch", dim]}, "dtype": "int64 in, float32 out",
                        "opset": ONNX_OPSET} if onnx else None,
            "tolerance": TOLERANCE, "checks": checks, "run_dir": str(trained.run.path.resolve()),
            "checkpoint": trained.checkpoint.name, "image_fingerprint": trained.image_side}
