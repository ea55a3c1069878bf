"""The HTTP API (FastAPI on uvicorn) and ``serve()``, behind ``align serve``.

    GET  /                          the status page (static; it asks for the token and sends it as a header)
    GET  /health                    liveness, worker count
    POST /jobs                      submit (recipe TOML or a recipe file name, overrides, data) -> job
    GET  /jobs                      the job list, newest first
    GET  /jobs/{id}                 one job: state, step, loss, pairs/s, time left, metrics, events
    GET  /jobs/{id}/metrics         the training log (metrics.jsonl) and the evaluation (metrics.json)
    POST /jobs/{id}/cancel          queued: cancelled now; running: stops at the next logged step
    GET  /jobs/{id}/artifacts       the files of the job's run folder
    GET  /jobs/{id}/artifacts/PATH  one of them
    GET  /exports                   exports in HOME/exports (and whether each has a gallery index)
    POST /exports/{name}/embed      {"texts": [...]} -> L2-normalised embeddings
    POST /exports/{name}/search     {"texts": [...], "k": 10} -> top-k of the export's gallery index

The token goes in ``Authorization: Bearer <token>`` only, never in an address. Errors are JSON
``{"error": message, "hint": how to fix}``: 401 no token, 403 a path outside the
roots, 404 unknown, 409 wrong state, 413 body too large, 422 a bad recipe or body (naming the field).
"""
from __future__ import annotations

import fcntl
import json
import os
import sys
from contextlib import asynccontextmanager
from pathlib import Path

from fastapi import FastAPI, Query
from fastapi.exceptions import RequestValidationError
from fastapi.responses import FileResponse, HTMLResponse, JSONResponse
from pydantic import BaseModel, ConfigDict, Field

from .. import __version__
from .. import artifacts as A
from ..errors import AlignError, DataError, FingerprintMismatch, RecipeError
from .home import Home, Settings, ensure_token
from .page import STATUS_PAGE
from .search import ExportCache, NotFound
from .security import Guard, PathRefused, confine
from .spec import JobRequest, build_spec
from .store import FINAL_STATES, JobStore

MAX_TEXTS = 256  # texts per embed / search call
MAX_TEXT_CHARS = 2000
MAX_K = 1000
STATUS_PAGE_PATH = "/"  # served without the token: static HTML that asks for it (see page.py)


class Conflict(AlignError):
    """The job is not in a state that allows this."""


class EmbedRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")
    texts: list[str] = Field(..., min_length=1, max_length=MAX_TEXTS)


class SearchRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")
    texts: list[str] = Field(..., min_length=1, max_length=MAX_TEXTS)
    k: int = Field(10, ge=1, le=MAX_K)
    backend: str = Field("auto", pattern="^(auto|numpy|faiss)$")


STATUS_OF = ((PathRefused, 403), (NotFound, 404), (Conflict, 409), (FingerprintMismatch, 409),
             (RecipeError, 422), (DataError, 422), (AlignError, 400))


def _error(status: int, message: str, hint: str | None = None, **extra) -> JSONResponse:
    return JSONResponse({"error": message, "hint": hint, **extra}, status_code=status)


def public_job(job: dict, detail: bool = False) -> dict:
    """What a client sees of a job (the stored spec stays inside, but for the detail view's recipe)."""
    spec = job["spec"] or {}
    out = {k: job[k] for k in ("id", "name", "state", "phase", "step", "steps", "loss", "pairs_per_s", "elapsed_s",
                               "eta_s", "attempts", "resumed_from", "cancel_requested", "created_at", "started_at",
                               "finished_at", "error", "metrics", "run_dir")}
    out.update(data=spec.get("data"), export=spec.get("export"), index=spec.get("index"))
    if detail:
        out["recipe_toml"] = spec.get("recipe_toml")
    return out


def read_log(path: Path, after: int = 0) -> list[dict]:
    """metrics.jsonl records past ``after``; a line still being written is left for the next call."""
    if not path.is_file():
        return []
    records = []
    for line in path.read_text(encoding="utf-8").splitlines():
        try:
            record = json.loads(line)
        except json.JSONDecodeError:
            continue
        if record.get("step", 0) > after:
            records.append(record)
    return records


def create_app(settings: Settings, token: str, start_workers: bool = True) -> FastAPI:
    home = Home(settings.home)
    store = JobStore(home.db)
    exports = ExportCache(home)
    pool = None

    @asynccontextmanager
    async def lifespan(app):
        nonlocal pool
        if start_workers:
            from .supervisor import WorkerPool

            pool = WorkerPool(settings)
            pool.start()
        yield
        if pool is not None:
            pool.stop()

    app = FastAPI(title="align service", version=__version__, lifespan=lifespan, docs_url=None, redoc_url=None)

    @app.exception_handler(AlignError)
    async def align_error(request, exc: AlignError):
        status = next(code for cls, code in STATUS_OF if isinstance(exc, cls))
        return _error(status, exc.message, exc.hint)

    @app.exception_handler(RequestValidationError)
    async def bad_body(request, exc: RequestValidationError):
        problems = [f"{'.'.join(str(p) for p in e['loc'] if p != 'body') or 'body'}: {e['msg']}" for e in exc.errors()]
        return _error(422, "the request body is not valid: " + "; ".join(problems),
                      "see the API list in `align serve --help` or the README", detail=json.loads(json.dumps(
                          exc.errors(), default=str)))

    def job_or_404(job_id: int) -> dict:
        job = store.get(job_id)
        if job is None:
            raise NotFound(f"no job {job_id}", "list the jobs with GET /jobs")
        return job

    @app.get(STATUS_PAGE_PATH, response_class=HTMLResponse)
    def status_page():
        # form-action 'none': the token form is handled by the script and never submitted anywhere
        return HTMLResponse(STATUS_PAGE, headers={"Content-Security-Policy": "default-src 'self'; "
                                                  "script-src 'unsafe-inline'; style-src 'unsafe-inline'; "
                                                  "form-action 'none'",
                                                  "Cache-Control": "no-store", "Referrer-Policy": "no-referrer"})

    @app.get("/health")
    def health():
        return {"ok": True, "version": __version__, "workers": settings.workers,
                "workers_alive": pool.alive() if pool else 0, "jobs": store.count(),
                "token_for_reads": settings.token_for_reads}

    @app.post("/jobs", status_code=201)
    def submit(request: JobRequest):
        name, spec, steps = build_spec(request, settings)
        return public_job(store.submit(name, spec, steps, home.run_dir))

    @app.get("/jobs")
    def list_jobs(state: str | None = Query(None, pattern="^(queued|running|finished|failed|cancelled)$"),
                  limit: int = Query(200, ge=1, le=1000)):
        return {"jobs": [public_job(j) for j in store.list_jobs(limit, state)]}

    @app.get("/jobs/{job_id}")
    def show(job_id: int):
        job = public_job(job_or_404(job_id), detail=True)
        job["events"] = store.events(job_id)
        return job

    @app.get("/jobs/{job_id}/metrics")
    def metrics(job_id: int, after: int = Query(0, ge=0)):
        job = job_or_404(job_id)
        run_dir = Path(job["run_dir"])
        evaluation = run_dir / A.METRICS
        return {"id": job_id, "state": job["state"], "step": job["step"], "steps": job["steps"],
                "records": read_log(run_dir / A.METRICS_LOG, after),
                "evaluation": json.loads(evaluation.read_text(encoding="utf-8")) if evaluation.is_file() else None}

    @app.post("/jobs/{job_id}/cancel")
    def cancel(job_id: int):
        job = job_or_404(job_id)
        if job["state"] in FINAL_STATES:
            raise Conflict(f"job {job_id} is already {job['state']}", "only queued or running jobs can be cancelled")
        return public_job(store.request_cancel(job_id))

    @app.get("/jobs/{job_id}/artifacts")
    def artifacts(job_id: int):
        run_dir = Path(job_or_404(job_id)["run_dir"])
        files = []
        if run_dir.is_dir():
            for path in sorted(run_dir.rglob("*")):
                rel = path.relative_to(run_dir)
                if path.is_file() and not any(part.startswith(".") for part in rel.parts):  # temporaries
                    files.append({"path": rel.as_posix(), "bytes": path.stat().st_size})
        return {"id": job_id, "files": files}

    @app.get("/jobs/{job_id}/artifacts/{path:path}")
    def artifact(job_id: int, path: str):
        run_dir = Path(job_or_404(job_id)["run_dir"])
        if not run_dir.is_dir():
            raise NotFound(f"job {job_id} has written nothing yet")
        file = confine(path, [run_dir.resolve()], "artifact path")
        if not file.is_file():
            raise NotFound(f"{path} is not a file of job {job_id}", f"list them with GET /jobs/{job_id}/artifacts")
        return FileResponse(file, filename=file.name)

    @app.get("/exports")
    def list_exports():
        return {"exports": exports.names()}

    @app.post("/exports/{name}/embed")
    def embed(name: str, request: EmbedRequest):
        _check_texts(request.texts)
        vectors, entry = exports.embed(name, request.texts)
        # straight to JSON: FastAPI's generic encoder walks every float one by one (~10x slower)
        return JSONResponse({"export": name, "dim": int(vectors.shape[1]), "count": int(vectors.shape[0]),
                             "embeddings": vectors.astype(float).tolist()})

    @app.post("/exports/{name}/search")
    def search(name: str, request: SearchRequest):
        _check_texts(request.texts)
        return exports.search(name, request.texts, request.k, request.backend)

    app.add_middleware(Guard, token=token, token_for_reads=settings.token_for_reads, check_host=settings.loopback,
                       max_body=settings.max_body_bytes, public_pages=(STATUS_PAGE_PATH,))
    app.state.store = store
    return app


def _check_texts(texts: list[str]) -> None:
    long = [i for i, t in enumerate(texts) if len(t) > MAX_TEXT_CHARS]
    if long:
        raise RecipeError(f"texts[{long[0]}] is longer than {MAX_TEXT_CHARS} characters",
                          "send captions or queries, not documents")


def hold_service_lock(home: Home) -> int:
    """One service per home: two would run the same queue twice."""
    fd = os.open(home.root / A.SERVICE_LOCK, os.O_CREAT | os.O_RDWR, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        os.close(fd)
        raise AlignError(f"another align service is using {home.root}",
                         "stop it first, or give this one its own --home") from None
    os.ftruncate(fd, 0)
    os.write(fd, str(os.getpid()).encode())
    return fd


def serve(settings: Settings) -> None:
    """Run the service in the foreground until interrupted (Ctrl-C / SIGTERM stop it cleanly)."""
    import uvicorn

    home = Home(settings.home).prepare()
    token = ensure_token(home)
    lock = hold_service_lock(home)
    settings.save()
    app = create_app(settings, token)
    where = f"http://{'[' + settings.host + ']' if ':' in settings.host else settings.host}:{settings.port}/"
    print(f"align service on {where} (home {home.root}; {settings.workers} worker(s); token in {home.token_path}; "
          f"data roots: {', '.join(str(r) for r in settings.data_roots)})", file=sys.stderr, flush=True)
    if not settings.loopback:
        print("align: bound beyond loopback, so every call needs the token", file=sys.stderr, flush=True)
    try:
        # no access log: request paths name jobs, exports and artifact files, and logs get shared
        uvicorn.run(app, host=settings.host, port=settings.port, log_level="warning", access_log=False,
                    timeout_graceful_shutdown=5)
    finally:
        os.close(lock)
