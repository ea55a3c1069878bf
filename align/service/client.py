"""The HTTP client behind ``align jobs submit|list|show|cancel``.

The token comes from ``--token-file``, the ``ALIGN_TOKEN`` variable, or the service home's token
file (``--home``, default ``$ALIGN_HOME`` or ~/.align), in that order. A refusal from the service
becomes an ``AlignError`` carrying the service's own message and hint.
"""
from __future__ import annotations

import os
import time
from pathlib import Path

import httpx
from rich.console import Console
from rich.table import Table

from ..errors import AlignError
from .home import DEFAULT_HOST, DEFAULT_PORT, Home, default_home, read_token

URL_ENV = "ALIGN_URL"
TOKEN_ENV = "ALIGN_TOKEN"


def default_url() -> str:
    return os.environ.get(URL_ENV) or f"http://{DEFAULT_HOST}:{DEFAULT_PORT}"


def find_token(token_file: str | None = None, home: str | None = None) -> str | None:
    if token_file:
        return read_token(Path(token_file))
    if os.environ.get(TOKEN_ENV):
        return os.environ[TOKEN_ENV].strip()
    path = Home(Path(home) if home else default_home()).token_path
    return read_token(path) if path.is_file() else None


class ServiceClient:
    def __init__(self, url: str | None = None, token: str | None = None, timeout_s: float = 60.0):
        self.url = (url or default_url()).rstrip("/")
        self.token = token
        self.timeout_s = timeout_s

    def call(self, method: str, path: str, **kwargs) -> dict:
        headers = {"Authorization": f"Bearer {self.token}"} if self.token else {}
        try:
            response = httpx.request(method, self.url + path, headers=headers, timeout=self.timeout_s, **kwargs)
        except httpx.ConnectError:
            raise AlignError(f"no align service answers at {self.url}",
                             "start one with `align serve`, or pass --url / set ALIGN_URL") from None
        except httpx.TimeoutException:
            raise AlignError(f"the align service at {self.url} did not answer within {self.timeout_s:.0f}s") from None
        try:
            body = response.json()
        except ValueError:
            body = {"error": response.text[:500]}
        if response.status_code >= 400:
            hint = body.get("hint")
            if response.status_code == 401 and not self.token:
                hint = "no token found: pass --home (the service's home) or --token-file, or set ALIGN_TOKEN"
            raise AlignError(f"the service refused (HTTP {response.status_code}): {body.get('error')}", hint)
        return body

    def submit(self, **fields) -> dict:
        return self.call("POST", "/jobs", json={k: v for k, v in fields.items() if v not in (None, [], False)})

    def jobs(self, state: str | None = None) -> list[dict]:
        return self.call("GET", "/jobs", params={"state": state} if state else None)["jobs"]

    def job(self, job_id: int) -> dict:
        return self.call("GET", f"/jobs/{job_id}")

    def cancel(self, job_id: int) -> dict:
        return self.call("POST", f"/jobs/{job_id}/cancel")

    def wait(self, job_id: int, console: Console, poll_s: float = 2.0) -> dict:
        last = None
        while True:
            job = self.job(job_id)
            line = f"job {job_id}: {job['state']} {job['phase'] or ''} step {job['step']}/{job['steps']}"
            if line != last:
                console.print(line + (f" loss {job['loss']:.3f}" if job["loss"] is not None else ""))
                last = line
            if job["state"] in ("finished", "failed", "cancelled"):
                return job
            time.sleep(poll_s)


def data_argument(path: str | None) -> str | None:
    """A path that exists here is sent absolute (the service usually shares this machine's disk);
    anything else is sent as written, for the service to read inside its first data root."""
    if path and Path(path).exists():
        return str(Path(path).resolve())
    return path


def _num(value, digits: int) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def _duration(seconds) -> str:
    if seconds is None:
        return "-"
    s = int(round(seconds))
    return f"{s // 3600}h{s % 3600 // 60:02d}m" if s >= 3600 else f"{s // 60}m{s % 60:02d}s"


def jobs_table(jobs: list[dict]) -> Table:
    table = Table(title="jobs", show_header=True)
    for column in ("id", "name", "state", "phase", "step", "loss", "pairs/s", "time left", "R@1 t→i"):
        table.add_column(column, justify="right" if column in ("id", "step", "loss", "pairs/s") else "left")
    for job in jobs:
        recall = (job.get("metrics") or {}).get("text_to_image_recall@1")
        state = job["state"] + (" (cancelling)" if job["cancel_requested"] and job["state"] == "running" else "")
        table.add_row(str(job["id"]), job["name"], state, job["phase"] or "-", f"{job['step']}/{job['steps']}",
                      _num(job["loss"], 3), _num(job["pairs_per_s"], 0), _duration(job["eta_s"]), _num(recall, 3))
    return table


def print_job(job: dict, console: Console) -> None:
    console.print(f"[bold]job {job['id']}[/bold] {job['name']}: {job['state']}"
                  f"{' (' + job['phase'] + ')' if job['phase'] else ''}, step {job['step']}/{job['steps']}, "
                  f"loss {_num(job['loss'], 4)}, {_num(job['pairs_per_s'], 0)} pairs/s, "
                  f"time left {_duration(job['eta_s'])}, attempts {job['attempts']}"
                  + (f", {job['processes']} processes" if job.get("processes", 1) > 1 else "")
                  + (f" on GPU {', '.join(map(str, job['devices']))}" if job.get("devices") else ""))
    console.print(f"run folder: {job['run_dir']}; data: {job['data']}"
                  + (f"; export: {job['export']}" if job.get("export") else ""))
    if job.get("error"):
        console.print(f"[red]error:[/red] {job['error']['message']}")
        if job["error"].get("hint"):
            console.print(f"  [bold]hint:[/bold] {job['error']['hint']}")
    if job.get("metrics"):
        shown = {k: v for k, v in job["metrics"].items() if isinstance(v, (int, float))}
        console.print("metrics: " + ", ".join(f"{k} {v:.3f}" for k, v in sorted(shown.items())))
    for event in job.get("events", []):
        console.print(f"  {time.strftime('%H:%M:%S', time.localtime(event['at']))} {event['text']}")
