"""Reading a feature-cache entry: ``FeatureSet`` over a read-only memory map of ``features.f16``.

An entry ``<root>/<digest>/`` holds

- ``fingerprint.json``: the fingerprint (written first: it is the entry's identity);
- ``keys.txt``: one sample key per row, the split's canonical order minus images that failed to decode;
- ``skipped.txt``: the keys whose image failed to decode;
- ``features.f16``: float16 rows of shape (N, K, D). It is written last, so an entry that has it
  (at the size its keys call for) is complete.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F

from .. import artifacts as A
from ..errors import AlignError, DataError
from .fingerprint import fingerprint_changes, read_fingerprint


@dataclass
class BuildReport:
    images: int  # images embedded by this call (a resumed build counts only the rest)
    seconds: float
    resumed_chunks: int  # chunks an interrupted build had already finished

    @property
    def images_per_s(self) -> float:
        return self.images / max(self.seconds, 1e-9)


@dataclass
class FeatureSet:
    """One split's cached features: row i belongs to ``keys[i]``."""

    keys: list[str]
    array: np.ndarray  # (N, K, D) float16, a read-only memory map of features.f16
    skipped: list[str] = field(default_factory=list)
    fingerprint: dict = field(default_factory=dict)
    path: Path | None = None
    build: BuildReport | None = None  # set when this call ran the tower

    @property
    def views(self) -> int:
        return int(self.array.shape[1])

    @cached_property
    def embeddings(self) -> torch.Tensor:
        """View 0 (the plain preprocessing) as float32, re-normalised after the float16 round trip. (N, D)"""
        return F.normalize(torch.from_numpy(np.asarray(self.array[:, 0], dtype=np.float32)), dim=-1)

    def _index(self, keys: list[str]) -> np.ndarray:
        where = {k: i for i, k in enumerate(self.keys)}
        missing = [k for k in keys if k not in where]
        if missing:
            raise DataError(f"{len(missing)} key(s) have no cached feature, e.g. {missing[0]}",
                            hint="the table and the cache disagree; rebuild with `align features RECIPE`")
        return np.array([where[k] for k in keys], dtype=np.int64)

    def rows_for(self, keys: list[str]) -> torch.Tensor:
        """View-0 rows for ``keys``, in that order. (n, D) float32"""
        return self.embeddings[torch.from_numpy(self._index(keys))]

    def view_rows_for(self, keys: list[str]) -> torch.Tensor:
        """Every view for ``keys``, in that order, kept in float16 to halve memory. (n, K, D)"""
        return torch.from_numpy(np.ascontiguousarray(self.array[self._index(keys)]))

    def stored_rows_for(self, keys: list[str]) -> np.ndarray:
        """View-0 rows for ``keys`` exactly as stored (float16, not re-normalised). (n, D)"""
        return np.ascontiguousarray(self.array[self._index(keys), 0])


def load_feature_cache(entry: str | Path) -> FeatureSet:
    """Open a complete entry; AlignError when it is incomplete or damaged."""
    entry = Path(entry)
    problem = entry_problem(entry)
    if problem:
        raise AlignError(f"feature cache {entry} is unusable: {problem}",
                         "delete that folder, or run `align features RECIPE` to rebuild it")
    fingerprint = read_fingerprint(entry)
    keys = read_lines(entry / A.FEATURE_KEYS)
    shape = (len(keys), fingerprint["views"], fingerprint["tower"]["feature_dim"])
    array = (np.memmap(entry / A.FEATURES, dtype=np.float16, mode="r", shape=shape) if keys
             else np.zeros(shape, dtype=np.float16))
    return FeatureSet(keys=keys, array=array, skipped=read_lines(entry / A.FEATURE_SKIPPED),
                      fingerprint=fingerprint, path=entry)


def read_lines(path: Path) -> list[str]:
    return [line for line in path.read_text(encoding="utf-8").split("\n") if line] if path.is_file() else []


def entry_problem(entry: Path, expected: dict | None = None) -> str | None:
    """Why an entry cannot be used as it stands (None = complete and consistent)."""
    if not (entry / A.FINGERPRINT).is_file():
        return f"no {A.FINGERPRINT}"
    stored = read_fingerprint(entry)
    if stored is None:
        return f"{A.FINGERPRINT} is not valid JSON"
    if expected is not None and stored != expected:
        return "its fingerprint differs: " + "; ".join(fingerprint_changes(stored, expected))
    if not (entry / A.FEATURES).is_file() or not (entry / A.FEATURE_KEYS).is_file():
        return "the build did not finish"
    rows = len(read_lines(entry / A.FEATURE_KEYS))
    want = rows * stored["views"] * stored["tower"]["feature_dim"] * 2
    have = (entry / A.FEATURES).stat().st_size
    if have != want:
        return f"{A.FEATURES} holds {have} bytes, {rows} keys need {want}"
    return None
