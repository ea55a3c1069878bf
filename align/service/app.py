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
    POST /exports/{name}/search     {"texts": [...], "k": 10, "where": {"glaze": "cobalt"}} -> top-k of the
                                    export's gallery index (among the samples whose labels match "where"),
                                    each hit with its labels
    GET  /exports/{name}/thumbnail?key=KEY&px=160   a JPEG of one of the index's images, shrunk (only
                                    the index's keys; the file read is confined to the data roots)

The token goes in ``Authorization: Bearer <token>`` only, never in an address. Errors are JSON
``{"error": message, "hint": how to fix}``: 400 a malformed request (a Host header that does not
parse), 401 no token, 403 a path outside the roots (links followed, down to each file a job reads),
404 unknown (a job id beyond the store's 64-bit range included), 409 wrong state, 413 body too
large, 421 a Host that is not loopback (bound to loopback), 422 a bad recipe, override or body
(naming the field; checked before anything is queued), 500 a defect (JSON too; the traceback goes
to the service's log).
"""
from __future__ import annotations

import fcntl
import json
import os
import sys
from contextlib import asynccontextmanager
from pathlib import Path

from fastapi import APIRouter, FastAPI, Query
from fastapi.exceptions import RequestValidationError
from fastapi.responses import FileResponse, HTMLResponse, JSONResponse, Response
from pydantic import BaseModel, ConfigDict, Field

from .. import __version__
from .. import artifacts as A
from ..errors import AlignError, DataError, FingerprintMismatch, RecipeError
from ..report.search_view import SEARCH_THUMBNAIL_PX
from .home import Home, Settings, ensure_token
from .page import STATUS_PAGE
from .search import ExportCache, NotFound
from .security import Guard, PathRefused, confine
from .spec import JobRequest, build_spec
from .store import FINAL_STATES, JobStore

MAX_TEXTS = 256  # texts per embed / search call
MAX_TEXT_CHARS = 2000
MAX_K = 1000
MAX_THUMBNAIL_PX = 512
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
    backend: str = Field("auto", pattern="^(auto|exact|numpy|faiss|ann)$")
    # only samples whose labels match: {"glaze": "cobalt"} or {"glaze": ["cobalt", "ochre"]} (fields AND)
    where: dict[str, str | list[str]] | None = None


STATUS_OF = ((PathRefused, 403), (NotFound, 404), (Conflict, 409), (FingerprintMismatch, 409),
             (RecipeError, 422), (DataError, 422), (AlignError, 400))
# for an error raised without a hint of its own: every refusal tells the caller what to do next
DEFAULT_HINT_OF = ((RecipeError, "overrides are section.key=value, as `align train --set` takes them; the README's "
                                 "recipe reference lists every key, its type and default"),
                   (DataError, "send data=DIR, a folder written by `align pack` inside a data root"),
                   (AlignError, "see the API list in the README (Running the service)"))


def _error(status: int, message: str, hint: str | None = None, **extra) -> JSONResponse:
    return JSONResponse({"error": message, "hint": hint, **extra}, status_code=status)


def public_job(job: dict, detail: bool = False) -> dict:
    """What a client sees of a job (the stored spec stays inside, but for the detail view's recipe)."""
    spec = job["spec"] or {}
    out = {k: job[k] for k in ("id", "name", "state", "phase", "step", "steps", "loss", "pairs_per_s", "elapsed_s",
                               "eta_s", "attempts", "resumed_from", "cancel_requested", "created_at", "started_at",
                               "finished_at", "error", "metrics", "run_dir")}
    out.update(data=spec.get("data"), export=spec.get("export"), index=spec.get("index"),
               processes=job.get("processes", 1), devices=job.get("devices"))
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


class Workers:
    """The worker processes, started and stopped with the app (none when the app runs without them)."""

    def __init__(self, settings: Settings, start: bool):
        self.settings = settings
        self.start = start
        self.pool = None

    @asynccontextmanager
    async def lifespan(self, app):
        if self.start:
            from .supervisor import WorkerPool

            self.pool = WorkerPool(self.settings)
            self.pool.start()
        yield
        if self.pool is not None:
            self.pool.stop()

    def alive(self) -> int:
        return self.pool.alive() if self.pool else 0


def add_error_handlers(app: FastAPI) -> None:
    """Every refusal is JSON {"error", "hint"}; an AlignError keeps its message, never a traceback."""

    @app.exception_handler(AlignError)
    async def align_error(request, exc: AlignError):
        status = next(code for cls, code in STATUS_OF if isinstance(exc, cls))
        hint = exc.hint or next(text for cls, text in DEFAULT_HINT_OF if isinstance(exc, cls))
        return _error(status, exc.message, hint)

    @app.exception_handler(RequestValidationError)
    async def bad_body(request, exc: RequestValidationError):
        problems = [f"{'.'.join(str(p) for p in e['loc'] if p != 'body') or 'body'}: {e['msg']}" for e in exc.errors()]
        return _error(422, "the request body is not valid: " + "; ".join(problems),
                      "see the API list in `align serve --help` or the README", detail=json.loads(json.dumps(
                          exc.errors(), default=str)))

    @app.exception_handler(Exception)
    async def unexpected(request, exc: Exception):
        # a defect, not a user mistake: the caller gets JSON; Starlette re-raises, so the traceback
        # goes to the service's log where it can be reported
        return _error(500, f"internal error: {type(exc).__name__}",
                      "not a mistake in the request; the traceback is in the service's log")


def job_or_404(store: JobStore, job_id: int) -> dict:
    job = store.get(job_id)  # None for an id out of the store's range too
    if job is None:
        raise NotFound(f"no job {job_id}", "list the jobs with GET /jobs")
    return job


def page_routes(settings: Settings, store: JobStore, workers: Workers) -> APIRouter:
    router = APIRouter()

    @router.get(STATUS_PAGE_PATH, response_class=HTMLResponse)
    def status_page():
        # form-action 'none': the token form is handled by the script and never submitted anywhere
        # img-src blob:: thumbnails are fetched with the token header and shown as object URLs
        return HTMLResponse(STATUS_PAGE, headers={"Content-Security-Policy": "default-src 'self'; "
                                                  "script-src 'unsafe-inline'; style-src 'unsafe-inline'; "
                                                  "img-src 'self' blob:; form-action 'none'",
                                                  "Cache-Control": "no-store", "Referrer-Policy": "no-referrer"})

    @router.get("/health")
    def health():
        return {"ok": True, "version": __version__, "workers": settings.workers, "workers_alive": workers.alive(),
                "jobs": store.count(), "token_for_reads": settings.token_for_reads}

    return router


def job_routes(settings: Settings, store: JobStore, home: Home) -> APIRouter:
    router = APIRouter()

    @router.post("/jobs", status_code=201)
    def submit(request: JobRequest):
        name, spec, steps = build_spec(request, settings)  # validated and confined before anything is stored
        return public_job(store.submit(name, spec, steps, home.run_dir))

    @router.get("/jobs")
    def list_jobs(state: str | None = Query(None, pattern="^(queued|running|finished|failed|cancelled)$"),
                  limit: int = Query(200, ge=1, le=1000)):
        return {"jobs": [public_job(j) for j in store.list_jobs(limit, state)]}

    @router.get("/jobs/{job_id}")
    def show(job_id: int):
        job = public_job(job_or_404(store, job_id), detail=True)
        job["events"] = store.events(job_id)
        return job

    @router.get("/jobs/{job_id}/metrics")
    def metrics(job_id: int, after: int = Query(0, ge=0)):
        job = job_or_404(store, job_id)
        run_dir = Path(job["run_dir"])
        evaluation = run_dir / A.METRICS
        return {"id": job_id, "state": job["state"], "step": job["step"], "steps": job["steps"],
                "records": read_log(run_dir / A.METRICS_LOG, after),
                "evaluation": json.loads(evaluation.read_text(encoding="utf-8")) if evaluation.is_file() else None}

    @router.post("/jobs/{job_id}/cancel")
    def cancel(job_id: int):
        job = job_or_404(store, job_id)
        if job["state"] in FINAL_STATES:
            raise Conflict(f"job {job_id} is already {job['state']}", "only queued or running jobs can be cancelled")
        return public_job(store.request_cancel(job_id))

    return router


def artifact_routes(store: JobStore) -> APIRouter:
    router = APIRouter()

    @router.get("/jobs/{job_id}/artifacts")
    def artifacts(job_id: int):
        run_dir = Path(job_or_404(store, job_id)["run_dir"])
        files = []
        if run_dir.is_dir():
            for path in sorted(run_dir.rglob("*")):
                rel = path.relative_to(run_dir)
                if path.is_file() and not any(part.startswith(".") for part in rel.parts):  # temporaries
                    files.append({"path": rel.as_posix(), "bytes": path.stat().st_size})
        return {"id": job_id, "files": files}

    @router.get("/jobs/{job_id}/artifacts/{path:path}")
    def artifact(job_id: int, path: str):
        run_dir = Path(job_or_404(store, job_id)["run_dir"])
        if not run_dir.is_dir():
            raise NotFound(f"job {job_id} has written nothing yet", f"its state is in GET /jobs/{job_id}")
        file = confine(path, [run_dir.resolve()], "artifact path")
        if not file.is_file():
            raise NotFound(f"{path} is not a file of job {job_id}", f"list them with GET /jobs/{job_id}/artifacts")
        return FileResponse(file, filename=file.name)

    return router


def export_routes(exports: ExportCache) -> APIRouter:
    router = APIRouter()

    @router.get("/exports")
    def list_exports():
        return {"exports": exports.names()}

    @router.post("/exports/{name}/embed")
    def embed(name: str, request: EmbedRequest):
        _check_texts(request.texts)
        vectors, entry = exports.embed(name, request.texts)
        # straight to JSON: FastAPI's generic encoder walks every float one by one (~10x slower)
        return JSONResponse({"export": name, "dim": int(vectors.shape[1]), "count": int(vectors.shape[0]),
                             "embeddings": vectors.astype(float).tolist()})

    @router.post("/exports/{name}/search")
    def search(name: str, request: SearchRequest):
        _check_texts(request.texts)
        return exports.search(name, request.texts, request.k, request.backend, request.where)

    @router.get("/exports/{name}/thumbnail")
    def thumbnail(name: str, key: str = Query(..., min_length=1, max_length=1024),
                  px: int = Query(SEARCH_THUMBNAIL_PX, ge=16, le=MAX_THUMBNAIL_PX)):
        return Response(exports.thumbnail(name, key, px), media_type="image/jpeg",
                        headers={"Cache-Control": "no-store", "X-Content-Type-Options": "nosniff"})

    return router


def create_app(settings: Settings, token: str, start_workers: bool = True) -> FastAPI:
    """The API: route groups behind the Guard (Host, token, body limit), errors as JSON."""
    home = Home(settings.home)
    store = JobStore(home.db)
    workers = Workers(settings, start_workers)
    app = FastAPI(title="align service", version=__version__, lifespan=workers.lifespan, docs_url=None,
                  redoc_url=None)
    add_error_handlers(app)
    for router in (page_routes(settings, store, workers), job_routes(settings, store, home), artifact_routes(store),
                   export_routes(ExportCache(home, settings.data_roots))):
        app.include_router(router)
    app.add_middleware(Guard, token=token, token_for_reads=settings.token_for_reads, loopback_only=settings.loopback,
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
