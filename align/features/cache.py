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
    """One split's cached features: row i belongs to ``keys[i]``.

    Opening one reads no row: ``array`` is a memory map, and ``keys`` / ``skipped`` are read from
    their files on first use (at millions of rows the keys alone are hundreds of MB of Python
    strings, which training never needs). ``unit_rows`` gathers rows as the loop uses them."""

    array: np.ndarray  # (N, K, D) float16, a read-only memory map of features.f16
    fingerprint: dict = field(default_factory=dict)
    path: Path | None = None
    build: BuildReport | None = None  # set when this call ran the tower

    @property
    def views(self) -> int:
        return int(self.array.shape[1])

    @property
    def dim(self) -> int:
        return int(self.array.shape[2])

    def __len__(self) -> int:
        return int(self.array.shape[0])

    @cached_property
    def keys(self) -> list[str]:
        return read_lines(self.path / A.FEATURE_KEYS) if self.path is not None else []

    @cached_property
    def skipped(self) -> list[str]:
        return read_lines(self.path / A.FEATURE_SKIPPED) if self.path is not None else []

    def unit_rows(self, rows: np.ndarray, view: int = 0) -> torch.Tensor:
        """Rows ``rows`` of one view as float32, re-normalised after the float16 round trip. (n, D)

        Only those rows are read. Per row, the numbers are the ones normalising the whole table
        gives (each row's norm is its own reduction; tests/test_training_table.py checks it)."""
        picked = np.asarray(self.array[np.asarray(rows, dtype=np.int64), view], dtype=np.float32)  # (n, D)
        return F.normalize(torch.from_numpy(picked), dim=-1)

    @cached_property
    def embeddings(self) -> torch.Tensor:
        """View 0 (the plain preprocessing) of every row, as ``unit_rows`` gives them. (N, D) float32

        The whole table in memory: for evaluation and indexing; training gathers per step."""
        return self.unit_rows(np.arange(len(self)))

    def _index(self, keys: list[str]) -> np.ndarray:
        where = {k: i for i, k in enumerate(self.keys)}
        missing = [k for k in keys if k not in where]
        if missing:
            raise DataError(f"{len(missing)} key(s) have no cached feature, e.g. {missing[0]}",
                            hint="the table and the cache disagree; rebuild with `align features RECIPE`")
        return np.array([where[k] for k in keys], dtype=np.int64)

    def rows_for(self, keys: list[str]) -> torch.Tensor:
        """View-0 rows for ``keys``, in that order. (n, D) float32"""
        return self.unit_rows(self._index(keys))

    def stored_rows_for(self, keys: list[str]) -> np.ndarray:
        """View-0 rows for ``keys`` exactly as stored (float16, not re-normalised). (n, D)"""
        return np.ascontiguousarray(self.array[self._index(keys), 0])


def load_feature_cache(entry: str | Path) -> FeatureSet:
    """Open a complete entry; AlignError when it is incomplete or damaged. Reads no row and no key."""
    entry = Path(entry)
    problem = entry_problem(entry)
    if problem:
        raise AlignError(f"feature cache {entry} is unusable: {problem}",
                         "delete that folder, or run `align features RECIPE` to rebuild it")
    fingerprint = read_fingerprint(entry)
    shape = (count_lines(entry / A.FEATURE_KEYS), fingerprint["views"], fingerprint["tower"]["feature_dim"])
    array = (np.memmap(entry / A.FEATURES, dtype=np.float16, mode="r", shape=shape) if shape[0]
             else np.zeros(shape, dtype=np.float16))
    return FeatureSet(array=array, fingerprint=fingerprint, path=entry)


def count_lines(path: Path, block: int = 1 << 22) -> int:
    """How many keys ``read_lines`` would give (non-empty lines), read in blocks: no list of
    millions of strings for a count."""
    count, after_newline = 0, True
    with open(path, "rb") as fh:
        while chunk := fh.read(block):
            newline = np.frombuffer(chunk, dtype=np.uint8) == 10  # (n,)
            before = np.concatenate([[after_newline], newline[:-1]])  # (n,) the byte before each is a newline
            count += int((~newline & before).sum())  # a line is counted at its first byte
            after_newline = bool(newline[-1])
    return count


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
    rows = count_lines(entry / A.FEATURE_KEYS)
    want = rows * stored["views"] * stored["tower"]["feature_dim"] * 2
    have = (entry / A.FEATURES).stat().st_size
    if have != want:
        return f"{A.FEATURES} holds {have} bytes, {rows} keys need {want}"
    return None
