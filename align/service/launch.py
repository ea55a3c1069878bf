"""A job's training as its own process group: ``align train`` under torchrun, stopped on request.

    python -m align.service.launch --parent WORKER_PID -- --nproc-per-node N --standalone \
        -m align.cli train RECIPE --run-dir RUN --resume            (started by the worker)

Three generations of processes run a launched job: the worker, this launcher (torchrun's agent,
run in-process after ``die_with_parent``) and one ``align train`` per rank. Each asks the kernel
to kill it when its parent dies, so a ``kill -9`` of the service takes the whole tree down with
it and a restarted service never finds a training still writing into the run folder it resumes.
(torchrun starts each rank in a session of its own, so a process-group kill would not reach them.)

Stopping: the worker creates the job's stop file; every rank looks for it at each logged step and
the ranks agree (one all-reduce), so they all checkpoint at the same step and ``align train``
returns normally. A launcher that does not stop in time gets SIGTERM (torchrun passes it on to
the ranks, which die without a checkpoint: the job resumes from its newest one), then SIGKILL.
"""
from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
from pathlib import Path
from typing import Callable

from ..errors import AlignError

LAUNCHER_PID_ENV = "ALIGN_LAUNCHER_PID"  # set by the launcher: each rank dies with it
STOP_FILE_ENV = "ALIGN_STOP_FILE"  # a rank that finds this file checkpoints and returns


def die_with_parent(parent: int) -> None:
    """Be killed when the process ``parent`` dies (Linux), and exit if it is already gone."""
    if sys.platform.startswith("linux"):
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        PR_SET_PDEATHSIG = 1
        libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
    if os.getppid() != parent:  # the parent died before the request above took effect
        sys.exit(0)


# -- the worker's side ------------------------------------------------------------------------


def count_gpus() -> int:
    """CUDA devices this process sees (torch asks NVML where it can, creating no CUDA context)."""
    import torch

    return torch.cuda.device_count()


def cuda_devices(indices: list[int]) -> str:
    """CUDA_VISIBLE_DEVICES for the job's GPUs, numbered as the service sees them (its own
    CUDA_VISIBLE_DEVICES, when set, already renumbered them)."""
    visible = os.environ.get("CUDA_VISIBLE_DEVICES")
    names = [v.strip() for v in visible.split(",")] if visible else [str(i) for i in range(max(indices, default=-1) + 1)]
    return ",".join(names[i] for i in indices)


def launch_command(recipe_file: Path, run_dir: Path, processes: int) -> list[str]:
    """The argument list: the same ``align train`` as on the command line, under torchrun.

    ``--standalone`` gives the group a rendezvous on a free local port, so two jobs launched side by
    side never meet."""
    return [sys.executable, "-m", "align.service.launch", "--parent", str(os.getpid()), "--",
            "--nproc-per-node", str(processes), "--standalone", "--max-restarts", "0",
            "-m", "align.cli", "train", str(recipe_file), "--run-dir", str(run_dir), "--resume"]


def launch_env(base: dict, stop_file: Path, threads: int, gpus: list[int]) -> dict:
    env = dict(base)
    env[STOP_FILE_ENV] = str(stop_file)
    env["OMP_NUM_THREADS"] = str(threads)  # torchrun would otherwise set 1 for every rank
    env["COLUMNS"] = "4000"  # rich wraps a non-terminal at 80 columns; the worker reads the error line whole
    env["PYTHONUNBUFFERED"] = "1"
    if gpus:
        env["CUDA_VISIBLE_DEVICES"] = cuda_devices(gpus)
    else:
        env["CUDA_VISIBLE_DEVICES"] = ""  # a CPU job stays off GPUs other jobs hold
    package_parent = str(Path(__file__).resolve().parents[2])  # so `-m align...` imports this very copy
    env["PYTHONPATH"] = os.pathsep.join([package_parent] + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else []))
    return env


class LaunchedTraining:
    """The launcher process of one job's training, in a session of its own (a Ctrl-C meant for
    the service must not reach torchrun, which would kill the ranks before they checkpoint)."""

    def __init__(self, command: list[str], env: dict, log, stop_file: Path):
        self.stop_file = stop_file
        stop_file.unlink(missing_ok=True)  # a request left by an earlier attempt is not this one's
        self.proc = subprocess.Popen(command, env=env, stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
                                     start_new_session=True, close_fds=True)

    def wait(self, timeout_s: float) -> int | None:
        try:
            return self.proc.wait(timeout_s)
        except subprocess.TimeoutExpired:
            return None

    def request_stop(self) -> None:
        """Ask the ranks to checkpoint at their next logged step and return."""
        self.stop_file.touch()

    def kill(self, grace_s: float = 20.0) -> int:
        """SIGTERM the launcher (it ends its ranks), SIGKILL it when it does not end in time."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            if self.wait(grace_s) is None:
                self.proc.kill()  # its ranks die with it (PR_SET_PDEATHSIG)
        return self.proc.wait()

    def close(self) -> None:
        self.stop_file.unlink(missing_ok=True)


class LogTail:
    """Records a training log gains while another process appends to it, one read per call.

    A resume cuts the log back by writing a new file in its place: a new inode (or a shorter file)
    starts the reading over, and records at or before the newest step already returned are skipped."""

    def __init__(self, path: Path, after_step: int):
        self.path, self.after_step = Path(path), after_step
        self.inode, self.offset, self.partial = None, 0, b""

    def new_records(self) -> list[dict]:
        try:
            st = os.stat(self.path)
        except FileNotFoundError:
            return []
        if st.st_ino != self.inode or st.st_size < self.offset:
            self.inode, self.offset, self.partial = st.st_ino, 0, b""
        if st.st_size == self.offset:
            return []
        with open(self.path, "rb") as fh:
            fh.seek(self.offset)
            chunk = fh.read()
        self.offset += len(chunk)
        *lines, self.partial = (self.partial + chunk).split(b"\n")  # a line still being written waits
        records = []
        for line in lines:
            try:
                record = json.loads(line)
            except ValueError:  # torn by a kill
                continue
            if isinstance(record, dict) and isinstance(record.get("step"), int) and record["step"] > self.after_step:
                records.append(record)
                self.after_step = record["step"]
        return records


def launch_failure(log: Path, start: int, status: int) -> AlignError:
    """The error a failed launch reports: the ``error:`` / ``hint:`` lines ``align train`` printed
    (one rank's, into the job's log after ``start``), else the exit status and where to look."""
    lines = log.read_bytes()[start:].decode("utf-8", errors="replace").splitlines()
    for i, line in enumerate(lines):
        if line.startswith("error: "):
            after = lines[i + 1].strip() if i + 1 < len(lines) else ""
            return AlignError(line[len("error: "):].strip(), after[len("hint: "):] if after.startswith("hint: ") else None)
    return AlignError(f"the training processes exited with status {status}",
                      f"an unexpected error, not a recipe mistake; the traceback is in {log}")


# -- a rank's side (align train, called from align.cli) --------------------------------------


def rank_on_step() -> Callable[[dict], bool] | None:
    """For ``align train`` under the service's launcher: die with the launcher, and an ``on_step``
    that stops every rank at the same logged step once the job's stop file exists. None when this
    process was not started by the service."""
    launcher = os.environ.get(LAUNCHER_PID_ENV)
    if launcher:
        die_with_parent(int(launcher))
    stop_file = os.environ.get(STOP_FILE_ENV)
    if not stop_file:
        return None

    def on_step(record: dict) -> bool:
        import torch
        import torch.distributed as dist

        wanted = os.path.exists(stop_file)
        if dist.is_available() and dist.is_initialized():  # the ranks may see the file at different moments
            device = torch.device("cuda", torch.cuda.current_device()) if dist.get_backend() == "nccl" else "cpu"
            flag = torch.tensor([int(wanted)], device=device)
            dist.all_reduce(flag, op=dist.ReduceOp.MAX)
            wanted = bool(flag.item())
        return not wanted  # False: train() checkpoints here and returns

    return on_step


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m align.service.launch")
    parser.add_argument("--parent", type=int, required=True, help="pid of the worker; the launcher dies with it")
    parser.add_argument("torchrun_args", nargs=argparse.REMAINDER, help="after --: torchrun's arguments")
    args = parser.parse_args(argv)
    die_with_parent(args.parent)
    os.environ[LAUNCHER_PID_ENV] = str(os.getpid())  # torchrun hands its environment to the ranks
    from torch.distributed.run import main as torchrun

    forwarded = args.torchrun_args[1:] if args.torchrun_args[:1] == ["--"] else args.torchrun_args
    torchrun(forwarded)  # a failed rank raises here: the launcher exits non-zero with torchrun's report
    return 0


if __name__ == "__main__":
    sys.exit(main())
