"""The worker process: takes queued jobs from the store and runs them, one at a time.

    python -m align.service.worker --home HOME --slot 0 --parent PID     (started by align serve)

A job is train -> evaluate -> [export -> [index]], in the job's run folder HOME/runs/job-N. Every
attempt resumes from the run's newest checkpoint, so a job cut off anywhere (a crash, ``kill -9``
of the service, a reboot) continues where its last checkpoint left it, and a resumed run takes
exactly the steps the uninterrupted one would have (``align.training`` restores weights, optimizer,
schedule and RNG; the sampler depends only on the step).

Liveness: a worker holds an exclusive ``flock`` on HOME/locks/worker-<id>.lock for its whole life.
The kernel drops the lock when the process dies, however it dies, so any worker can tell that a
"running" job lost its worker (its lock can be taken) and queue it again. On Linux the worker also
asks to be killed when the service dies (PR_SET_PDEATHSIG), so a ``kill -9`` of the service never
leaves an orphan training beside the next service's workers.
"""
from __future__ import annotations

import argparse
import fcntl
import json
import os
import secrets
import signal
import sys
import threading
import time
import traceback
from pathlib import Path

from rich.console import Console

from .. import artifacts as A
from ..offline import use_offline_defaults
from ..run import RunDir
from ..errors import AlignError
from .home import Home, Settings, load_settings
from .spec import confine_recipe_paths
from .store import JobStore

POLL_S = 0.5  # how often an idle worker looks at the queue
RECOVER_EVERY_S = 10.0  # how often an idle worker looks for jobs whose worker died


def die_with_parent(parent: int) -> None:
    """Be killed when the service process dies (Linux), and exit if it is already gone."""
    if sys.platform.startswith("linux"):
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        PR_SET_PDEATHSIG = 1
        libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
    if os.getppid() != parent:  # the service died before the request above took effect
        sys.exit(0)


class WorkerLock:
    """This worker's liveness lock (see the module docstring)."""

    def __init__(self, locks: Path, worker_id: str):
        self.path = locks / f"worker-{worker_id}.lock"
        self.fd = os.open(self.path, os.O_CREAT | os.O_RDWR, 0o600)
        fcntl.flock(self.fd, fcntl.LOCK_EX)

    def release(self) -> None:
        self.path.unlink(missing_ok=True)
        os.close(self.fd)


def worker_alive(locks: Path, worker_id: str) -> bool:
    path = locks / f"worker-{worker_id}.lock"
    try:
        fd = os.open(path, os.O_RDWR)
    except FileNotFoundError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return True
    finally:
        os.close(fd)  # closing drops a lock we took
    path.unlink(missing_ok=True)  # a dead worker's lock file
    return False


def run_job(job: dict, store: JobStore, settings: Settings, stop: threading.Event) -> str:
    """One attempt at a job; returns the state it leaves the job in."""
    run_dir = Path(job["run_dir"])
    run_dir.mkdir(parents=True, exist_ok=True)
    with open(run_dir / A.JOB_LOG, "a", encoding="utf-8") as log:
        console = Console(file=log, width=110, force_terminal=False, color_system=None)
        console.print(f"--- job {job['id']} attempt {job['attempts']} at {time.strftime('%Y-%m-%d %H:%M:%S')}")
        try:
            return _attempt(job, store, settings, stop, console)
        except AlignError as exc:
            console.print(f"error: {exc}")
            store.fail(job["id"], exc.message, exc.hint)
        except Exception as exc:  # noqa: BLE001 - the user gets a message; the traceback stays in job.log
            console.print(traceback.format_exc())
            store.fail(job["id"], f"{type(exc).__name__}: {exc}",
                       f"an unexpected error, not a recipe mistake; the traceback is in {run_dir / A.JOB_LOG}")
        return "failed"


def _attempt(job: dict, store: JobStore, settings: Settings, stop: threading.Event, console: Console) -> str:
    from ..evaluate import evaluate_run
    from ..recipe import recipe_from_toml
    from ..training import train

    job_id, spec, run_dir = job["id"], job["spec"], Path(job["run_dir"])
    home = Home(settings.home)
    recipe = recipe_from_toml(spec["recipe_toml"])
    confine_recipe_paths(recipe, settings, gallery=spec.get("index"))  # again: a link may point elsewhere by now
    if settings.workers > 1 and recipe.train.threads == 0:
        recipe.train.threads = max(1, (os.cpu_count() or 1) // settings.workers)  # jobs share the cores

    # Resume point: the newest complete checkpoint. train() drops the log lines no checkpoint backs
    # (past it, torn by a kill, or of an attempt cut before its first checkpoint).
    done = RunDir(run_dir).step()
    store.started_from(job_id, done)

    def should_stop() -> str | None:
        if store.cancel_requested(job_id):
            return "cancel"
        if stop.is_set():
            return "stop"
        return None

    if done < recipe.train.steps:
        store.set_phase(job_id, "train")
        why: dict = {}

        def on_step(record: dict) -> bool:
            cancel = store.progress(job_id, record, recipe.train.batch_size)
            why["reason"] = "cancel" if cancel else ("stop" if stop.is_set() else None)
            return why["reason"] is None  # False: train() writes a checkpoint here and returns

        summary = train(recipe, run_dir, resume=True, console=console, on_step=on_step)
        if summary["stopped_early"]:
            return _stopped(store, job_id, why.get("reason") or "stop", summary["steps"])
        done = recipe.train.steps

    # After training: evaluate, then the export and gallery index the job asked for. A cancel or a
    # stop is honoured between phases (a phase itself runs to its end).
    phases = ["evaluate"] + (["export"] if spec.get("export") else []) + (["index"] if spec.get("index") else [])
    metrics = None
    for phase in phases:
        reason = should_stop()
        if reason:
            return _stopped(store, job_id, reason, done)
        store.set_phase(job_id, phase)
        if phase == "evaluate":
            evaluate_run(run_dir, console=console)
            metrics = json.loads((run_dir / A.METRICS).read_text(encoding="utf-8"))  # as written, checkpoint included
        elif phase == "export":
            from ..export import export_run

            export_run(run_dir, home.exports / spec["export"], onnx=bool(spec.get("export_onnx")), console=console)
        else:
            from ..index import build_index

            build_index(home.exports / spec["export"], spec["index"], home.indexes / spec["export"], console=console)
    store.finish(job_id, metrics)
    return "finished"


def _stopped(store: JobStore, job_id: int, reason: str, step: int) -> str:
    if reason == "cancel":
        store.cancelled(job_id, step)
        return "cancelled"
    store.requeue(job_id, f"the service stopped at step {step}; the job resumes from there when it starts again")
    return "queued"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m align.service.worker")
    parser.add_argument("--home", required=True)
    parser.add_argument("--slot", type=int, default=0)
    parser.add_argument("--parent", type=int, required=True, help="pid of the service; the worker dies with it")
    args = parser.parse_args(argv)
    use_offline_defaults()
    die_with_parent(args.parent)

    settings = load_settings(Path(args.home))
    home = Home(settings.home)
    stop = threading.Event()
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: stop.set())  # finish the step, checkpoint, requeue, exit
    store = JobStore(home.db)
    worker_id = f"{args.slot}-{os.getpid()}-{secrets.token_hex(3)}"
    lock = WorkerLock(home.locks, worker_id)
    print(f"worker {worker_id} ready (home {home.root})", flush=True)
    last_recovery = 0.0
    try:
        while not stop.is_set() and os.getppid() == args.parent:
            if time.monotonic() - last_recovery > RECOVER_EVERY_S:
                for job_id in store.recover_orphans(lambda w: worker_alive(home.locks, w)):
                    print(f"job {job_id} lost its worker; queued again", flush=True)
                last_recovery = time.monotonic()
            job = store.claim(worker_id)
            if job is None:
                stop.wait(POLL_S)
                continue
            print(f"job {job['id']} ({job['name']}) attempt {job['attempts']}", flush=True)
            state = run_job(job, store, settings, stop)
            print(f"job {job['id']} -> {state}", flush=True)
            last_recovery = 0.0  # a finished job is a good moment to look for orphans again
    finally:
        lock.release()
    return 0


if __name__ == "__main__":
    sys.exit(main())
