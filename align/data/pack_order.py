"""The source's candidates in key order without holding them all: sorted runs on disk, merged.

A pack writes samples in key order (the content hash is fed in that order, and equal keys are
then neighbours, so the first usable copy of a key is found without a set of every key). Sorting
a listing of millions in memory would make the pack's memory grow with the source; instead the
listing is cut into runs of ``RUN_SIZE`` candidates, each sorted and pickled into a folder of the
pack's staging area, then merged lazily (``heapq.merge``). A source smaller than one run never
touches the disk.

The same pass takes the listing's fingerprint: an order-free sum of one digest per candidate
(its fields, and the size and modification time of every file it names), so a pack resumed from
finished shards can tell that the source has not changed since they were written.
"""
from __future__ import annotations

import hashlib
import heapq
import json
import os
import pickle
import shutil
from collections.abc import Iterable, Iterator
from pathlib import Path

from .sources import Candidate, candidate_order

RUN_SIZE = 50_000  # candidates per sorted run: about 50-100 MB of Python objects at most


def _file_state(path: Path | None) -> list | None:
    """Size and modification time: a changed file changes them (reading every file would cost as
    much as the check itself)."""
    if path is None:
        return None
    try:
        stat = os.stat(path)
    except OSError:
        return None
    return [stat.st_size, stat.st_mtime_ns]


def candidate_digest(candidate: Candidate) -> int:
    c = candidate  # the fields by hand: dataclasses.astuple deep-copies, at ten times the cost
    fields = [c.key, c.source, str(c.image_path), c.caption, str(c.caption_path), c.labels, str(c.labels_path),
              c.problem, c.outside, c.order]
    files = [_file_state(p) for p in (c.image_path, c.caption_path, c.labels_path)]
    # ensure_ascii: surrogate-escaped bytes of a bad table row are written as escapes, not refused
    text = json.dumps([fields, files], default=str, ensure_ascii=True)
    return int.from_bytes(hashlib.sha256(text.encode("ascii")).digest(), "big")


class OrderedListing:
    """One pass over the listing: the candidates' count, fingerprint and keys (only when asked:
    stored vectors need them), and afterwards their key-ordered stream, as often as wanted."""

    def __init__(self, candidates: Iterable[Candidate], runs_dir: Path, keep_keys: bool = False):
        self.runs_dir = runs_dir
        self.count = 0
        self.keys: set[str] | None = set() if keep_keys else None
        self._runs: list[Path] = []
        self._memory: list[Candidate] = []
        digest = 0
        block: list[Candidate] = []
        for candidate in candidates:
            self.count += 1
            digest = (digest + candidate_digest(candidate)) % 2**256  # a multiset sum: listing order is free
            if self.keys is not None:
                self.keys.add(candidate.key)
            block.append(candidate)
            if len(block) >= RUN_SIZE:
                self._spill(block)
                block = []
        block.sort(key=candidate_order)
        if self._runs and block:
            self._spill(block)
        else:
            self._memory = block
        self.fingerprint = f"{self.count}:{digest:064x}"

    def _spill(self, block: list[Candidate]) -> None:
        block.sort(key=candidate_order)
        self.runs_dir.mkdir(parents=True, exist_ok=True)
        path = self.runs_dir / f"run-{len(self._runs):06d}.pickle"
        with open(path, "wb") as stream:  # written and read back by this process only
            for candidate in block:
                pickle.dump(candidate, stream, protocol=pickle.HIGHEST_PROTOCOL)
        self._runs.append(path)

    @staticmethod
    def _read_run(path: Path) -> Iterator[Candidate]:
        with open(path, "rb") as stream:
            while True:
                try:
                    yield pickle.load(stream)
                except EOFError:
                    return

    def ordered(self, skip: int = 0) -> Iterator[Candidate]:
        """Every candidate in key order (equal keys in listing order), the first ``skip`` left out."""
        if not self._runs:
            stream: Iterator[Candidate] = iter(self._memory)
        else:
            stream = heapq.merge(*(self._read_run(p) for p in self._runs), key=candidate_order)
        for position, candidate in enumerate(stream):
            if position >= skip:
                yield candidate

    def close(self) -> None:
        shutil.rmtree(self.runs_dir, ignore_errors=True)


def blocks_of(candidates: Iterator[Candidate], size: int) -> Iterator[list[Candidate]]:
    block: list[Candidate] = []
    for candidate in candidates:
        block.append(candidate)
        if len(block) == size:
            yield block
            block = []
    if block:
        yield block
