"""The service home: one folder holds the job store, the token, runs, exports, recipes and data.

    HOME/jobs.db        the job store (SQLite, WAL)
    HOME/token          the access token, mode 0600, made at first start
    HOME/service.json   the settings the running service started with (its workers read them)
    HOME/runs/          one run folder per job (runs/job-000001)
    HOME/exports/       exports/<name>, answered by POST /exports/<name>/embed
    HOME/indexes/       indexes/<name>, the gallery index POST /exports/<name>/search answers from
    HOME/recipes/       recipe files a job may name instead of sending TOML
    HOME/data/          the default data root (more with --data-root)
    HOME/features/      the frozen-feature cache every job shares
    HOME/logs/, HOME/locks/
    HOME/launch/        a launched job's recipe file and stop request (job-000001.toml, job-000001.stop)
"""
from __future__ import annotations

import ipaddress
import json
import os
import secrets
import stat
from dataclasses import dataclass, field
from pathlib import Path

from .. import artifacts as A
from ..errors import AlignError
from ..fileio import write_json_atomic

DEFAULT_HOST = "127.0.0.1"
DEFAULT_PORT = 8765
DEFAULT_MAX_BODY_BYTES = 1 << 20  # a recipe is a few KiB; an embed call of 256 captions well under this
HOME_ENV = "ALIGN_HOME"


def default_home() -> Path:
    return Path(os.environ.get(HOME_ENV) or Path.home() / ".align")


def is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False  # a host name other than localhost may resolve anywhere


@dataclass
class Home:
    """Paths inside a service home."""

    root: Path

    @property
    def db(self) -> Path:
        return self.root / A.SERVICE_DB

    @property
    def token_path(self) -> Path:
        return self.root / A.SERVICE_TOKEN

    @property
    def settings_path(self) -> Path:
        return self.root / A.SERVICE_SETTINGS

    @property
    def runs(self) -> Path:
        return self.root / A.SERVICE_RUNS

    @property
    def exports(self) -> Path:
        return self.root / A.SERVICE_EXPORTS

    @property
    def indexes(self) -> Path:
        return self.root / A.SERVICE_INDEXES

    @property
    def recipes(self) -> Path:
        return self.root / A.SERVICE_RECIPES

    @property
    def data(self) -> Path:
        return self.root / A.SERVICE_DATA

    @property
    def features(self) -> Path:
        return self.root / A.SERVICE_FEATURES

    @property
    def logs(self) -> Path:
        return self.root / A.SERVICE_LOGS

    @property
    def locks(self) -> Path:
        return self.root / A.SERVICE_LOCKS

    @property
    def launch(self) -> Path:
        return self.root / A.SERVICE_LAUNCH

    def run_dir(self, job_id: int) -> Path:
        return self.runs / A.JOB_DIR_PATTERN.format(id=job_id)

    def prepare(self) -> "Home":
        """Create the folders (the home itself private to its owner)."""
        self.root.mkdir(parents=True, exist_ok=True)
        self.root.chmod(0o700)
        for folder in (self.runs, self.exports, self.indexes, self.recipes, self.data, self.features,
                       self.logs, self.locks, self.launch):
            folder.mkdir(exist_ok=True)
        return self


def ensure_token(home: Home) -> str:
    """The access token: made at first start (mode 0600), read afterwards.

    A token file others can read is refused rather than silently trusted or fixed: someone may
    already have copied it.
    """
    path = home.token_path
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return read_token(path)
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        fh.write(secrets.token_urlsafe(32) + "\n")
    return read_token(path)


def read_token(path: Path) -> str:
    path = Path(path)
    if not path.is_file():
        raise AlignError(f"no token file at {path}", "start the service once (align serve --home DIR), or pass --token")
    mode = stat.S_IMODE(path.stat().st_mode)
    if mode & 0o077:
        raise AlignError(f"the token file {path} is readable by others (mode {mode:o})",
                         f"make a new one: rm {path} and restart the service (or chmod 600 {path} if no one "
                         "else could have read it)")
    token = path.read_text(encoding="utf-8").strip()
    if len(token) < 16:
        raise AlignError(f"the token file {path} is damaged", f"delete it and restart the service to make a new one")
    return token


@dataclass
class Settings:
    """How the service runs. Saved to HOME/service.json at start so the workers read the same."""

    home: Path
    host: str = DEFAULT_HOST
    port: int = DEFAULT_PORT
    workers: int = 1
    data_roots: list[Path] = field(default_factory=list)
    max_body_bytes: int = DEFAULT_MAX_BODY_BYTES
    gpus: int | None = None  # GPUs the jobs share (None: count them); 0 runs every job on the CPU
    cores: int | None = None  # CPU cores the jobs share (None: count them)

    def __post_init__(self):
        self.home = Path(self.home).expanduser().absolute()
        # the default data root always counts; roots are stored resolved so a symlinked root
        # compares equal to the paths inside it
        roots = [Path(r).expanduser() for r in self.data_roots] + [self.home / A.SERVICE_DATA]
        resolved: list[Path] = []
        for root in roots:
            if not root.is_dir() and root != self.home / A.SERVICE_DATA:
                raise AlignError(f"data root {root} is not a folder", "pass --data-root with an existing folder")
            real = root.resolve()
            if real not in resolved:
                resolved.append(real)
        self.data_roots = resolved
        if self.workers < 1:
            raise AlignError(f"--workers must be at least 1, got {self.workers}")
        if self.max_body_bytes < 1024:
            raise AlignError(f"--max-body-bytes must be at least 1024, got {self.max_body_bytes}")
        if self.gpus is None:
            from .launch import count_gpus  # torch: only the service itself counts, never a client

            self.gpus = count_gpus()
        if self.cores is None:
            self.cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)

    @property
    def cores_per_job(self) -> int:
        """A job's share of the cores: the workers run that many jobs side by side."""
        return max(1, self.cores // self.workers)

    @property
    def loopback(self) -> bool:
        return is_loopback(self.host)

    @property
    def token_for_reads(self) -> bool:
        """Beyond loopback every call needs the token, reads included."""
        return not self.loopback

    def to_json(self) -> dict:
        return {"home": str(self.home), "host": self.host, "port": self.port, "workers": self.workers,
                "data_roots": [str(r) for r in self.data_roots], "max_body_bytes": self.max_body_bytes,
                "gpus": self.gpus, "cores": self.cores}

    def save(self) -> None:
        write_json_atomic(Home(self.home).settings_path, self.to_json())


def load_settings(home: Path) -> Settings:
    path = Home(Path(home)).settings_path
    if not path.is_file():
        raise AlignError(f"no {A.SERVICE_SETTINGS} in {home}", "workers are started by `align serve`, not by hand")
    data = json.loads(path.read_text(encoding="utf-8"))
    return Settings(home=Path(data["home"]), host=data["host"], port=int(data["port"]), workers=int(data["workers"]),
                    data_roots=[Path(p) for p in data["data_roots"]], max_body_bytes=int(data["max_body_bytes"]),
                    gpus=data.get("gpus"), cores=data.get("cores"))
