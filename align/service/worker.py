"""The worker process: takes queued jobs from the store and runs them, one at a time.

    python -m align.service.worker --home HOME --slot 0 --parent PID     (started by align serve)

A job is train -> evaluate -> [export -> [index]], in the job's run folder HOME/runs/job-N. A job
of one process on a machine without GPUs trains inside the worker; any other (``processes`` > 1,
or GPUs to keep apart) trains as ``align train`` under torchrun in a process group of its own
(``launch``), on the GPUs the store gave it or its share of the cores, while the worker follows
the run's metrics.jsonl for the job's progress. Evaluation, export and index run in the worker. Every
attempt resumes from the run's newest checkpoint, so a job cut off anywhere (a crash, ``kill -9``
of the service, a reboot) continues where its last checkpoint left it, and a resumed run takes
exactly the steps the uninterrupted one would have (``align.training`` restores weights, optimizer,
schedule and RNG; the sampler depends only on the step).

Liveness: a worker holds an exclusive ``flock`` on HOME/locks/worker-<id>.lock for its whole life.
The kernel drops the lock when the process dies, however it dies, so any worker can tell that a
"running" job lost its worker (its lock can be taken) and queue it again. On Linux the worker also
asks to be killed when the service dies (PR_SET_PDEATHSIG), and so do a launched training's
launcher and ranks when their parent dies, so a ``kill -9`` of the service never leaves an orphan
training beside the next service's workers.
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
from ..fileio import write_text_atomic
from ..offline import offline_env, use_offline_defaults
from ..run import RunDir
from ..errors import AlignError
from .home import Home, Settings, load_settings
from .launch import LaunchedTraining, LogTail, die_with_parent, launch_command, launch_env, launch_failure
from .spec import check_processes, confine_recipe_paths
from .store import JobStore

POLL_S = 0.5  # how often an idle worker looks at the queue
RECOVER_EVERY_S = 10.0  # how often an idle worker looks for jobs whose worker died


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
            return _attempt(job, store, settings, stop, console, log)
        except AlignError as exc:
            console.print(f"error: {exc}")
            store.fail(job["id"], exc.message, exc.hint)
        except Exception as exc:  # noqa: BLE001 - the user gets a message; the traceback stays in job.log
            console.print(traceback.format_exc())
            store.fail(job["id"], f"{type(exc).__name__}: {exc}",
                       f"an unexpected error, not a recipe mistake; the traceback is in {run_dir / A.JOB_LOG}")
        return "failed"


def _attempt(job: dict, store: JobStore, settings: Settings, stop: threading.Event, console: Console, log) -> str:
    from ..evaluate import evaluate_run
    from ..recipe import recipe_from_toml

    job_id, spec, run_dir = job["id"], job["spec"], Path(job["run_dir"])
    home = Home(settings.home)
    recipe = recipe_from_toml(spec["recipe_toml"])
    confine_recipe_paths(recipe, settings, gallery=spec.get("index"))  # again: a link may point elsewhere by now
    processes = int(job.get("processes") or 1)
    check_processes(processes, recipe, settings)  # again: the service may have restarted on a smaller machine
    launched = processes > 1 or bool(settings.gpus)
    if recipe.train.threads == 0 and (launched or settings.workers > 1):
        recipe.train.threads = max(1, settings.cores_per_job // processes)  # jobs share the cores, ranks the job's

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
        trainer = _train_launched if launched else _train_in_process
        reason = trainer(job, recipe, done, store, settings, stop, console, log)
        if reason:
            return _stopped(store, job_id, reason, RunDir(run_dir).step())
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


def _train_in_process(job: dict, recipe, done: int, store: JobStore, settings: Settings, stop: threading.Event,
                      console: Console, log) -> str | None:
    """train() in this process; returns why it stopped early ("cancel" / "stop"), None when it finished."""
    from ..training import train

    why: dict = {}

    def on_step(record: dict) -> bool:
        cancel = store.progress(job["id"], record, recipe.train.batch_size)
        why["reason"] = "cancel" if cancel else ("stop" if stop.is_set() else None)
        return why["reason"] is None  # False: train() writes a checkpoint here and returns

    summary = train(recipe, Path(job["run_dir"]), resume=True, console=console, on_step=on_step)
    return (why.get("reason") or "stop") if summary["stopped_early"] else None


def _train_launched(job: dict, recipe, done: int, store: JobStore, settings: Settings, stop: threading.Event,
                    console: Console, log) -> str | None:
    """``align train --resume`` under torchrun on the job's devices; the worker follows the run's
    log for progress and turns a cancel or a stop into the stop file. Returns as _train_in_process."""
    from ..recipe import dump_recipe

    job_id, run_dir, processes = job["id"], Path(job["run_dir"]), int(job["processes"])
    home = Home(settings.home)
    run = RunDir(run_dir)
    recipe_file = home.launch / f"{run_dir.name}.toml"
    write_text_atomic(recipe_file, dump_recipe(recipe))
    run.truncate_log(done)  # as train() will: the tail below then never reports a step of a cut attempt
    gpus = list(job.get("devices") or [])
    console.print(f"training in {processes} process(es) on " + (f"GPU {', '.join(map(str, gpus))}" if gpus else
                  f"CPU, {recipe.train.threads} thread(s) each") + f"; resuming from step {done}")
    log.flush()
    output_from = os.path.getsize(run_dir / A.JOB_LOG)
    env = launch_env(offline_env(dict(os.environ)), home.launch / f"{run_dir.name}.stop", recipe.train.threads, gpus)
    launched = LaunchedTraining(launch_command(recipe_file, run_dir, processes), env, log,
                                home.launch / f"{run_dir.name}.stop")
    tail, reason, status = LogTail(run.metrics_log, done), None, None
    try:
        while status is None:
            status = launched.wait(POLL_S)
            cancel = False
            for record in tail.new_records():
                cancel = store.progress(job_id, record, recipe.train.batch_size) or cancel
            if status is None and reason is None:
                reason = "cancel" if cancel or store.cancel_requested(job_id) else ("stop" if stop.is_set() else None)
                if reason:
                    launched.request_stop()
    finally:
        if status is None:  # an error in this loop: the training must not outlive its follower
            launched.kill()
        launched.close()
    if status != 0:
        raise launch_failure(run_dir / A.JOB_LOG, output_from, status)
    if run.step() < recipe.train.steps:
        return reason or "stop"
    return None


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
            job = store.claim(worker_id, settings.gpus or 0)
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
