"""The chunks of a cache build in progress, and the lock that lets several processes build one entry.

Under ``<entry>/chunks/``:

- ``plan.json``: rows per chunk, fixed by the first attempt, so a resumed build batches as it did;
- ``NNNNNN.claim``: created exclusively (``O_EXCL``) by the one process that embeds chunk NNNNNN;
- ``NNNNNN.npz``: the finished chunk, written under a temporary name and renamed into place.

Chunk i always holds images i*rows .. (i+1)*rows - 1 of the split's canonical order and always
runs through the tower as one batch of ``rows``, so its bytes do not depend on which process (rank,
local worker, or a second command) embedded it. Builders hold the entry lock shared while they
claim and embed; preparing an entry (clearing an outdated one, dropping a killed build's claims
and temporaries) and assembling it take the lock exclusively, never beside a builder, so an
exclusive holder knows that a claim without its chunk belongs to a process that died.
"""
from __future__ import annotations

import fcntl
import json
import os
import shutil
import time
from pathlib import Path

import numpy as np

from .. import artifacts as A
from ..data.shards import load_table
from ..fileio import write_bytes_atomic

PLAN = "plan.json"


class EntryLock:
    """flock on the entry's lock file: shared while building chunks, exclusive to prepare or assemble.

    Converting between the two is not atomic (flock(2)): between them another process may take the
    lock exclusively, which is harmless here, since a conversion happens only before this process
    claims anything (to shared) or after every chunk it claimed is written (to exclusive)."""

    def __init__(self, entry: Path):
        self.fh = open(entry / A.FEATURE_LOCK, "a+")

    def try_exclusive(self) -> bool:
        try:
            fcntl.flock(self.fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return True
        except BlockingIOError:
            return False

    def exclusive(self) -> None:
        fcntl.flock(self.fh, fcntl.LOCK_EX)

    def shared(self) -> None:
        fcntl.flock(self.fh, fcntl.LOCK_SH)

    def release(self) -> None:
        fcntl.flock(self.fh, fcntl.LOCK_UN)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        fcntl.flock(self.fh, fcntl.LOCK_UN)
        self.fh.close()
        return False


def chunk_count(images: int, rows: int) -> int:
    return -(-images // rows)


class ChunkStore:
    """The chunk files of one entry's build. Picklable (a path): DataLoader workers and local build
    processes claim chunks through it."""

    def __init__(self, entry: Path):
        self.entry = Path(entry)
        self.dir = self.entry / A.FEATURE_CHUNKS

    def path(self, index: int) -> Path:
        return self.dir / f"{index:06d}.npz"

    def _claim_path(self, index: int) -> Path:
        return self.dir / f"{index:06d}.claim"

    # -- under the exclusive lock ------------------------------------------------------------

    def plan_rows(self, default: int) -> int:
        """Rows per chunk: the first attempt's, kept so a resumed build batches exactly as it did."""
        self.dir.mkdir(parents=True, exist_ok=True)
        plan = self.dir / PLAN
        if plan.is_file():
            return int(json.loads(plan.read_text(encoding="utf-8"))["chunk_rows"])
        write_bytes_atomic(plan, json.dumps({"chunk_rows": default}).encode("utf-8"))
        return default

    def prepare(self) -> int:
        """Before any builder starts: keep the finished chunks that read back whole, drop damaged
        ones, claims and half-written temporaries (all left by killed builds). Returns the number
        of finished chunks."""
        finished = 0
        for path in sorted(self.dir.iterdir()):
            if path.suffix == ".npz" and path.stem.isdigit():
                try:
                    with np.load(path) as chunk:
                        chunk["features"], chunk["keys"], chunk["failed"]  # noqa: B018 - reads every member
                    finished += 1
                    continue
                except Exception:  # noqa: BLE001 - a damaged chunk is simply redone
                    pass
            if path.name != PLAN:
                path.unlink()
        return finished

    def release_missing(self, chunks: int) -> list[int]:
        """The chunks below ``chunks`` not finished, their claims dropped (their claimants died:
        no builder holds the lock beside us), so this process can embed them."""
        missing = [index for index in range(chunks) if not self.path(index).is_file()]
        for index in missing:
            self._claim_path(index).unlink(missing_ok=True)
        return missing

    def assemble(self, chunks: int, shards_dir: Path, split: str) -> None:
        """Concatenate the chunks in order into the final files; features.f16 goes last (completion)."""
        entry = self.entry
        keys, failed = [], []
        temp = entry / f".{A.FEATURES}.{os.getpid()}.partial"
        with open(temp, "wb") as out:  # streamed: the whole array never sits in memory
            for index in range(chunks):
                with np.load(self.path(index)) as chunk:
                    out.write(np.ascontiguousarray(chunk["features"], dtype=np.float16).tobytes())
                    keys += chunk["keys"].tolist()
                    failed += chunk["failed"].tolist()
        seen = set(keys) | set(failed)
        failed += [k for k in load_table(shards_dir, split).keys if k not in seen]  # samples with no image member
        write_bytes_atomic(entry / A.FEATURE_KEYS, "".join(k + "\n" for k in keys).encode("utf-8"))
        write_bytes_atomic(entry / A.FEATURE_SKIPPED, "".join(k + "\n" for k in failed).encode("utf-8"))
        os.replace(temp, entry / A.FEATURES)
        shutil.rmtree(self.dir, ignore_errors=True)

    # -- under the shared lock -----------------------------------------------------------------

    def claim(self, index: int) -> bool:
        """True for the one process that gets to embed chunk ``index`` (not finished, not claimed)."""
        if self.path(index).is_file():
            return False
        try:
            fd = os.open(self._claim_path(index), os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            return False
        os.write(fd, f"{os.uname().nodename} {os.getpid()}\n".encode("utf-8"))
        os.close(fd)
        return True

    def write(self, index: int, keys: list[str], features: np.ndarray, failed: list[str]) -> None:
        temp = self.dir / f".{index:06d}.{os.getpid()}.partial"
        with open(temp, "wb") as fh:
            np.savez(fh, features=features, keys=np.array(keys, dtype=str), failed=np.array(failed, dtype=str))
        os.replace(temp, self.path(index))

    def finished(self) -> int:
        """How many chunks are finished (whoever wrote them), for progress."""
        with os.scandir(self.dir) as entries:
            return sum(1 for e in entries if e.name.endswith(".npz") and not e.name.startswith("."))


class FinishedCount:
    """The finished-chunk count for a progress bar, re-read at most every ``every`` seconds (other
    processes write chunks too; listing a folder of 10^4 chunks per chunk would cost more)."""

    def __init__(self, store: ChunkStore, every: float = 2.0):
        self.store, self.every, self.at, self.value = store, every, float("-inf"), 0

    def __call__(self, at_least: int = 0) -> int:
        now = time.monotonic()
        if now - self.at >= self.every:
            self.at, self.value = now, self.store.finished()
        return max(self.value, at_least)
