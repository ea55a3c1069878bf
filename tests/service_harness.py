"""A real ``align serve`` subprocess on a free loopback port, for the service tests; headless Chromium.

Every wait is a bounded loop with a timeout; ``close()`` (called from fixture teardown) stops the
service and kills anything it left behind, worker processes included. ``Browser`` drives Debian's
headless Chromium over the DevTools protocol on a pipe (``--remote-debugging-pipe``: JSON messages
ended by a NUL byte on file descriptors 3 and 4), so a test can type into a page, read its DOM, its
address and history, and the requests it sent, with no package beyond Chromium itself.
"""
from __future__ import annotations

import base64
import json
import os
import queue
import signal
import socket
import sqlite3
import stat
import subprocess
import sys
import threading
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

    def _auth(self) -> dict:
        """The token header once the service has made its token (reads need it beyond loopback)."""
        return {"Authorization": f"Bearer {self.token}"} if (self.home / "token").is_file() else {}

    @property
    def log_path(self) -> Path:
        """The log (stdout and stderr) of the latest start."""
        return self.home.parent / f"{self.home.name}-serve-{self.starts}.log"

    def start(self, timeout_s: float = 120) -> None:
        self.starts += 1
        log = open(self.log_path, "wb")
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
                health = httpx.get(self.url + "/health", headers=self._auth(), timeout=2).json()
            except httpx.HTTPError:
                return None
            return health if health.get("workers_alive", 0) >= 1 else None

        wait_for(up, timeout_s, "the service to answer /health with a live worker")

    def log_text(self) -> str:
        return self.log_path.read_text(errors="replace")[-4000:]

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
        response = httpx.get(f"{self.url}/jobs/{job_id}", headers=self._auth(), timeout=30)
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


def file_tree(*roots: Path) -> dict:
    """Every entry under the roots with its kind, size and modification time (to show nothing was written)."""
    out = {}
    for root in roots:
        for path in sorted(Path(root).rglob("*")):
            st = path.lstat()
            out[str(path)] = (stat.S_IFMT(st.st_mode), st.st_size, st.st_mtime_ns)
    return out


def store_counts(home: Path) -> tuple:
    """((jobs, highest id), events) in the service's job store."""
    with sqlite3.connect(Path(home) / "jobs.db") as db:
        return (db.execute("SELECT COUNT(*), COALESCE(MAX(id), 0) FROM jobs").fetchone(),
                db.execute("SELECT COUNT(*) FROM events").fetchone()[0])


def chromium() -> str | None:
    import shutil

    return shutil.which("chromium") or shutil.which("chromium-browser")


# the launcher puts the two pipe ends on descriptors 3 and 4, where --remote-debugging-pipe expects them;
# copies above 10 first, so neither end is overwritten by the other's dup2
_PIPE_LAUNCHER = """import fcntl, os, sys
read_end, write_end = int(sys.argv[1]), int(sys.argv[2])
high_read, high_write = fcntl.fcntl(read_end, fcntl.F_DUPFD, 10), fcntl.fcntl(write_end, fcntl.F_DUPFD, 10)
os.dup2(high_read, 3)
os.dup2(high_write, 4)
for fd in {read_end, write_end, high_read, high_write} - {3, 4}:
    os.close(fd)
os.execv(sys.argv[3], sys.argv[3:])
"""


class Browser:
    """One headless Chromium page, driven over the DevTools protocol (a pipe, no network port).

    ``evaluate`` runs JavaScript in the page and returns its JSON value; ``wait_for`` polls an
    expression until it is truthy; ``requests`` lists the requests the page sent (url, headers);
    ``screenshot`` writes a PNG. ``new_page`` opens a fresh tab (its own sessionStorage).
    """

    def __init__(self, user_dir: Path, width: int = 1200, height: int = 900, timeout_s: float = 60):
        self.timeout_s = timeout_s
        self.size = (width, height)
        to_browser_read, self._to_browser = os.pipe()
        self._from_browser, from_browser_write = os.pipe()
        cmd = [sys.executable, "-c", _PIPE_LAUNCHER, str(to_browser_read), str(from_browser_write), chromium(),
               "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-extensions",
               "--remote-debugging-pipe", f"--user-data-dir={user_dir}", f"--window-size={width},{height}",
               "about:blank"]
        log = open(Path(user_dir).parent / f"{Path(user_dir).name}-chromium.log", "wb")  # read when a test fails
        self.proc = subprocess.Popen(cmd, pass_fds=(to_browser_read, from_browser_write), stdin=subprocess.DEVNULL,
                                     stdout=log, stderr=subprocess.STDOUT)
        log.close()
        os.close(to_browser_read)
        os.close(from_browser_write)
        self._next_id = 0
        self._replies: dict[int, dict] = {}
        self._arrived = threading.Condition()
        self.events: queue.SimpleQueue = queue.SimpleQueue()
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()
        self.session = None
        self.new_page()

    def _read(self) -> None:
        buffer = b""
        while chunk := os.read(self._from_browser, 1 << 16):
            buffer += chunk
            *messages, buffer = buffer.split(b"\0")
            for raw in messages:
                message = json.loads(raw)
                with self._arrived:
                    if "id" in message:
                        self._replies[message["id"]] = message
                        self._arrived.notify_all()
                    else:
                        self.events.put(message)

    def call(self, method: str, params: dict | None = None, session: str | None = "page") -> dict:
        self._next_id += 1
        message = {"id": self._next_id, "method": method, "params": params or {}}
        if session:
            message["sessionId"] = self.session if session == "page" else session
        os.write(self._to_browser, json.dumps(message).encode() + b"\0")
        with self._arrived:
            if not self._arrived.wait_for(lambda: self._next_id in self._replies, self.timeout_s):
                raise AssertionError(f"Chromium did not answer {method} within {self.timeout_s:.0f}s")
            reply = self._replies.pop(self._next_id)
        if "error" in reply:
            raise AssertionError(f"{method}: {reply['error']}")
        return reply["result"]

    def new_page(self) -> None:
        target = self.call("Target.createTarget", {"url": "about:blank"}, session=None)["targetId"]
        self.session = self.call("Target.attachToTarget", {"targetId": target, "flatten": True},
                                 session=None)["sessionId"]
        self.call("Page.enable")
        self.call("Network.enable")
        width, height = self.size
        self.call("Emulation.setDeviceMetricsOverride",
                  {"width": width, "height": height, "deviceScaleFactor": 1, "mobile": False})

    def goto(self, url: str) -> None:
        self.call("Page.navigate", {"url": url})
        self.wait_for("document.readyState === 'complete' && location.href !== 'about:blank'", 30,
                      f"{url} to load")

    def evaluate(self, expression: str):
        result = self.call("Runtime.evaluate", {"expression": expression, "returnByValue": True,
                                                "awaitPromise": True})
        if "exceptionDetails" in result:
            raise AssertionError(f"{expression!r} raised: {result['exceptionDetails']}")
        return result["result"].get("value")

    def wait_for(self, expression: str, timeout_s: float, what: str):
        return wait_for(lambda: self.evaluate(expression), timeout_s, what)

    def drain(self) -> tuple[list[dict], list[str]]:
        """(requests the pages sent: {url, headers}; console errors, warnings and uncaught exceptions)
        since the last call."""
        sent, errors = [], []
        while True:
            try:
                event = self.events.get_nowait()
            except queue.Empty:
                return sent, errors
            method, params = event.get("method"), event.get("params", {})
            if method == "Network.requestWillBeSent":
                sent.append({"url": params["request"]["url"], "headers": params["request"].get("headers", {})})
            elif method == "Runtime.exceptionThrown":
                errors.append(json.dumps(params["exceptionDetails"])[:300])
            elif method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "warning", "assert"):
                errors.append(json.dumps(params.get("args"))[:300])
            elif method == "Log.entryAdded" and params["entry"].get("level") in ("error", "warning"):
                errors.append(params["entry"].get("text", "")[:300])

    def requests(self) -> list[dict]:
        """Requests the pages sent since the last call: {url, headers}."""
        return self.drain()[0]

    def screenshot(self, path: Path) -> None:
        path.write_bytes(base64.b64decode(self.call("Page.captureScreenshot", {"format": "png"})["data"]))

    def close(self) -> None:
        try:
            if self.proc.poll() is None:
                self.call("Browser.close", session=None)
        except (AssertionError, OSError):
            pass
        try:
            self.proc.wait(20)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(10)
        os.close(self._to_browser)
        self._reader.join(5)
        os.close(self._from_browser)
