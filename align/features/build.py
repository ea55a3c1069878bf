"""Building a feature-cache entry: the tower runs once per image and fingerprint, never per step.

A build embeds fixed chunks of ``vision.batch_size`` images (``chunks.py``): every process that
builds the entry (a one-process build, each rank under a launcher, each of ``--processes N``
local processes, or a second command started meanwhile) walks the split, claims the next chunk
nobody holds, embeds it and writes it under a temporary name, renamed into place. When a builder
has walked the whole split it waits for the others (the entry lock, taken exclusively), then one
of them embeds whatever a dead builder left and concatenates the chunks in order. A chunk is always
the same images in one tower pass of the same shape, so the assembled file is byte-identical
however many processes built it and however often the build was cut off and resumed.

The plain view is computed once per image: a K-view entry (``vision.views`` > 1, training only)
first makes sure the plain entry exists, copies its rows as view 0 and runs the tower only for the
augmented views 1..K-1. Evaluation reads the plain entry itself.
"""
from __future__ import annotations

import dataclasses
import os
import shutil
import time
from pathlib import Path
from typing import Callable

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from .. import artifacts as A
from ..errors import AlignError
from ..fileio import write_json_atomic
from ..recipe import VisionConfig
from ..vision import FrozenImageTower, check_fits_in_memory
from .cache import BuildReport, FeatureSet, entry_problem, load_feature_cache
from .chunks import ChunkStore, EntryLock, FinishedCount, chunk_count
from .embed import ChunkJob, ShareResult, ShareWalk, embed_claimed
from .fingerprint import cache_root, closest_entry, feature_fingerprint, fingerprint_digest
from .processes import LocalBuild

# ---------------------------------------------------------------------------------------------
# the tower pass, in this process or in local build processes


def _progress(split: str, console: Console) -> Progress:
    columns = [TextColumn(f"[bold]caching {split} features"), BarColumn(), MofNCompleteColumn(),
               TextColumn("{task.fields[rate]}"), TimeRemainingColumn()]
    return Progress(*columns, console=console, transient=True)


def _embed_share(tower: FrozenImageTower, job: ChunkJob, cfg: VisionConfig, processes: int, total: int,
                 console: Console, on_chunk: Callable[[int], None] | None) -> tuple[ShareResult, float]:
    """This command's part of the build (every chunk it can claim); (result, the time it started)."""
    # processes and decoding workers start before the progress thread does (a fork copies held locks)
    local = LocalBuild(processes, tower, cfg, job) if processes > 1 else None
    walk = ShareWalk(tower, job) if local is None else None
    try:
        started = local.wait_ready() if local is not None else time.perf_counter()
        finished = FinishedCount(ChunkStore(job.entry))
        embedded = 0
        with _progress(job.split, console) as progress:
            task = progress.add_task("cache", total=total, completed=min(finished() * job.rows, total), rate="")

            def chunk_done(index: int, images: int) -> None:
                nonlocal embedded
                embedded += images
                rate = embedded / max(time.perf_counter() - started, 1e-9)
                progress.update(task, completed=min(finished() * job.rows, total), rate=f"{rate:.0f} img/s")
                if on_chunk is not None:
                    on_chunk(index)

            result = local.run(chunk_done) if local is not None else walk.run(chunk_done)
    finally:
        if local is not None:
            local.stop()
    return result, started


def _finish(tower: FrozenImageTower, job: ChunkJob, result: ShareResult, console: Console,
            on_chunk: Callable[[int], None] | None) -> tuple[int, bool]:
    """Under the exclusive lock: embed what a dead builder left, then assemble. Returns (images
    embedded here, whether this process assembled the entry: not when another builder did first)."""
    if entry_problem(job.entry) is None:
        return 0, False
    store = ChunkStore(job.entry)
    missing = store.release_missing(chunk_count(result.split_images, job.rows))
    extra = 0
    if missing:
        console.print(f"embedding {len(missing)} chunk(s) of {job.split} that another build process left")
        rest = dataclasses.replace(job, only=frozenset(missing))
        extra = embed_claimed(tower, rest, (lambda index, _images: on_chunk(index)) if on_chunk else None).images
    store.assemble(chunk_count(result.split_images, job.rows), job.shards_dir, job.split)
    return extra, True


# ---------------------------------------------------------------------------------------------
# finding or building an entry


def _clear_or_explain(entry: Path, root: Path, fingerprint: dict, problem: str, console: Console) -> None:
    """Before a build: clear a damaged or outdated entry, and say why the tower runs (that, a changed
    fingerprint, or a first build). An interrupted build's chunks are kept: it continues."""
    split = fingerprint["split"]
    if (entry / A.FINGERPRINT).is_file() and not problem.startswith("the build did not finish"):
        console.print(f"[yellow]rebuilding feature cache {entry}: {problem}")
        for name in (A.FEATURES, A.FEATURE_KEYS, A.FEATURE_SKIPPED):
            (entry / name).unlink(missing_ok=True)
        shutil.rmtree(entry / A.FEATURE_CHUNKS, ignore_errors=True)
    elif not (entry / A.FEATURE_CHUNKS).is_dir():
        closest = closest_entry(root, fingerprint, skip=entry)
        if closest is None:
            console.print(f"no cached {split} features for this tower yet; building {entry}")
        else:
            console.print(f"[yellow]rebuilding {split} features into {entry.name}: the fingerprint changed "
                          f"since {closest[0].name} ({'; '.join(closest[1])})")


def _take_entry(lock: EntryLock, entry: Path, root: Path, fingerprint: dict, cfg: VisionConfig,
                console: Console) -> tuple[int, int] | None:
    """Join or start the build, holding the lock shared on return: (rows per chunk, chunks finished
    before), or None when the entry turned out complete (another process finished it)."""
    store, split = ChunkStore(entry), fingerprint["split"]
    while True:
        if lock.try_exclusive():  # nobody builds: clear what a killed build left, then build
            problem = entry_problem(entry, fingerprint)
            if problem is None:
                return None
            _clear_or_explain(entry, root, fingerprint, problem, console)
            write_json_atomic(entry / A.FINGERPRINT, fingerprint)
            rows, done = store.plan_rows(cfg.batch_size), store.prepare()
            if done:
                console.print(f"resuming the {split} feature build: {done} chunk(s) "
                              f"({min(done * rows, fingerprint['split_samples'])} images) were finished before")
            lock.shared()
            return rows, done
        lock.shared()  # waits while another process prepares or assembles the entry
        if entry_problem(entry, fingerprint) is None:
            return None
        if (store.dir / "plan.json").is_file() and entry_problem(entry, fingerprint) == "the build did not finish":
            console.print(f"joining the {split} feature build another process is running in {entry}")
            return store.plan_rows(cfg.batch_size), store.finished()
        lock.release()  # its preparer failed half-way: prepare it ourselves
        time.sleep(0.1)


def _speaking(console: Console) -> Console:
    """Every rank under a launcher builds; only rank 0 talks."""
    return console if int(os.environ.get("RANK", "0") or 0) == 0 else Console(quiet=True)


def ensure_feature_cache(tower: FrozenImageTower, shards_dir: str | Path, split: str, cfg: VisionConfig,
                         console: Console | None = None, *, views: int = 1, cache_dir: str | Path | None = None,
                         on_chunk: Callable[[int], None] | None = None,
                         processes: int = 1) -> tuple[Path, BuildReport | None]:
    """The complete entry for this tower, split and views: reused when the fingerprint matches, else
    built (or an interrupted build continued, or a build running elsewhere joined), saying why.
    Returns (entry, report or None on a hit).

    Every process that calls this for the same entry meanwhile (each rank under a launcher, or
    two commands) embeds its share of the chunks; ``processes`` > 1 starts that many local build
    processes (one torch thread each) for this call's share. A K-view entry also leaves the plain
    entry complete (its view 0); ``on_chunk`` sees only the chunks of the entry asked for that
    this call embedded."""
    console = _speaking(console or Console(stderr=True))
    if processes < 1:
        raise AlignError(f"the feature build needs at least 1 process, got {processes}", "pass --processes 1 or more")
    shards_dir = Path(shards_dir)
    fingerprint = feature_fingerprint(tower, shards_dir, split, views)
    root = cache_root(shards_dir, cfg, cache_dir)
    entry = root / fingerprint_digest(fingerprint)
    if entry_problem(entry, fingerprint) is None:
        console.print(f"reusing cached {split} features {entry}")
        return entry, None
    check_fits_in_memory(tower, cfg.batch_size * max(1, processes))  # before anything is created or decoded
    plain = None
    if views > 1:  # built or reused before our lock is taken: one lock held at a time, never two
        plain = ensure_feature_cache(tower, shards_dir, split, cfg, console, cache_dir=cache_dir,
                                     processes=processes)[0]
    try:
        entry.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise AlignError(f"cannot create the feature cache {entry}: {exc}",
                         "set vision.feature_cache=DIR to a folder you can write") from None
    with EntryLock(entry) as lock:
        taken = _take_entry(lock, entry, root, fingerprint, cfg, console)
        if taken is None:  # another process finished it while we waited
            console.print(f"reusing cached {split} features {entry}")
            return entry, None
        rows, done = taken
        job = ChunkJob(entry, shards_dir, split, rows, views, plain, cfg.workers)
        result, started = _embed_share(tower, job, cfg, processes, fingerprint["split_samples"], console, on_chunk)
        lock.exclusive()  # every other builder has written its chunks (or died)
        extra, assembled = _finish(tower, job, result, console, on_chunk)
    if not (result.images or extra or assembled):
        console.print(f"reusing cached {split} features {entry} (another process built them)")
        return entry, None
    report = BuildReport(images=result.images + extra, seconds=time.perf_counter() - started, resumed_chunks=done)
    reused = f", view 0 from {plain.name}" if plain is not None else ""
    console.print(f"cached {report.images} {split} image(s) x {views} view(s){reused} in {report.seconds:.1f}s "
                  f"({report.images_per_s:.0f} img/s{_by(processes)}) -> {entry}")
    return entry, report


def _by(processes: int) -> str:
    return f", {processes} processes" if processes > 1 else ""


def image_features(tower: FrozenImageTower, shards_dir: str | Path, split: str, cfg: VisionConfig,
                   console: Console | None = None, *, views: int = 1, cache_dir: str | Path | None = None,
                   on_chunk: Callable[[int], None] | None = None, processes: int = 1) -> FeatureSet:
    """One split's frozen features from the cache (built on a miss), row i for ``keys[i]``.

    ``views`` > 1 also caches augmented views (training only; evaluation wants the plain one).
    ``processes`` > 1 embeds with that many local processes (see ``ensure_feature_cache``).
    Images that fail to decode are skipped, counted and reported; callers align tables with ``keys``.
    """
    console = _speaking(console or Console(stderr=True))
    entry, report = ensure_feature_cache(tower, shards_dir, split, cfg, console, views=views,
                                         cache_dir=cache_dir, on_chunk=on_chunk, processes=processes)
    feats = load_feature_cache(entry)
    feats.build = report
    if feats.skipped:
        console.print(f"[yellow]skipped {len(feats.skipped)} {split} image(s) that failed to decode: "
                      f"{', '.join(feats.skipped[:5])}{' ...' if len(feats.skipped) > 5 else ''}")
    return feats
