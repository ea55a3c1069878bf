"""``--processes N`` without a launcher: N local build processes, one torch thread each, claiming
chunks of one entry side by side (on a CPU machine, the stand-in for N devices).

The processes are forked from the one that loaded the tower, so none of them imports torch or
loads weights again (a spawned process would spend seconds on both before its first chunk); a tower
that is not a torch module (an onnxruntime session, whose threads do not survive a fork) is loaded
afresh in spawned processes instead, and must come out with the same fingerprint. A forked process
runs torch with one thread only, as DataLoader workers do: OpenMP's pool is not safe to reuse after
a fork at more threads.

The parent only coordinates: it starts the clock when every process holds its tower, shows the
progress, calls ``on_chunk``, and stops the others and raises when one fails or dies.
"""
from __future__ import annotations

import multiprocessing
import os
import queue as queue_module
import time
import traceback
from typing import Callable

import torch

from ..errors import AlignError
from ..offline import use_offline_defaults
from ..recipe import VisionConfig
from ..vision import FrozenImageTower, load_image_tower
from .embed import ChunkJob, ShareResult, embed_claimed

READY_TIMEOUT_S = 600  # a spawned process imports torch and loads the tower first


def _start_method(tower: FrozenImageTower) -> str:
    return "fork" if isinstance(tower.model, torch.nn.Module) else "spawn"


def _build_process(slot: int, job: ChunkJob, tower: FrozenImageTower | None, cfg: VisionConfig,
                   expected: dict, messages, go) -> None:
    parent = os.getppid()
    try:
        torch.set_num_threads(1)
        if tower is None:  # spawned: nothing was inherited
            use_offline_defaults()
            tower = load_image_tower(cfg)
            if tower.fingerprint != expected:
                raise ValueError("the tower loaded from the recipe differs from the one the build was asked "
                                 "for; build with one process")
        messages.put(("ready", slot))
        go.wait()

        def report(index: int, images: int) -> None:
            if os.getppid() != parent:  # the parent died: stop, the finished chunks stay for a rerun
                os._exit(1)
            messages.put(("chunk", slot, index, images))

        result = embed_claimed(tower, job, report)
        messages.put(("done", slot, result.images, result.split_images, result.chunks))
    except BaseException:  # noqa: BLE001 - anything, sent back whole: the parent raises it
        messages.put(("error", slot, traceback.format_exc()))


class LocalBuild:
    """Start N build processes for ``job``; ``run`` waits for them and returns their sum."""

    def __init__(self, processes: int, tower: FrozenImageTower, cfg: VisionConfig, job: ChunkJob):
        method = _start_method(tower)
        context = multiprocessing.get_context(method)
        self.messages, self.go = context.Queue(), context.Event()
        inherited = tower if method == "fork" else None
        # not daemonic: a build process may start its own decoding workers
        self.children = [context.Process(target=_build_process, name=f"align-build-{slot}",
                                         args=(slot, job, inherited, cfg, tower.fingerprint, self.messages, self.go))
                         for slot in range(processes)]
        for child in self.children:
            child.start()

    def _next(self, timeout: float):
        """The next message, or an error when a process died without saying why."""
        while True:
            try:
                return self.messages.get(timeout=min(timeout, 0.5))
            except queue_module.Empty:
                timeout -= 0.5
                dead = [c for c in self.children if c.exitcode not in (None, 0)]
                if dead:
                    raise AlignError(f"a feature build process ended with exit code {dead[0].exitcode}",
                                     "run the command again: it continues from the finished chunks") from None
                if timeout <= 0:
                    raise AlignError("the feature build processes did not start in time",
                                     "run with --processes 1, or check the machine's memory") from None

    def wait_ready(self) -> float:
        """Block until every process holds its tower, then let them go; the time they went."""
        ready = 0
        while ready < len(self.children):
            message = self._next(READY_TIMEOUT_S)
            if message[0] == "error":
                self._raise(message)
            ready += message[0] == "ready"
        started = time.perf_counter()
        self.go.set()
        return started

    def run(self, on_chunk: Callable[[int, int], None]) -> ShareResult:
        total, done = ShareResult(0, 0, 0), 0
        while done < len(self.children):
            message = self._next(float("inf"))
            kind = message[0]
            if kind == "error":
                self._raise(message)
            elif kind == "chunk":
                on_chunk(message[2], message[3])
            elif kind == "done":
                done += 1
                total.images += message[2]
                total.split_images = max(total.split_images, message[3])
                total.chunks += message[4]
        for child in self.children:
            child.join()
        return total

    def _raise(self, message) -> None:
        raise AlignError(f"feature build process {message[1]} failed:\n{message[2].rstrip()}",
                         "run the command again: it continues from the finished chunks")

    def stop(self) -> None:
        """End every process still running (after a failure, or when the parent is interrupted)."""
        for child in self.children:
            if child.is_alive():
                child.terminate()
        for child in self.children:
            child.join(timeout=10)
        self.messages.close()
