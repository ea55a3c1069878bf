"""A real ``align serve`` subprocess on a free loopback port, for the service tests.

Every wait is a bounded loop with a timeout; ``close()`` (called from fixture teardown) stops the
service and kills anything it left behind, worker processes included.
"""
from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import psutil

from align.offline import offline_env

REPO = Path(__file__).resolve().parents[1]


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def wait_for(predicate, timeout_s: float, what: str, every_s: float = 0.25):
    """Poll ``predicate`` until it returns something truthy; fail the test after ``timeout_s``."""
    deadline = time.monotonic() + timeout_s
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s:.0f}s waiting for {what}")
        time.sleep(every_s)


class Service:
    def __init__(self, home: Path, data_roots: list[Path], extra_args: list[str] | None = None):
        self.home = Path(home)
        self.data_roots = [Path(r) for r in data_roots]
        self.extra_args = extra_args or []
        self.port = free_port()
        self.proc: subprocess.Popen | None = None
        self.starts = 0

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    @property
    def token(self) -> str:
        return (self.home / "token").read_text().strip()

    def client(self, token: bool = True, **kwargs) -> httpx.Client:
        headers = {"Authorization": f"Bearer {self.token}"} if token else {}
        return httpx.Client(base_url=self.url, headers=headers, timeout=60, **kwargs)

    def start(self, timeout_s: float = 120) -> None:
        self.starts += 1
        log = open(self.home.parent / f"{self.home.name}-serve-{self.starts}.log", "wb")
        cmd = [sys.executable, "-m", "align.cli", "serve", "--home", str(self.home), "--port", str(self.port)]
        for root in self.data_roots:
            cmd += ["--data-root", str(root)]
        env = offline_env(dict(os.environ))
        self.proc = subprocess.Popen(cmd + self.extra_args, cwd=REPO, stdout=log, stderr=subprocess.STDOUT, env=env)
        log.close()

        def up():
            if self.proc.poll() is not None:
                raise AssertionError(f"align serve exited with {self.proc.returncode}: {self.log_text()}")
            try:
                health = httpx.get(self.url + "/health", timeout=2).json()
            except httpx.HTTPError:
                return None
            return health if health["workers_alive"] >= 1 else None

        wait_for(up, timeout_s, "the service to answer /health with a live worker")

    def log_text(self) -> str:
        return (self.home.parent / f"{self.home.name}-serve-{self.starts}.log").read_text(errors="replace")[-4000:]

    def workers(self) -> list[psutil.Process]:
        try:
            return psutil.Process(self.proc.pid).children(recursive=True)
        except psutil.NoSuchProcess:
            return []

    def kill9(self) -> list[psutil.Process]:
        """SIGKILL the service process alone (as a crash would); returns its children as they were."""
        children = self.workers()
        os.kill(self.proc.pid, signal.SIGKILL)
        self.proc.wait(10)
        return children

    def close(self) -> None:
        if self.proc is None:
            return
        children = self.workers()
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(45)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
        _, alive = psutil.wait_procs(children, timeout=10)
        for proc in alive:  # never leave a worker behind
            proc.kill()

    def job(self, job_id: int) -> dict:
        response = httpx.get(f"{self.url}/jobs/{job_id}", timeout=30)
        response.raise_for_status()
        return response.json()

    def wait_job(self, job_id: int, states=("finished", "failed", "cancelled"), timeout_s: float = 600) -> dict:
        def ended():
            job = self.job(job_id)
            return job if job["state"] in states else None
        try:
            return wait_for(ended, timeout_s, f"job {job_id} to reach {states}", every_s=0.5)
        except AssertionError:
            raise AssertionError(f"job {job_id}: {self.job(job_id)}\n{self.log_text()}") from None


def chromium() -> str | None:
    import shutil

    return shutil.which("chromium") or shutil.which("chromium-browser")


def run_chromium(url: str, user_dir: Path, *extra: str, timeout_s: float = 120) -> subprocess.CompletedProcess:
    """Headless Chromium on ``url``, offline: no sync, no updates, no background requests."""
    cmd = [chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-extensions",
           f"--user-data-dir={user_dir}", "--window-size=1200,900", "--virtual-time-budget=8000", *extra, url]
    return subprocess.run(cmd, capture_output=True, timeout=timeout_s, text=True)
