"""Adopting embeddings a team already has (``align index --embeddings E.npy --keys K.txt``).

They are taken only after three checks: their width is the export's tower's; every row is a finite,
non-zero vector (a bad one is named by its row number and key); and on a seeded sample of images
re-embedded by that tower, their direction is the tower's own (cosine >= ``ADOPT_MIN_COSINE``).
Anything else was made by another tower, other weights, other preprocessing, or is out of order
with its keys, and is refused with the reason.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import torch
from rich.console import Console

from ..api import AlignedModel
from ..errors import DataError, FingerprintMismatch
from .sources import images_for_keys

ADOPT_SAMPLE = 8  # images re-embedded to check adopted embeddings
# float16 storage of unit vectors moves the cosine by ~1e-7 and channels_last by ~1e-7; another input size
# moves it far more (measured on demo tiles: the same tower at 112 px instead of 96 px gave 0.82-0.92)
ADOPT_MIN_COSINE = 0.999
ROW_BLOCK = 65536  # rows read at once: a memory map is never read whole


def bad_rows(rows: np.ndarray) -> list[int]:
    """Numbers of the rows (N, D) that are not finite, non-zero vectors, read in slices."""
    bad: list[int] = []
    for start in range(0, rows.shape[0], ROW_BLOCK):
        block = np.asarray(rows[start:start + ROW_BLOCK], dtype=np.float64)  # (b, D)
        broken = ~np.isfinite(block).all(axis=1) | ~block.any(axis=1)
        bad += (start + np.flatnonzero(broken)).tolist()
    return bad


def refuse_bad_rows(rows: np.ndarray, keys: list[str], where: str = "", bad: list[int] | None = None) -> None:
    """Refuse zero or non-finite rows by number and key (the first one named, every one counted)."""
    bad = bad_rows(rows) if bad is None else bad
    if not bad:
        return
    first = bad[0]
    what = "zeros" if np.isfinite(np.asarray(rows[first])).all() else "non-finite values"
    others = (f"; {len(bad)} such rows in all: {', '.join(map(str, bad[:10]))}{' ...' if len(bad) > 10 else ''}"
              if len(bad) > 1 else "")
    raise DataError(f"{where}embedding row {first} (key {keys[first]!r}) holds {what}{others}",
                    "remove or re-embed those images (a row must be a finite, non-zero vector)")


def _read_keys(path: Path, rows: int) -> list[str]:
    if not path.is_file():
        raise DataError(f"no keys file at {path}", "pass --keys FILE.txt with one key per line, in row order")
    keys = path.read_text(encoding="utf-8").splitlines()
    if keys and keys[-1] == "":
        keys = keys[:-1]
    if len(keys) != rows:
        raise DataError(f"{path} has {len(keys)} keys for {rows} embedding rows",
                        "the keys file needs exactly one line per row of the embeddings, in the same order")
    if len(set(keys)) != len(keys):
        raise DataError(f"{path} repeats keys", "every image needs its own key")
    return keys


def adopt_embeddings(model: AlignedModel, source: Path, embeddings_path: Path, keys_path: Path,
                     sample: int = ADOPT_SAMPLE, console: Console | None = None):
    """Check a team's stored embeddings against the export's tower; return (keys, unit rows)."""
    dim = model.embedding_dim
    try:
        stored = np.load(embeddings_path, mmap_mode="r")
    except (OSError, ValueError) as exc:
        raise DataError(f"cannot read {embeddings_path} as a .npy array ({exc})",
                        "save the embeddings with numpy.save as an (N, D) float array") from None
    if stored.ndim != 2 or not np.issubdtype(stored.dtype, np.floating):
        raise DataError(f"{embeddings_path} holds a {stored.dtype} array of shape {stored.shape}, not (N, D) floats",
                        "save the embeddings with numpy.save as an (N, D) float array")
    tower_name = model.image_side["model"]
    if stored.shape[1] != dim:
        raise FingerprintMismatch(
            f"{embeddings_path} holds {stored.shape[1]}-wide embeddings but this export's image tower "
            f"({tower_name}) gives {dim}-wide ones: they come from another tower",
            "index SOURCE without --embeddings to embed it with the export's tower")
    keys = _read_keys(keys_path, stored.shape[0])
    refuse_bad_rows(stored, keys, f"{embeddings_path}: ")
    rng = np.random.default_rng(0)
    picked = np.sort(rng.choice(len(keys), size=min(sample, len(keys)), replace=False))
    images = images_for_keys(source, [keys[i] for i in picked])
    tower = model.image_tower
    pixels = torch.stack([tower.preprocess(images[keys[i]]) for i in picked])
    own = tower.embed_pixels(pixels).numpy()  # (s, D)
    theirs = np.asarray(stored[picked], dtype=np.float64)
    norms = np.linalg.norm(theirs, axis=1, keepdims=True)
    cosine = ((theirs / np.maximum(norms, 1e-12)) * own).sum(1)  # (s,)
    if not np.isfinite(cosine).all() or cosine.min() < ADOPT_MIN_COSINE:
        bad = int((~(cosine >= ADOPT_MIN_COSINE)).sum())
        raise FingerprintMismatch(
            f"the embeddings in {embeddings_path} are not this export's image tower's output: on {bad} of "
            f"{len(picked)} sampled images the cosine with the tower's own embedding is below {ADOPT_MIN_COSINE} "
            f"(lowest {np.nanmin(cosine):.4f}, median {np.nanmedian(cosine):.4f})",
            f"they were made by another tower, other weights or other preprocessing (this export needs "
            f"{tower_name}, weights sha256 {model.image_side['weights_sha256'][:12]}…, input "
            f"{model.image_side['preprocessing']['input_size']}), or the keys file is out of order; index "
            "SOURCE without --embeddings to embed it with the export's tower")
    if console is not None:
        console.print(f"adopted embeddings match the tower on {len(picked)} sampled images "
                      f"(lowest cosine {cosine.min():.6f})")
    return keys, stored


