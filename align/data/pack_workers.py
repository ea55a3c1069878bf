"""Checking blocks of candidates in worker processes, results handed back in input order.

The listing stays in the main process and is fed to the workers one block at a time, with at most
``IN_FLIGHT_PER_WORKER`` blocks per worker queued or running: memory stays flat however long the
listing is, and the main process (which only appends ready-made bytes to shards) never waits long.
Workers are started with ``spawn``: a fork of a process that has loaded torch or opened threads can
deadlock, and a pack worker needs neither (each is one thread decoding images with Pillow).
"""
from __future__ import annotations

import multiprocessing
import multiprocessing.connection
import os
import threading
from collections import deque
from collections.abc import Iterator
from contextlib import contextmanager
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from functools import partial

from ..errors import DataError
from .pack_check import Checked, Refused, check_block
from .sources import Candidate

IN_FLIGHT_PER_WORKER = 4


def _exit_with_parent() -> None:
    """A worker ends when the pack that started it ends, even by SIGKILL: a worker's own end of the
    task queue keeps it from ever seeing that queue close, so it would otherwise wait forever."""
    parent = multiprocessing.parent_process()
    if parent is not None:
        threading.Thread(target=_wait_then_exit, args=(parent.sentinel,), daemon=True).start()


def _wait_then_exit(sentinel: int) -> None:
    multiprocessing.connection.wait([sentinel])  # ready once the parent process is gone
    os._exit(1)


def block_size_for(total: int, workers: int) -> int:
    """Candidates per block: large enough that handing a block over costs little next to checking
    it, small enough that every worker gets several blocks of a small source."""
    return max(1, min(64, total // (workers * IN_FLIGHT_PER_WORKER * 2)))


def _ready() -> None:
    """Nothing: handing each worker this starts it (its imports) while the listing is still read."""


@contextmanager
def checking_pool(workers: int) -> Iterator[ProcessPoolExecutor | None]:
    """WORKERS processes, started now; None for one worker (checks run in this process)."""
    if workers == 1:
        yield None
        return
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=_exit_with_parent)
    try:
        for _ in range(workers):  # one start per submission while fewer than WORKERS run
            pool.submit(_ready)
        yield pool
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def checked_blocks(blocks: Iterator[list[Candidate]], pool: ProcessPoolExecutor | None, *, workers: int,
                   max_chars: int, image_optional: bool) -> Iterator[tuple[list[Candidate], list[Checked | Refused]]]:
    """Each block with its outcomes, in the blocks' order; without a pool, checked in this process."""
    check = partial(check_block, max_chars=max_chars, image_optional=image_optional)
    if pool is None:
        for block in blocks:
            yield block, check(block)
        return
    pending: deque[tuple[list[Candidate], Future]] = deque()
    try:
        for block in blocks:
            pending.append((block, pool.submit(check, block)))
            if len(pending) >= workers * IN_FLIGHT_PER_WORKER:
                done, future = pending.popleft()
                yield done, future.result()
        while pending:
            done, future = pending.popleft()
            yield done, future.result()
    except BrokenProcessPool:
        raise DataError("a pack worker process stopped: killed, out of memory, or it could not start (a "
                        "script calling pack_source with workers > 1 must guard its top level with "
                        "if __name__ == '__main__':, as Python requires for spawned processes)",
                        hint="run the same command again: the pack resumes from its finished shards; "
                             "fewer --workers need less memory") from None
    finally:
        for _, future in pending:
            future.cancel()
