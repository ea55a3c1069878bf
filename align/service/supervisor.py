"""Starting, watching and stopping the worker processes, from inside the service.

One thread owns the workers: it starts them, restarts one that exits unexpectedly (its job is
queued again by the next worker that looks, since the dead worker's lock is gone) and, when the
service stops, asks each to stop (SIGTERM: finish the step, checkpoint, requeue the job), waits,
and kills what is left. The same thread starts every worker because Linux delivers a worker's
"parent died" signal when the thread that started it ends: that thread lives exactly as long as
the service does.

Workers are started with a fixed argument list, no shell, and nothing taken from a request.
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

from ..offline import offline_env
from .home import Home, Settings

RESTART_BACKOFF_S = (1.0, 2.0, 5.0, 15.0, 30.0)


class WorkerPool:
    def __init__(self, settings: Settings, grace_s: float = 30.0, watch_every_s: float = 0.5):
        self.settings = settings
        self.home = Home(settings.home)
        self.grace_s = grace_s
        self.watch_every_s = watch_every_s
        self.processes: dict[int, subprocess.Popen] = {}
        self.restarts: dict[int, int] = {}
        self._stopping = threading.Event()
        self._ready = threading.Event()
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="align-workers", daemon=True)
        self._thread.start()
        self._ready.wait(30)

    def alive(self) -> int:
        return sum(1 for p in self.processes.values() if p.poll() is None)

    def stop(self) -> None:
        self._stopping.set()
        if self._thread is not None:
            self._thread.join(self.grace_s + 10)

    def _spawn(self, slot: int) -> subprocess.Popen:
        package_parent = str(Path(__file__).resolve().parents[2])  # so `-m align...` imports this very copy
        env = offline_env(dict(os.environ))
        env["PYTHONPATH"] = os.pathsep.join([package_parent] + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else []))
        log = open(self.home.logs / f"worker-{slot}.log", "ab")
        try:
            return subprocess.Popen(
                [sys.executable, "-m", "align.service.worker", "--home", str(self.home.root), "--slot", str(slot),
                 "--parent", str(os.getpid())],
                stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT, env=env, close_fds=True)
        finally:
            log.close()  # the child holds its own copy

    def _run(self) -> None:
        next_start: dict[int, float] = {}
        for slot in range(self.settings.workers):
            self.processes[slot] = self._spawn(slot)
        self._ready.set()
        while not self._stopping.wait(self.watch_every_s):
            for slot, proc in list(self.processes.items()):
                if proc.poll() is None:
                    continue
                due = next_start.get(slot)
                if due is None:  # exited on its own: restart it, backing off if it keeps dying
                    count = self.restarts.get(slot, 0)
                    delay = RESTART_BACKOFF_S[min(count, len(RESTART_BACKOFF_S) - 1)]
                    print(f"align: worker {slot} exited with status {proc.returncode}; restarting in {delay:.0f}s",
                          file=sys.stderr, flush=True)
                    next_start[slot] = time.monotonic() + delay
                elif time.monotonic() >= due:
                    del next_start[slot]
                    self.restarts[slot] = self.restarts.get(slot, 0) + 1
                    self.processes[slot] = self._spawn(slot)
        self._shutdown()

    def _shutdown(self) -> None:
        for proc in self.processes.values():
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        deadline = time.monotonic() + self.grace_s
        for proc in self.processes.values():
            try:
                proc.wait(max(0.1, deadline - time.monotonic()))
            except subprocess.TimeoutExpired:
                proc.kill()  # its job resumes from its last checkpoint at the next start
                proc.wait(10)
