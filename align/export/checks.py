"""Every exported form, reloaded from disk the way a user loads it, must reproduce the trained tower.

The probes are padded batches of several shapes (one caption, mixed lengths, one truncated) plus a
batch of the run's own captions when its data is still there; the largest absolute difference of
any embedding value must stay within ``TOLERANCE``.
"""
from __future__ import annotations

from pathlib import Path
from typing import Callable

import numpy as np
import torch

from ..api import load_adapter_encoder, load_text_encoder
from ..errors import AlignError
from ..text import TextKind, TextTower
from .sentence import IDENTITY, read_sentence_modules

TOLERANCE = 1e-4  # largest absolute difference allowed between any two forms of the text side

# padded batches of several shapes for the export checks: one caption, mixed lengths, one truncated
PROBE_CAPTIONS = (
    ("tile",),
    ("a photo", "a glossy cobalt herringbone tile with a bevelled edge", "the number seven, written by hand"),
    ("a", "an ochre hexagonal mosaic for a kitchen splashback", "x ray", "scanned page of a contract",
     "terracotta", "matte sage subway tiles, rectified edge, for walls",
     " ".join(["a very long caption that keeps going past the token limit"] * 12), "ok"),
)


def run_captions(recipe, count: int = 16) -> list[list[str]]:
    """A batch of the run's own captions (its domain words, any added terms), when the data is still there."""
    from ..data.shards import load_table

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
        if not (np.isfinite(a).all() and np.isfinite(b).all()):  # max() would skip NaN and report 0.0
            raise AlignError("export check: the embeddings are not finite (NaN or infinity)",
                             "the run's weights diverged; export an earlier checkpoint or train again")
        worst = max(worst, float(np.abs(a - b).max()))
    return worst


def torch_runner(model: torch.nn.Module) -> Callable[[dict], np.ndarray]:
    def run(batch: dict) -> np.ndarray:
        with torch.inference_mode():
            return model(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"]).float().numpy()
    return run


def onnx_runner(path: Path) -> Callable[[dict], np.ndarray]:
    import onnxruntime as ort

    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return lambda batch: session.run(["embedding"], {"input_ids": batch["input_ids"].numpy(),
                                                     "attention_mask": batch["attention_mask"].numpy()})[0]


def enforce(what: str, difference: float, tolerance: float = TOLERANCE) -> None:
    if not difference <= tolerance:  # also catches NaN
        raise AlignError(f"export check failed: {what} differs from the trained tower by {difference:.3g} "
                         f"(allowed {tolerance:g})", "nothing was written; report this with the run folder")


def probe_batches(tower: TextTower, recipe) -> tuple[list[list[str]], list[dict]]:
    """The probe captions and the trained tower's token batches of them."""
    captions = [list(b) for b in PROBE_CAPTIONS] + run_captions(recipe)
    return captions, [tower.tokenize(c) for c in captions]


def check_reloaded(tower: TextTower, kind: TextKind, encoder_dir: Path, adapter_dir: Path,
                   recipe) -> tuple[dict, list[list[str]], list[dict]]:
    """The merged encoder (and the adapter on its base, for kinds that write one), reloaded from disk with
    the loaders ``align.load`` uses, against the trained tower; returns (checks, probe captions, their batches)."""
    merged, tokenizer, _ = load_text_encoder(encoder_dir)
    captions, batches = probe_batches(tower, recipe)
    check_tokenizer(tokenizer, captions, batches)
    reference = torch_runner(tower)
    checks = {"merged_max_abs_diff": max_abs_difference(batches, reference, torch_runner(merged))}
    if kind.writes_adapter:
        adapter, _, _ = load_adapter_encoder(adapter_dir)
        checks["adapter_max_abs_diff"] = max_abs_difference(batches, reference, torch_runner(adapter))
        enforce("the adapter on its base encoder", checks["adapter_max_abs_diff"])
    enforce("the merged encoder", checks["merged_max_abs_diff"])
    return checks, captions, batches


def check_sentence_model(tower: TextTower, folder: Path, captions: list[list[str]]) -> dict:
    """The sentence-embedding module files describe the tower (always), and, where the
    sentence-transformers library is installed, its own loader reproduces the tower's embeddings."""
    found = read_sentence_modules(folder)
    weight = tower.projection.weight.detach().cpu().float()
    if (found["types"] != ["Transformer", "Pooling", "Dense", "Normalize"] or not found["mean_pooling"]
            or found["dense"]["bias"] or found["dense"]["activation_function"] != IDENTITY
            or found["max_seq_length"] != tower.max_length or not torch.equal(found["weight"], weight)):
        raise AlignError("export check failed: the sentence-embedding module files do not describe the tower",
                         "report this as a bug, with the run folder")
    try:
        from sentence_transformers import SentenceTransformer
    except ImportError:
        return {"sentence_model_check": "module files only (sentence-transformers is not installed)"}
    import logging

    logging.getLogger("sentence_transformers").setLevel(logging.ERROR)  # its notes about the model card
    model = SentenceTransformer(str(folder), device="cpu", local_files_only=True)
    texts = [t for batch in captions for t in batch]
    theirs = model.encode(texts, convert_to_numpy=True, show_progress_bar=False)  # (N, D)
    ours = torch_runner(tower)(tower.tokenize(texts))
    checks = {"sentence_model_check": "loaded by sentence-transformers",
              "sentence_model_max_abs_diff": float(np.abs(theirs - ours).max())}
    enforce("the sentence-embedding folder (sentence-transformers)", checks["sentence_model_max_abs_diff"])
    return checks


def check_onnx(tower: TextTower, path: Path, batches: list[dict]) -> dict:
    """The ONNX graph, run by onnxruntime, against the trained tower."""
    checks = {"onnx_max_abs_diff": max_abs_difference(batches, torch_runner(tower), onnx_runner(path)),
              "onnx_checked_shapes": [list(b["input_ids"].shape) for b in batches]}
    enforce("the ONNX model (onnxruntime)", checks["onnx_max_abs_diff"])
    return checks
