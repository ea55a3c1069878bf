"""The identity of a feature-cache entry: its fingerprint, the digest that names its folder, and how
two fingerprints differ (so a rebuild can say why it happened).

The fingerprint records everything the cached numbers depend on: the tower's weights sha256, its
preprocessing (size, crop, mean, std, interpolation), the pooling and normalisation, the split and
its content hash from the packed manifest, and the number of views with their augmentation. Equal
fingerprints mean interchangeable entries.
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import TYPE_CHECKING

from .. import artifacts as A
from ..data.feature_entry import FORMAT_VERSION, fingerprint_digest
from ..data.shards import read_manifest
from ..errors import DataError
from ..recipe import VisionConfig

if TYPE_CHECKING:
    from ..vision import FrozenImageTower

__all__ = ["AUGMENTATION", "FORMAT_VERSION", "cache_root", "closest_entry", "feature_fingerprint",
           "fingerprint_changes", "fingerprint_digest", "read_fingerprint"]
# Crops keep at least half the picture: a caption describes the whole image, and ImageNet's usual
# (0.08, 1) range can cut away what it names. No colour jitter: colour is often what a caption says.
AUGMENTATION = {"transform": "timm create_transform(is_training=True)", "scale": [0.5, 1.0],
                "ratio": [0.75, 4.0 / 3.0], "hflip": 0.5, "color_jitter": None, "seed": 0,
                "view_0": "the tower's evaluation preprocessing"}


def feature_fingerprint(tower: FrozenImageTower, shards_dir: str | Path, split: str, views: int = 1) -> dict:
    """Everything the cached numbers depend on; equal fingerprints mean interchangeable caches."""
    info = read_manifest(shards_dir)["splits"].get(split)
    if info is None:
        raise DataError(f"split '{split}' is not in {shards_dir}", hint="use train or val")
    return {"format_version": FORMAT_VERSION, "tower": tower.fingerprint, "split": split,
            "split_content_hash": info["content_hash"], "split_samples": info["samples"], "views": views,
            "augmentation": AUGMENTATION if views > 1 else None, "dtype": "float16"}


def read_fingerprint(entry: Path) -> dict | None:
    """An entry's stored fingerprint; None when it has none or it is not valid JSON."""
    try:
        return json.loads((entry / A.FINGERPRINT).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return None


def _short(value) -> str:
    text = json.dumps(value, ensure_ascii=False)
    return text[:14] + '…"' if isinstance(value, str) and len(value) > 40 else text


def fingerprint_changes(old: dict, new: dict, prefix: str = "") -> list[str]:
    """Dotted paths of the fields that differ, with both values: ``tower.preprocessing.input_size: ...``."""
    changes = []
    for key in sorted(set(old) | set(new)):
        a, b = old.get(key, "<absent>"), new.get(key, "<absent>")
        if isinstance(a, dict) and isinstance(b, dict):
            changes += fingerprint_changes(a, b, f"{prefix}{key}.")
        elif a != b:
            changes.append(f"{prefix}{key}: {_short(a)} -> {_short(b)}")
    return changes


def cache_root(shards_dir: str | Path, cfg: VisionConfig, override: str | Path | None = None) -> Path:
    """Where entries live: an explicit folder, ``vision.feature_cache``, or features/ in the shards folder."""
    return Path(override or cfg.feature_cache or Path(shards_dir) / A.FEATURE_ROOT)


def closest_entry(root: Path, fingerprint: dict, skip: Path) -> tuple[Path, list[str]] | None:
    """The existing entry for the same split that differs in the fewest fields (to say what changed).

    Plain entries are compared with plain ones, K-view with K-view: a K-view entry always sits
    beside its plain one, which is no earlier version of it. Stored vectors (packed, no tower) are
    no earlier version of a tower's entry either."""
    best = None
    augmented = fingerprint["views"] > 1
    for candidate in sorted(root.iterdir()) if root.is_dir() else []:
        other = read_fingerprint(candidate) if candidate != skip else None
        if (other is None or other.get("split") != fingerprint["split"] or (other.get("views", 1) > 1) != augmented
                or (other.get("tower") or {}).get("source") == "stored"):
            continue
        changes = fingerprint_changes(other, fingerprint)
        rank = (len(changes), -(candidate / A.FINGERPRINT).stat().st_mtime)
        if best is None or rank < best[0]:
            best = (rank, candidate, changes)
    return (best[1], best[2]) if best else None
