"""The durable job store: one SQLite file in WAL mode, shared by the service and its workers.

States: queued -> running -> finished | failed | cancelled; a running job whose worker died (a
crash, ``kill -9``, a reboot) goes back to queued and its next attempt resumes from the run's
newest checkpoint. A job asks for ``processes`` training processes; on a machine with GPUs a
running job holds that many (``devices``, GPU indices as the service numbers them) and no other
running job is given one of them: the oldest queued job waits until enough are free. Each
process opens its own short-lived connections (SQLite connections do not cross threads or
processes); writes take the lock up front (``BEGIN IMMEDIATE``) so two
workers never claim the same job. ``synchronous=FULL``: a job the service answered "queued" for
is on disk even if the machine loses power right after.
"""
from __future__ import annotations

import json
import sqlite3
import time
from contextlib import contextmanager
from pathlib import Path
from typing import Callable, Iterator

STATES = ("queued", "running", "finished", "failed", "cancelled")
FINAL_STATES = ("finished", "failed", "cancelled")
MAX_ATTEMPTS = 5  # a job whose worker died this many times is failed, not retried forever
# SQLite's largest integer: a larger id names no job, and a larger count would overflow the driver
MAX_INTEGER = (1 << 63) - 1

SCHEMA = """
CREATE TABLE IF NOT EXISTS jobs (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    name TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN ('queued', 'running', 'finished', 'failed', 'cancelled')),
    spec TEXT NOT NULL,              -- JSON: the resolved recipe and what to do after training
    run_dir TEXT NOT NULL DEFAULT '',
    created_at REAL NOT NULL,
    started_at REAL,
    finished_at REAL,
    updated_at REAL NOT NULL,
    phase TEXT,                      -- train, evaluate, export, index
    step INTEGER NOT NULL DEFAULT 0,
    steps INTEGER NOT NULL,
    loss REAL,
    pairs_per_s REAL,
    elapsed_s REAL,
    eta_s REAL,
    attempts INTEGER NOT NULL DEFAULT 0,
    resumed_from INTEGER,            -- checkpoint step the latest attempt started from
    cancel_requested INTEGER NOT NULL DEFAULT 0,
    worker TEXT,                     -- id of the worker process running it
    error TEXT,                      -- JSON {message, hint} when failed
    metrics TEXT,                    -- JSON metrics.json when evaluated
    processes INTEGER NOT NULL DEFAULT 1,  -- training processes (torchrun ranks) the job asked for
    devices TEXT                     -- JSON list of the GPU indices a running job holds
);
CREATE INDEX IF NOT EXISTS jobs_state ON jobs (state, id);
CREATE TABLE IF NOT EXISTS events (
    job_id INTEGER NOT NULL REFERENCES jobs (id),
    at REAL NOT NULL,
    text TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS events_job ON events (job_id, at);
"""

JSON_COLUMNS = ("spec", "error", "metrics", "devices")
# columns a job store written before they existed gets on opening (name, declaration)
ADDED_COLUMNS = (("processes", "INTEGER NOT NULL DEFAULT 1"), ("devices", "TEXT"))


class JobStore:
    def __init__(self, path: str | Path, busy_timeout_s: float = 30.0):
        self.path = Path(path)
        self.busy_timeout_s = busy_timeout_s
        with self.connect() as conn:
            conn.execute("PRAGMA journal_mode=WAL")  # persistent in the file: readers never block the writer
            conn.executescript(SCHEMA)
            have = {row["name"] for row in conn.execute("PRAGMA table_info(jobs)")}
            for name, declaration in ADDED_COLUMNS:
                if name not in have:
                    conn.execute(f"ALTER TABLE jobs ADD COLUMN {name} {declaration}")

    @contextmanager
    def connect(self) -> Iterator[sqlite3.Connection]:
        conn = sqlite3.connect(self.path, timeout=self.busy_timeout_s, isolation_level=None)
        conn.row_factory = sqlite3.Row
        conn.execute("PRAGMA synchronous=FULL")
        conn.execute("PRAGMA foreign_keys=ON")
        try:
            yield conn
        finally:
            conn.close()

    @contextmanager
    def write(self) -> Iterator[sqlite3.Connection]:
        """A write transaction that holds the lock from its first statement."""
        with self.connect() as conn:
            conn.execute("BEGIN IMMEDIATE")
            try:
                yield conn
            except BaseException:
                conn.execute("ROLLBACK")
                raise
            conn.execute("COMMIT")

    # -- reading ----------------------------------------------------------------------------

    @staticmethod
    def _row(row: sqlite3.Row | None) -> dict | None:
        if row is None:
            return None
        job = dict(row)
        for key in JSON_COLUMNS:
            job[key] = json.loads(job[key]) if job[key] else None
        job["cancel_requested"] = bool(job["cancel_requested"])
        return job

    def get(self, job_id: int) -> dict | None:
        if not 0 < job_id <= MAX_INTEGER:
            return None
        with self.connect() as conn:
            return self._row(conn.execute("SELECT * FROM jobs WHERE id = ?", (job_id,)).fetchone())

    def list_jobs(self, limit: int = 200, state: str | None = None) -> list[dict]:
        with self.connect() as conn:
            if state:
                rows = conn.execute("SELECT * FROM jobs WHERE state = ? ORDER BY id DESC LIMIT ?", (state, limit))
            else:
                rows = conn.execute("SELECT * FROM jobs ORDER BY id DESC LIMIT ?", (limit,))
            return [self._row(r) for r in rows.fetchall()]

    def count(self) -> int:
        with self.connect() as conn:
            return int(conn.execute("SELECT COUNT(*) FROM jobs").fetchone()[0])

    def events(self, job_id: int) -> list[dict]:
        with self.connect() as conn:
            rows = conn.execute("SELECT at, text FROM events WHERE job_id = ? ORDER BY at, rowid", (job_id,))
            return [dict(r) for r in rows.fetchall()]

    # -- the service's side -----------------------------------------------------------------

    def submit(self, name: str, spec: dict, steps: int, run_dir_for: Callable[[int], Path]) -> dict:
        now = time.time()
        with self.write() as conn:
            cur = conn.execute("INSERT INTO jobs (name, state, spec, created_at, updated_at, steps, processes) "
                               "VALUES (?, 'queued', ?, ?, ?, ?, ?)",
                               (name, json.dumps(spec), now, now, steps, int(spec.get("processes", 1))))
            job_id = int(cur.lastrowid)
            conn.execute("UPDATE jobs SET run_dir = ? WHERE id = ?", (str(run_dir_for(job_id)), job_id))
            _event(conn, job_id, "queued")
        return self.get(job_id)

    def request_cancel(self, job_id: int) -> dict | None:
        """A queued job is cancelled at once; a running one at its next logged step."""
        with self.write() as conn:
            row = conn.execute("SELECT state FROM jobs WHERE id = ?", (job_id,)).fetchone()
            if row is None:
                return None
            if row["state"] == "queued":
                conn.execute("UPDATE jobs SET state = 'cancelled', cancel_requested = 1, finished_at = ?, "
                             "updated_at = ? WHERE id = ?", (time.time(), time.time(), job_id))
                _event(conn, job_id, "cancelled before it started")
            elif row["state"] == "running":
                conn.execute("UPDATE jobs SET cancel_requested = 1, updated_at = ? WHERE id = ?", (time.time(), job_id))
                _event(conn, job_id, "cancel requested; stops at the next logged step")
        return self.get(job_id)

    # -- the workers' side ------------------------------------------------------------------

    def claim(self, worker: str, gpus: int = 0) -> dict | None:
        """The oldest queued job, now running on ``worker``; None when the queue is empty, or when
        the machine has ``gpus`` GPUs and fewer than the oldest job's processes are free (it keeps
        its place: a smaller job behind it does not overtake it and starve it). A job asking for
        more GPUs than the machine has is handed out anyway, for the worker to fail with a message."""
        with self.write() as conn:
            row = conn.execute("SELECT id, processes FROM jobs WHERE state = 'queued' ORDER BY id LIMIT 1").fetchone()
            if row is None:
                return None
            devices: list[int] = []
            if gpus and row["processes"] <= gpus:
                held = set()
                for (taken,) in conn.execute("SELECT devices FROM jobs WHERE state = 'running' AND devices IS NOT NULL"):
                    held.update(json.loads(taken))
                free = [index for index in range(gpus) if index not in held]
                if len(free) < row["processes"]:
                    return None
                devices = free[:row["processes"]]
            now = time.time()
            conn.execute("UPDATE jobs SET state = 'running', worker = ?, attempts = attempts + 1, devices = ?, "
                         "started_at = COALESCE(started_at, ?), updated_at = ?, error = NULL WHERE id = ?",
                         (worker, json.dumps(devices) if devices else None, now, now, row["id"]))
            attempts = conn.execute("SELECT attempts FROM jobs WHERE id = ?", (row["id"],)).fetchone()[0]
            _event(conn, row["id"], f"started (attempt {attempts}) on worker {worker}"
                   + (f", GPU {', '.join(map(str, devices))}" if devices else ""))
        return self.get(row["id"])

    def started_from(self, job_id: int, step: int) -> None:
        with self.write() as conn:
            conn.execute("UPDATE jobs SET resumed_from = ?, step = ?, updated_at = ? WHERE id = ?",
                         (step, step, time.time(), job_id))
            if step:
                _event(conn, job_id, f"resuming from the checkpoint at step {step}")

    def progress(self, job_id: int, record: dict, batch_size: int) -> bool:
        """Store one logged step; returns True when a cancel was requested."""
        with self.write() as conn:
            steps = conn.execute("SELECT steps FROM jobs WHERE id = ?", (job_id,)).fetchone()["steps"]
            rate = record.get("pairs_per_s") or 0.0
            eta = (steps - record["step"]) * batch_size / rate if rate > 0 else None
            conn.execute("UPDATE jobs SET step = ?, loss = ?, pairs_per_s = ?, elapsed_s = ?, eta_s = ?, "
                         "updated_at = ? WHERE id = ?",
                         (record["step"], record.get("loss"), rate, record.get("elapsed_s"), eta, time.time(), job_id))
            return bool(conn.execute("SELECT cancel_requested FROM jobs WHERE id = ?", (job_id,)).fetchone()[0])

    def cancel_requested(self, job_id: int) -> bool:
        with self.connect() as conn:
            return bool(conn.execute("SELECT cancel_requested FROM jobs WHERE id = ?", (job_id,)).fetchone()[0])

    def set_phase(self, job_id: int, phase: str) -> None:
        with self.write() as conn:
            conn.execute("UPDATE jobs SET phase = ?, updated_at = ? WHERE id = ?", (phase, time.time(), job_id))
            _event(conn, job_id, phase)

    def finish(self, job_id: int, metrics: dict | None) -> None:
        self._end(job_id, "finished", "finished", metrics=metrics)

    def fail(self, job_id: int, message: str, hint: str | None) -> None:
        self._end(job_id, "failed", f"failed: {message}", error={"message": message, "hint": hint})

    def cancelled(self, job_id: int, step: int) -> None:
        self._end(job_id, "cancelled", f"cancelled at step {step}; what was written is kept")

    def _end(self, job_id: int, state: str, text: str, metrics: dict | None = None, error: dict | None = None) -> None:
        now = time.time()
        with self.write() as conn:
            conn.execute("UPDATE jobs SET state = ?, finished_at = ?, updated_at = ?, eta_s = NULL, worker = NULL, "
                         "devices = NULL, "
                         "metrics = COALESCE(?, metrics), error = ? WHERE id = ?",
                         (state, now, now, json.dumps(metrics) if metrics is not None else None,
                          json.dumps(error) if error else None, job_id))
            _event(conn, job_id, text)

    def requeue(self, job_id: int, reason: str) -> None:
        """Back to the queue (the service is stopping): the next attempt resumes from the checkpoint."""
        with self.write() as conn:
            conn.execute("UPDATE jobs SET state = 'queued', worker = NULL, devices = NULL, eta_s = NULL, "
                         "updated_at = ? WHERE id = ? AND state = 'running'", (time.time(), job_id))
            _event(conn, job_id, reason)

    def recover_orphans(self, worker_alive: Callable[[str], bool]) -> list[int]:
        """Running jobs whose worker is dead go back to the queue (or end, when cancelled or retried too often)."""
        recovered = []
        with self.write() as conn:
            rows = conn.execute("SELECT id, worker, attempts, cancel_requested, step FROM jobs "
                                "WHERE state = 'running'").fetchall()
            now = time.time()
            for row in rows:
                if row["worker"] and worker_alive(row["worker"]):
                    continue
                recovered.append(row["id"])
                if row["cancel_requested"]:
                    conn.execute("UPDATE jobs SET state = 'cancelled', finished_at = ?, updated_at = ?, worker = NULL, "
                                 "devices = NULL WHERE id = ?", (now, now, row["id"]))
                    _event(conn, row["id"], "its worker stopped after a cancel was requested: cancelled")
                elif row["attempts"] >= MAX_ATTEMPTS:
                    error = {"message": f"the worker running this job died {row['attempts']} times",
                             "hint": "see HOME/logs/worker-*.log and the job's job.log; a job that kills its "
                                     "process (e.g. out of memory) needs a smaller batch"}
                    conn.execute("UPDATE jobs SET state = 'failed', finished_at = ?, updated_at = ?, worker = NULL, "
                                 "devices = NULL, error = ? WHERE id = ?", (now, now, json.dumps(error), row["id"]))
                    _event(conn, row["id"], f"failed: {error['message']}")
                else:
                    conn.execute("UPDATE jobs SET state = 'queued', worker = NULL, devices = NULL, eta_s = NULL, "
                                 "updated_at = ? WHERE id = ?", (now, row["id"]))
                    _event(conn, row["id"], f"interrupted near step {row['step']} (its worker is gone); "
                                            "queued to resume from its newest checkpoint")
        return recovered


def _event(conn: sqlite3.Connection, job_id: int, text: str) -> None:
    conn.execute("INSERT INTO events (job_id, at, text) VALUES (?, ?, ?)", (job_id, time.time(), text))
