"""A split's training table on disk: captions read by offset, their positive ids and each row's
feature row, memory-mapped by every process instead of N Python strings and dicts per process.

A table folder ``<cache root>/tables/<split>-<digest>/`` holds (names in ``align.artifacts``)

- ``captions.utf8``: every caption's UTF-8 bytes, one after another;
- ``caption_offsets.i64``: (N + 1,) int64, caption i is bytes ``offsets[i]:offsets[i + 1]``;
- ``caption_ids.i64`` / ``label_ids.i64``: (N,) int64, the ids ``align.loss.positive_ids`` gives in
  ``caption+labels`` mode (label id -1 = no labels). The recipe's ``loss.positives`` only chooses
  which of them a step carries, so one table serves every setting;
- ``feature_rows.i64``: (N,) int64, the feature entry's row of training row i;
- ``table.json``: what it was built from and its row count, written last.

Rows are the split's samples in canonical order whose image has a feature row (images that failed
to decode drop out): the rows, order and ids the in-memory table had. The digest names the split's
content hash (from the manifest) and the feature entry, so a repack or another entry gets another
table. The first process to take the folder's lock builds it, streaming the shards' text members
(memory does not grow with the split), in a temporary folder swapped in whole; the others wait on
the lock and open it.
"""
from __future__ import annotations

import fcntl
import json
import operator
import os
import shutil
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Iterator

import numpy as np
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from .. import artifacts as A
from ..data.feature_entry import fingerprint_digest
from ..data.shards import iter_table, read_manifest
from ..errors import AlignError
from ..fileio import swap_dir_in, write_json_atomic
from ..loss import positive_ids
from .cache import FeatureSet

TABLE_FORMAT = 1
_BLOCK = 1 << 16  # rows hashed and written at a time while building


class CaptionColumn(Sequence):
    """N captions over one UTF-8 blob and its (N + 1,) offsets; a caption is decoded when read."""

    def __init__(self, blob: np.ndarray, offsets: np.ndarray):
        self.blob, self.offsets = blob, offsets  # (bytes,) uint8, (N + 1,) int64

    def __len__(self) -> int:
        return len(self.offsets) - 1

    def __getitem__(self, index):
        if isinstance(index, slice):
            return self.take(np.arange(len(self))[index])
        i = operator.index(index)
        i = i + len(self) if i < 0 else i
        if not 0 <= i < len(self):
            raise IndexError(f"caption {index} of {len(self)}")
        start, stop = int(self.offsets[i]), int(self.offsets[i + 1])
        return self.blob[start:stop].tobytes().decode("utf-8")

    def take(self, rows) -> list[str]:
        """Captions of ``rows`` (any order), each read by its offsets."""
        return [self[int(i)] for i in np.asarray(rows).reshape(-1)]

    def __iter__(self) -> Iterator[str]:
        for start in range(0, len(self), _BLOCK):  # one read per block, not one per caption
            offsets = np.asarray(self.offsets[start:start + _BLOCK + 1], dtype=np.int64)
            data = self.blob[offsets[0]:offsets[-1]].tobytes()
            bounds = (offsets - offsets[0]).tolist()
            for a, b in zip(bounds, bounds[1:]):
                yield data[a:b].decode("utf-8")


@dataclass
class TrainingTable:
    """One split's training rows on disk: row i's caption, its ids, and its feature row."""

    path: Path
    captions: CaptionColumn
    caption_ids: np.ndarray  # (N,) int64, memory-mapped; equal id = the same caption text
    label_ids: np.ndarray  # (N,) int64, memory-mapped; equal id = the same labels, -1 = none
    feature_rows: np.ndarray  # (N,) int64, memory-mapped: row i's row in the feature entry
    built: bool = False  # this call built it (False: found complete)

    def __len__(self) -> int:
        return len(self.feature_rows)


def _column(path: Path, dtype, length: int) -> np.ndarray:
    # np.memmap refuses an empty file; an empty column needs no mapping
    return np.memmap(path, dtype=dtype, mode="r", shape=(length,)) if length else np.zeros(0, dtype=dtype)


def _files_problem(folder: Path, identity: dict) -> str | None:
    """Why ``folder`` is not the complete table for ``identity`` (None: it is)."""
    try:
        info = json.loads((folder / A.TABLE_INFO).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return f"no readable {A.TABLE_INFO}"
    if info.get("identity") != identity:
        return "it was built from other data"
    rows = int(info.get("rows", -1))
    sizes = {A.TABLE_OFFSETS: (rows + 1) * 8, A.TABLE_CAPTION_IDS: rows * 8, A.TABLE_LABEL_IDS: rows * 8,
             A.TABLE_FEATURE_ROWS: rows * 8, A.TABLE_CAPTIONS: int(info.get("caption_bytes", -1))}
    for name, want in sizes.items():
        path = folder / name
        if not path.is_file() or path.stat().st_size != want:
            return f"{name} is missing or not {want} bytes"
    return None


def open_table(folder: str | Path) -> TrainingTable:
    """Memory-map a complete table folder (checked by the caller); reads no row."""
    folder = Path(folder)
    info = json.loads((folder / A.TABLE_INFO).read_text(encoding="utf-8"))
    rows = int(info["rows"])
    offsets = (np.memmap(folder / A.TABLE_OFFSETS, dtype=np.int64, mode="r", shape=(rows + 1,)) if rows
               else np.zeros(1, dtype=np.int64))
    captions = CaptionColumn(_column(folder / A.TABLE_CAPTIONS, np.uint8, int(info["caption_bytes"])), offsets)
    return TrainingTable(folder, captions, _column(folder / A.TABLE_CAPTION_IDS, np.int64, rows),
                         _column(folder / A.TABLE_LABEL_IDS, np.int64, rows),
                         _column(folder / A.TABLE_FEATURE_ROWS, np.int64, rows))


# ---------------------------------------------------------------------------------------------
# lining the split's samples up with the feature entry's rows


class _OtherOrder(Exception):
    """The feature entry does not list its keys in the split's canonical order."""


def _feature_keys(feats: FeatureSet) -> Iterator[str]:
    """The entry's keys one line at a time (never the whole list)."""
    with open(feats.path / A.FEATURE_KEYS, encoding="utf-8", newline="\n") as fh:
        for line in fh:
            key = line[:-1] if line.endswith("\n") else line
            if key:
                yield key


def _walked(samples: Iterable[tuple[str, str, dict]], keys: Iterator[str]) -> Iterator[tuple[str, dict, int]]:
    """(caption, labels, feature row) of each sample whose key is the entry's next key.

    An entry lists its keys in canonical order minus the images that failed to decode, so one walk
    of both pairs them, holding no key set. Keys left at the end mean another order: _OtherOrder."""
    expected, row = next(keys, None), 0
    for key, caption, labels in samples:
        if key == expected:
            yield caption, labels, row
            expected, row = next(keys, None), row + 1
    if expected is not None:
        raise _OtherOrder


def _looked_up(samples: Iterable[tuple[str, str, dict]], keys: Iterator[str]) -> Iterator[tuple[str, dict, int]]:
    """The same rows for an entry in any order (its stored vectors' own, say): one dict of its keys."""
    where = {key: row for row, key in enumerate(keys)}
    for key, caption, labels in samples:
        if key in where:
            yield caption, labels, where[key]


# ---------------------------------------------------------------------------------------------
# writing


class _Columns:
    """The table's files in a folder, appended a block of rows at a time."""

    def __init__(self, folder: Path):
        self.folder = folder
        names = (A.TABLE_CAPTIONS, A.TABLE_OFFSETS, A.TABLE_CAPTION_IDS, A.TABLE_LABEL_IDS, A.TABLE_FEATURE_ROWS)
        self.files = {name: open(folder / name, "wb") for name in names}
        self.rows, self.caption_bytes = 0, 0
        self.files[A.TABLE_OFFSETS].write(np.zeros(1, dtype=np.int64).tobytes())

    def add(self, block: list[tuple[str, dict, int]]) -> None:
        captions = [caption for caption, _, _ in block]
        caption_ids, label_ids = positive_ids(captions, [labels for _, labels, _ in block], "caption+labels")
        encoded = [caption.encode("utf-8") for caption in captions]
        ends = self.caption_bytes + np.cumsum([len(e) for e in encoded], dtype=np.int64)  # (b,)
        self.files[A.TABLE_CAPTIONS].write(b"".join(encoded))
        self.files[A.TABLE_OFFSETS].write(ends.tobytes())
        self.files[A.TABLE_CAPTION_IDS].write(caption_ids.numpy().astype(np.int64).tobytes())
        self.files[A.TABLE_LABEL_IDS].write(label_ids.numpy().astype(np.int64).tobytes())
        self.files[A.TABLE_FEATURE_ROWS].write(np.array([row for _, _, row in block], dtype=np.int64).tobytes())
        self.rows += len(block)
        self.caption_bytes = int(ends[-1])

    def close(self) -> None:
        for fh in self.files.values():
            fh.close()


def write_table(folder: Path, rows: Iterable[tuple[str, dict, int]], identity: dict, on_block=None) -> int:
    """Write (caption, labels, feature row) rows as a table folder, ``table.json`` last. Returns N."""
    folder.mkdir(parents=True, exist_ok=True)
    columns, block = _Columns(folder), []
    try:
        for row in rows:
            block.append(row)
            if len(block) == _BLOCK:
                columns.add(block)
                block = []
                if on_block is not None:
                    on_block(columns.rows)
        if block:
            columns.add(block)
    finally:
        columns.close()
    write_json_atomic(folder / A.TABLE_INFO, {"format_version": TABLE_FORMAT, "identity": identity,
                                              "rows": columns.rows, "caption_bytes": columns.caption_bytes})
    return columns.rows


def _build(folder: Path, feats: FeatureSet, shards_dir: Path, split: str, identity: dict, console: Console) -> None:
    """Build into a temporary folder beside ``folder`` and swap it in (we hold the lock)."""
    for stale in folder.parent.glob(f".{folder.name}.*.partial"):  # a killed build's leftovers
        shutil.rmtree(stale, ignore_errors=True)
    temp = folder.with_name(f".{folder.name}.{os.getpid()}.partial")
    total = read_manifest(shards_dir)["splits"][split]["samples"]
    columns = [TextColumn(f"[bold]{split} training table"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn()]
    try:
        with Progress(*columns, console=console, transient=True) as progress:
            task = progress.add_task("table", total=total)
            try:
                rows = write_table(temp, _walked(iter_table(shards_dir, split), _feature_keys(feats)), identity,
                                   on_block=lambda n: progress.update(task, completed=n))
            except _OtherOrder:  # stored vectors in an order of their own: once more, by key
                shutil.rmtree(temp, ignore_errors=True)
                rows = write_table(temp, _looked_up(iter_table(shards_dir, split), _feature_keys(feats)), identity)
        swap_dir_in(temp, folder)
    finally:
        shutil.rmtree(temp, ignore_errors=True)
    console.print(f"built the {split} training table: {rows} rows -> {folder}")


class _TableLock:
    """One lock per table folder, so two processes (ranks, or two commands) never build it twice."""

    def __init__(self, folder: Path):
        self.path = folder.with_name(f".{folder.name}.lock")

    def __enter__(self):
        self.fh = open(self.path, "a+")
        fcntl.flock(self.fh, fcntl.LOCK_EX)
        return self

    def __exit__(self, *exc):
        fcntl.flock(self.fh, fcntl.LOCK_UN)
        self.fh.close()
        return False


def split_table(feats: FeatureSet, shards_dir: str | Path, split: str, root: str | Path,
                console: Console | None = None) -> TrainingTable:
    """The training table of ``split`` lined up with the feature entry ``feats``: opened when a
    complete one exists under ``root``/tables, else built once (the other processes wait for it)."""
    console = console or Console(stderr=True)
    shards_dir = Path(shards_dir)
    content_hash = read_manifest(shards_dir)["splits"][split]["content_hash"]
    identity = {"format_version": TABLE_FORMAT, "split": split, "split_content_hash": content_hash,
                "features": feats.path.name}
    folder = Path(root) / A.TABLES / f"{split}-{fingerprint_digest(identity)[:16]}"
    if _files_problem(folder, identity) is None:
        return open_table(folder)
    try:
        folder.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise AlignError(f"cannot create the training table folder {folder.parent}: {exc}",
                         "set vision.feature_cache=DIR to a folder you can write") from None
    with _TableLock(folder):
        built = _files_problem(folder, identity) is not None  # another process may have finished it meanwhile
        if built:
            _build(folder, feats, shards_dir, split, identity, console)
    table = open_table(folder)
    table.built = built
    return table
