"""The on-disk layout of a feature-cache entry, shared by its two writers: the tower build
(``align.features``) and ``align pack --vectors`` (stored vectors, written beside the shards).

An entry is a folder named by the digest of its fingerprint, holding

- ``fingerprint.json``: everything its numbers depend on (written first: the entry's identity);
- ``keys.txt``: one sample key per row;
- ``skipped.txt``: the keys of the split that have no row (an image that failed to decode);
- ``features.f16``: float16 rows of shape (N, K, D), written last: an entry that has it, at the
  size its keys call for, is complete.
"""
from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import numpy as np

from ..artifacts import FEATURE_KEYS, FEATURE_SKIPPED, FEATURES, FINGERPRINT
from ..fileio import write_bytes_atomic, write_json_atomic

FORMAT_VERSION = 1


def canonical_json(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def fingerprint_digest(fingerprint: dict) -> str:
    """The entry's folder name."""
    return hashlib.sha256(canonical_json(fingerprint).encode("utf-8")).hexdigest()[:20]


def lines_bytes(keys: list[str]) -> bytes:
    return "".join(k + "\n" for k in keys).encode("utf-8")


def write_entry(entry: Path, fingerprint: dict, keys: list[str], rows: np.ndarray, skipped: list[str]) -> None:
    """A complete entry in one go: fingerprint first, the rows (N, K, D) float16 last."""
    if rows.shape[0] != len(keys) or rows.dtype != np.float16 or rows.ndim != 3:
        raise ValueError(f"rows must be (N, K, D) float16 for {len(keys)} keys, got {rows.shape} {rows.dtype}")
    entry.mkdir(parents=True, exist_ok=True)
    write_json_atomic(entry / FINGERPRINT, fingerprint)
    write_bytes_atomic(entry / FEATURE_KEYS, lines_bytes(keys))
    write_bytes_atomic(entry / FEATURE_SKIPPED, lines_bytes(skipped))
    write_bytes_atomic(entry / FEATURES, np.ascontiguousarray(rows).tobytes())


def write_entry_from_file(entry: Path, fingerprint: dict, keys: list[str], rows_file: Path, skipped: list[str]) -> None:
    """A complete entry whose rows (N, K, D) float16 were already written to ``rows_file`` (same
    filesystem): fingerprint first, the rows moved in last."""
    per_row = 2 * fingerprint["views"] * fingerprint["tower"]["feature_dim"]
    if rows_file.stat().st_size != per_row * len(keys):
        raise ValueError(f"{rows_file} holds {rows_file.stat().st_size} bytes, {len(keys)} rows need "
                         f"{per_row * len(keys)}")
    entry.mkdir(parents=True, exist_ok=True)
    write_json_atomic(entry / FINGERPRINT, fingerprint)
    write_bytes_atomic(entry / FEATURE_KEYS, lines_bytes(keys))
    write_bytes_atomic(entry / FEATURE_SKIPPED, lines_bytes(skipped))
    os.replace(rows_file, entry / FEATURES)
