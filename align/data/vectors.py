"""Stored vectors for ``align pack --vectors``: the image embeddings a team already holds, checked
row by row, matched to the table's samples by key, and written beside the shards as one
feature-cache entry per split (fingerprint: the declared model id and the vectors' content hash).

Two forms:

- an ``.npy`` array (N, D) with a keys file, one key per line (line i names row i);
- a Parquet file with a key column and a vector column (a list of numbers per row).

A key names a sample as the table does: its ``key`` column, or its image path. An image suffix is
dropped and other characters become ``_`` exactly as in pack's own keys, so ``shop/cat 1.jpg``,
``shop/cat 1`` and ``shop_cat_1`` all name the same sample.

A vector, and the sample with its key, is rejected for: ``vector_wrong_width`` (its length differs
from ``--vector-dim``, or from the most common length), ``vector_not_finite`` (NaN or an infinity),
``vector_zero`` (no direction), ``duplicate_vector_key`` (the key is in the file twice: which copy
is right is unknown). A sample without a vector is ``missing_vector``; a vector whose key no row of
the table has is ``unmatched_vector``. Every reject is counted and listed; the rest is packed.

Rows are stored in float16 after dividing by a power of two near their norm: exact (only the
exponent changes), direction-preserving, and safe from float16's range. Rows that are unit length
already are stored as they are.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..artifacts import FEATURE_ROOT, FEATURES, FINGERPRINT
from ..errors import DataError
from .feature_entry import FORMAT_VERSION, fingerprint_digest, write_entry_from_file

ROWS_PER_BLOCK = 65_536  # rows converted at a time when writing an entry (~400 MB as float64 at 768-d)
from .sources import Reject, explicit_key


@dataclass
class VectorSource:
    """Where the vectors are and what made them (the pack options)."""

    path: Path
    model: str  # the model id the team declares; recorded, never interpreted
    keys: Path | None = None  # .npy: the keys file
    key_column: str = "key"  # Parquet
    vector_column: str = "vector"  # Parquet
    dim: int = 0  # the width every vector must have; 0 = the most common width in the file


def _read_npy(source: VectorSource) -> tuple[list[str], np.ndarray, np.ndarray]:
    if source.keys is None:
        raise DataError(f"--vectors {source.path} is an .npy array: its keys are missing",
                        hint="pass --vector-keys FILE with one key per line, line i naming row i")
    try:
        array = np.load(source.path, mmap_mode="r", allow_pickle=False)  # never unpickle
        lines = source.keys.read_text(encoding="utf-8").splitlines()
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        raise DataError(f"cannot read the stored vectors {source.path} / {source.keys}: {exc}",
                        hint="save the vectors with numpy.save (a 2-D float array) and the keys as UTF-8 text") from None
    if array.ndim != 2 or array.dtype.kind not in "fiu":
        raise DataError(f"{source.path} holds a {array.ndim}-D {array.dtype} array; stored vectors are (N, D) numbers",
                        hint="save one row per image: numpy.save(path, vectors) with vectors.shape == (N, D)")
    if len(lines) != len(array):
        raise DataError(f"{source.keys} has {len(lines)} lines but {source.path} has {len(array)} rows",
                        hint="write exactly one key per row, in row order")
    offsets = np.arange(len(array) + 1, dtype=np.int64) * array.shape[1]
    return lines, array.reshape(-1), offsets


def _read_parquet(source: VectorSource) -> tuple[list[str], np.ndarray, np.ndarray]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(source.path, columns=[source.key_column, source.vector_column])
    except (OSError, KeyError, pa.ArrowException) as exc:
        raise DataError(f"cannot read columns {source.key_column!r} and {source.vector_column!r} of {source.path}: "
                        f"{exc}", hint="name the columns with --key-column and --vector-column") from None
    column = table.column(source.vector_column).combine_chunks()
    if not pa.types.is_list(column.type) and not pa.types.is_large_list(column.type) \
            and not pa.types.is_fixed_size_list(column.type):
        raise DataError(f"column {source.vector_column!r} of {source.path} is {column.type}, not a list of numbers",
                        hint="store each vector as a list<float> cell")
    if pa.types.is_fixed_size_list(column.type):
        column = column.cast(pa.list_(column.type.value_type))
    lengths = column.value_lengths().fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64)
    offsets = np.concatenate([[0], np.cumsum(lengths)])
    values = column.flatten().to_numpy(zero_copy_only=False)  # nulls inside a vector become NaN
    keys = [k if isinstance(k, str) else "" for k in table.column(source.key_column).to_pylist()]
    return keys, values.astype(np.float32, copy=False), offsets


class StoredVectors:
    """One file's vectors, checked lazily by key, collected per split, written as cache entries."""

    def __init__(self, source: VectorSource):
        if not source.model.strip():
            raise DataError("--vectors needs --vector-model: the id of the model that made them",
                            hint="e.g. --vector-model product-photos-vit-b16@2024-05 (recorded with the vectors)")
        if not source.path.is_file():
            raise DataError(f"no stored vectors at {source.path}", hint="pass --vectors FILE (.npy or .parquet)")
        self.source = source
        reader = _read_parquet if source.path.suffix.lower() == ".parquet" else _read_npy
        raw_keys, self._values, self._offsets = reader(source)
        widths = np.diff(self._offsets)
        self.dim = source.dim or (int(Counter(widths.tolist()).most_common(1)[0][0]) if len(widths) else 0)
        if not self.dim:
            raise DataError(f"{source.path} holds no vectors", hint="pass a file with at least one row")
        self.keys = [explicit_key(k) if k.strip() else "" for k in raw_keys]
        counts = Counter(self.keys)
        self._row = {k: i for i, k in enumerate(self.keys) if counts[k] == 1 and k}
        self._duplicates = {k for k, n in counts.items() if n > 1 and k}
        self._taken: dict[str, list[tuple[str, int]]] = {}

    def _problem(self, index: int) -> str | None:
        row = self._values[self._offsets[index]:self._offsets[index + 1]]
        if len(row) != self.dim:
            return "vector_wrong_width"
        if not np.isfinite(row).all():
            return "vector_not_finite"
        return "vector_zero" if not np.any(row) else None

    def check(self, key: str) -> None:
        """Raise Reject unless ``key`` has exactly one usable vector."""
        if key in self._duplicates:
            raise Reject("duplicate_vector_key", f"{self.source.path} holds {key!r} more than once")
        if key not in self._row:
            raise Reject("missing_vector", f"{self.source.path} has no vector for {key!r}")
        problem = self._problem(self._row[key])
        if problem:
            raise Reject(problem, f"row {self._row[key]} of {self.source.path} (width {self.dim} expected)")

    def take(self, key: str, split: str) -> None:
        """The sample ``key`` was packed into ``split``: its vector goes into that split's entry."""
        self._taken.setdefault(split, []).append((key, self._row[key]))

    def unmatched(self, table_keys: set[str]) -> list[dict]:
        """A reject per vector whose key no row of the table has (in file order). A row that has
        one but was rejected is counted once, under its own reason."""
        return [{"source": f"{self.source.path}:row {i}", "key": key, "reason": "unmatched_vector",
                 "detail": "no row of the table has this key" if key else "the row has no key"}
                for i, key in enumerate(self.keys) if key not in table_keys]

    def _rows(self, indices: list[int]) -> np.ndarray:
        """Stored form of the rows: scaled by a power of two to about unit length, float16. (n, 1, D)"""
        rows = np.stack([self._values[self._offsets[i]:self._offsets[i + 1]] for i in indices]).astype(np.float64)
        exponent = np.round(np.log2(np.linalg.norm(rows, axis=1, keepdims=True)))
        return np.ldexp(rows, -exponent.astype(np.int64)).astype(np.float16)[:, None, :]

    def write_entries(self, stage: Path, splits: dict[str, dict]) -> dict:
        """One entry per split that took rows, into STAGE/features/; returns the manifest's record.

        Rows are converted and written ROWS_PER_BLOCK at a time (their float64 form for the whole
        split would be 8 x N x D bytes: 24 GB at 4M x 768), hashed as they go; the entry's folder is
        named by a fingerprint that holds that hash, so the rows land in a temporary file first."""
        record = {"file": self.source.path.name, "model": self.source.model, "dim": self.dim, "splits": {}}
        for split, taken in sorted(self._taken.items()):
            keys = [k for k, _ in taken]
            temp = stage / f".{split}-{FEATURES}.partial"
            digest = hashlib.sha256()
            with open(temp, "wb") as out:
                for start in range(0, len(taken), ROWS_PER_BLOCK):
                    block = taken[start:start + ROWS_PER_BLOCK]
                    rows = self._rows([i for _, i in block])  # (b, 1, D) float16
                    for (key, _), row in zip(block, rows):
                        digest.update(key.encode("utf-8") + b"|" + row.astype("<f2").tobytes())
                    out.write(np.ascontiguousarray(rows).tobytes())
            side = {"source": "stored", "model": self.source.model, "weights_sha256": None, "files_sha256": None,
                    "preprocessing": None, "pooling": None, "normalisation": "l2", "feature_dim": self.dim,
                    "vectors_sha256": digest.hexdigest()}
            fingerprint = {"format_version": FORMAT_VERSION, "tower": side, "split": split,
                           "split_content_hash": splits[split]["content_hash"], "split_samples": splits[split]["samples"],
                           "views": 1, "augmentation": None, "dtype": "float16"}
            write_entry_from_file(stage / FEATURE_ROOT / fingerprint_digest(fingerprint), fingerprint, keys, temp, [])
            record["splits"][split] = {"rows": len(keys), "content_sha256": digest.hexdigest()}
        return record


def _is_stored_entry(entry: Path) -> bool:
    try:
        fingerprint = json.loads((entry / FINGERPRINT).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return (fingerprint.get("tower") or {}).get("source") == "stored"


def replace_stored_entries(stage: Path, out: Path) -> None:
    """Move the stage's entries into OUT/features/, after removing the stored vectors of the pack
    they replace (the tower's own cache entries there are kept)."""
    target = out / FEATURE_ROOT
    if target.is_dir():
        for entry in target.iterdir():
            if entry.is_dir() and _is_stored_entry(entry):
                shutil.rmtree(entry)
    staged = stage / FEATURE_ROOT
    if staged.is_dir():
        target.mkdir(exist_ok=True)
        for entry in sorted(staged.iterdir()):
            os.replace(entry, target / entry.name)
        staged.rmdir()
