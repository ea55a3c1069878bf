"""Stored vectors as the image side: the entries ``align pack --vectors`` wrote beside the shards,
and the check of them against a tower.

With ``vision.stored_vectors`` (or ``vision.source = "stored"``) training, evaluation and indexing
read the packed entry: no tower pass over the images. When the recipe also names a tower, the
first ``vision.check_rows`` rows that have an image are re-embedded by it and compared with the
stored vectors, cosine per row; below ``CHECK_MIN_COSINE`` on any row the vectors are refused, with
the usual causes named. The check's report is kept in the cache folder, so it runs once per pair
of vectors and tower.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import torch
from rich.console import Console

from .. import artifacts as A
from ..data.feature_entry import fingerprint_digest
from ..data.shards import decode_image, iter_image_bytes, read_manifest
from ..errors import AlignError
from ..fileio import write_json_atomic
from ..recipe import VisionConfig
from ..vision import FrozenImageTower
from .cache import FeatureSet, entry_problem, load_feature_cache
from .fingerprint import cache_root, read_fingerprint

# float16 storage moves a unit vector's cosine by ~1e-7 and channels_last by ~1e-7; another input
# size, crop or mean/std moves it by 1e-2 and more
CHECK_MIN_COSINE = 0.999
USUAL_CAUSES = ("a different input resolution (vision.image_size, the sidecar's input_size)",
                "a different resize or crop (interpolation, crop_pct, crop_mode)", "a different mean/std",
                "a different pooling (vision.pooling)",
                "a different normalisation (whitening, PCA, no L2) before storing", "or another model altogether")
CHECKS_DIR = "stored-checks"


def stored_entry(shards_dir: str | Path, split: str) -> Path | None:
    """The complete stored-vectors entry of ``split`` packed into ``shards_dir`` (None if there is none)."""
    info = read_manifest(shards_dir)["splits"].get(split, {})
    root = Path(shards_dir) / A.FEATURE_ROOT
    for entry in sorted(root.iterdir()) if root.is_dir() else []:
        fingerprint = read_fingerprint(entry)
        if (fingerprint and (fingerprint.get("tower") or {}).get("source") == "stored"
                and fingerprint.get("split") == split and fingerprint.get("split_content_hash") == info.get("content_hash")
                and entry_problem(entry) is None):
            return entry
    return None


def load_stored_features(shards_dir: str | Path, split: str) -> FeatureSet:
    entry = stored_entry(shards_dir, split)
    if entry is None:
        raise AlignError(f"{shards_dir} holds no stored vectors for its {split} split",
                         "pack it with `align pack SOURCE --out DIR --vectors FILE --vector-model ID`, or set "
                         "vision.stored_vectors = false (and a tower source) to embed the images")
    return load_feature_cache(entry)


def gallery_stored_features(image_side: dict, shards_dir: str | Path, split: str) -> FeatureSet:
    """A split's stored vectors for an export trained against stored vectors alone, refused when
    they come from another model or have another width than the ones it was trained against."""
    feats = load_stored_features(shards_dir, split)
    side = feats.fingerprint["tower"]
    if (side["model"], side["feature_dim"]) != (image_side.get("model"), image_side.get("feature_dim")):
        raise AlignError(f"the stored vectors in {shards_dir} are {side['model']!r} ({side['feature_dim']} wide); the "
                         f"export was trained against {image_side.get('model')!r} ({image_side.get('feature_dim')} wide)",
                         "pack the gallery with vectors from the model the export names (--vector-model)")
    return feats


def stored_record(feats: FeatureSet) -> dict:
    """What the image side records about stored vectors: model id, content hash, rows."""
    side = feats.fingerprint["tower"]
    return {"model": side["model"], "content_sha256": side["vectors_sha256"], "rows": len(feats),
            "split": feats.fingerprint["split"]}


def _first_images(shards_dir: Path, split: str, keys: set[str], rows: int) -> list[tuple[str, bytes]]:
    """The first ``rows`` samples, in canonical order, that have both an image and a stored vector
    (canonical order: only the first shards are read)."""
    found = []
    for key, data, _ext in iter_image_bytes(shards_dir, split):
        if key in keys:
            found.append((key, data))
            if len(found) == rows:
                break
    return found


def _cosines(tower: FrozenImageTower, feats: FeatureSet, sample: list[tuple[str, bytes]],
             batch: int) -> tuple[list[str], np.ndarray]:
    keys, pixels = [], []
    for key, data in sample:
        try:
            pixels.append(tower.preprocess(decode_image(data)))
            keys.append(key)
        except Exception:  # noqa: BLE001 - an image that does not decode is simply not in the sample
            continue
    if not keys:
        return [], np.zeros(0)
    own = torch.cat([tower.embed_pixels(torch.stack(pixels[i:i + batch])) for i in range(0, len(pixels), batch)])
    theirs = feats.rows_for(keys)  # (n, D), unit length
    return keys, (own * theirs).sum(dim=1).numpy()  # (n,)


def check_stored_vectors(feats: FeatureSet, tower: FrozenImageTower, shards_dir: Path, cfg: VisionConfig,
                         console: Console) -> dict | None:
    """Re-embed up to ``cfg.check_rows`` rows with ``tower`` and refuse the vectors unless every
    cosine reaches CHECK_MIN_COSINE. Returns the report (None when the check is off or no row has
    an image); a report kept from an earlier run is reused without a tower pass."""
    split, model = feats.fingerprint["split"], feats.fingerprint["tower"]["model"]
    if feats.array.shape[2] != tower.feature_dim:
        raise AlignError(f"the stored vectors of {model} are {feats.array.shape[2]} wide, the {tower.source} tower's "
                         f"embeddings {tower.feature_dim}: they come from another model",
                         "set vision.source = \"stored\" to train on the vectors alone, or name the tower that made them")
    if not cfg.check_rows:
        console.print("[yellow]stored vectors used unchecked (vision.check_rows = 0)")
        return None
    path = cache_root(shards_dir, cfg) / CHECKS_DIR / (f"{feats.path.name}-{fingerprint_digest(tower.fingerprint)}"
                                                     f"-{cfg.check_rows}.json")
    report = _read_report(path)
    if report is None:
        keys, cosine = _cosines(tower, feats, _first_images(Path(shards_dir), split, set(feats.keys), cfg.check_rows),
                                cfg.batch_size)
        if not keys:
            console.print(f"[yellow]no {split} image with a stored vector decodes: the vectors could not be checked")
            return None
        report = {"split": split, "rows": len(keys), "threshold": CHECK_MIN_COSINE,
                  "min_cosine": float(np.min(cosine)), "median_cosine": float(np.median(cosine)),
                  "below": int((~(cosine >= CHECK_MIN_COSINE)).sum()),
                  "per_row": {k: float(c) for k, c in zip(keys, cosine)}, "tower": tower.fingerprint}
        write_json_atomic(path, report)
    if report["below"]:
        raise AlignError(
            f"the stored {split} vectors of {model} do not match the {tower.source} tower: on {report['rows']} "
            f"re-embedded rows the cosine is below {CHECK_MIN_COSINE} for {report['below']} (lowest "
            f"{report['min_cosine']:.4f}, median {report['median_cosine']:.4f}; per row in {path}). Usual causes: "
            + "; ".join(USUAL_CAUSES),
            "make the tower's recipe match how the vectors were made, or set vision.source = \"stored\" to train on "
            "the vectors without a tower")
    console.print(f"stored {split} vectors match the tower on {report['rows']} re-embedded rows "
                  f"(lowest cosine {report['min_cosine']:.6f})")
    return report


def _read_report(path: Path) -> dict | None:
    try:
        report = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return report if isinstance(report, dict) and "below" in report else None
