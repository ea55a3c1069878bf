"""Building a feature-cache entry: the tower runs once per image and fingerprint, never per step.

A build embeds one chunk of ``vision.batch_size`` samples at a time and writes each finished chunk
to ``chunks/`` under a temporary name, renamed into place; an interrupted build keeps those chunks
and the next call continues after them. Every chunk is computed from the same batch of images
whether the build ran in one go or not, so the assembled file is byte-identical either way. One
lock per entry keeps two processes (ranks, or two commands) from building it twice.

The plain view is computed once per image: a K-view entry (``vision.views`` > 1, training only)
first makes sure the plain entry exists, copies its rows as view 0 and runs the tower only for the
augmented views 1..K-1. Evaluation reads the plain entry itself.
"""
from __future__ import annotations

import fcntl
import json
import os
import shutil
import time
from pathlib import Path
from typing import Callable

import numpy as np
import torch
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from .. import artifacts as A
from ..data.shards import load_table
from ..errors import AlignError
from ..fileio import write_bytes_atomic, write_json_atomic
from ..recipe import VisionConfig
from ..vision import FrozenImageTower, check_fits_in_memory
from .cache import BuildReport, FeatureSet, entry_problem, load_feature_cache
from .decode import DecodedSamples, decoded_stream, training_transform
from .fingerprint import cache_root, closest_entry, feature_fingerprint, fingerprint_digest

# ---------------------------------------------------------------------------------------------
# chunks of a build in progress


def _chunk_path(chunks: Path, index: int) -> Path:
    return chunks / f"{index:06d}.npz"


def _finished_chunks(chunks: Path) -> int:
    """How many chunks, counted from 0 without a gap, an earlier build left complete."""
    count = 0
    while _chunk_path(chunks, count).is_file():
        try:
            with np.load(_chunk_path(chunks, count)) as chunk:
                chunk["features"], chunk["keys"], chunk["failed"]  # noqa: B018 - reads every member
        except Exception:  # noqa: BLE001 - a damaged chunk is simply redone
            break
        count += 1
    # later chunks would follow a gap; half-written temporaries belong to a killed build (we hold the lock)
    for stale in list(chunks.glob("*.npz")) + list(chunks.glob(".*.partial")):
        if stale.suffix == ".partial" or not stale.stem.isdigit() or int(stale.stem) >= count:
            stale.unlink()
    return count


def _write_chunk(chunks: Path, index: int, keys: list[str], features: np.ndarray, failed: list[str]) -> None:
    temp = chunks / f".{index:06d}.{os.getpid()}.partial"
    with open(temp, "wb") as fh:
        np.savez(fh, features=features, keys=np.array(keys, dtype=str), failed=np.array(failed, dtype=str))
    os.replace(temp, _chunk_path(chunks, index))


def _chunk_rows(chunks: Path, cfg: VisionConfig) -> int:
    """Rows per chunk: the first attempt's, kept so a resumed build batches exactly as it did."""
    plan_path = chunks / "plan.json"
    if plan_path.is_file():
        return int(json.loads(plan_path.read_text(encoding="utf-8"))["chunk_rows"])
    write_bytes_atomic(plan_path, json.dumps({"chunk_rows": cfg.batch_size}).encode("utf-8"))
    return cfg.batch_size


def _assemble(entry: Path, chunks: Path, count: int, shards_dir: Path, split: str) -> None:
    """Concatenate the chunks in order into the final files; features.f16 goes last (completion)."""
    keys, failed = [], []
    temp = entry / f".{A.FEATURES}.{os.getpid()}.partial"
    with open(temp, "wb") as out:  # streamed: the whole array never sits in memory
        for index in range(count):
            with np.load(_chunk_path(chunks, index)) as chunk:
                out.write(np.ascontiguousarray(chunk["features"], dtype=np.float16).tobytes())
                keys += chunk["keys"].tolist()
                failed += chunk["failed"].tolist()
    seen = set(keys) | set(failed)
    failed += [k for k in load_table(shards_dir, split).keys if k not in seen]  # samples with no image member
    write_bytes_atomic(entry / A.FEATURE_KEYS, "".join(k + "\n" for k in keys).encode("utf-8"))
    write_bytes_atomic(entry / A.FEATURE_SKIPPED, "".join(k + "\n" for k in failed).encode("utf-8"))
    os.replace(temp, entry / A.FEATURES)
    shutil.rmtree(chunks, ignore_errors=True)


class _EntryLock:
    """An exclusive lock per entry, so two processes (ranks, or two commands) never build it twice."""

    def __init__(self, entry: Path, console: Console):
        self.path, self.console = entry / A.FEATURE_LOCK, console

    def __enter__(self):
        self.fh = open(self.path, "a+")
        try:
            fcntl.flock(self.fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            self.console.print(f"waiting for another process that is building {self.path.parent}")
            fcntl.flock(self.fh, fcntl.LOCK_EX)
        return self

    def __exit__(self, *exc):
        fcntl.flock(self.fh, fcntl.LOCK_UN)
        self.fh.close()
        return False


# ---------------------------------------------------------------------------------------------
# the tower pass


def _embed_chunk(tower: FrozenImageTower, batch: list[tuple[str, torch.Tensor | None]], views: int,
                 plain: FeatureSet | None) -> tuple[list[str], np.ndarray, list[str]]:
    """(keys, features (n, K, D) float16, failed keys) of one chunk. With ``plain``, view 0 is its
    stored rows and the decoded pixels hold views 1..K-1 only."""
    good = [(key, pixels) for key, pixels in batch if pixels is not None]
    keys = [key for key, _ in good]
    features = np.zeros((len(good), views, tower.feature_dim), dtype=np.float16)  # (n, K, D)
    if good:
        pixels = torch.stack([p for _, p in good])  # (n, V, 3, H, W)
        first = 0 if plain is None else 1
        if plain is not None:
            features[:, 0] = plain.stored_rows_for(keys)
        for slot in range(pixels.shape[1]):
            embedded = tower.embed_pixels(pixels[:, slot].contiguous())  # (n, D)
            features[:, first + slot] = embedded.to(torch.float16).numpy()
    return keys, features, [key for key, pixels in batch if pixels is None]


def _next_chunk(stream, rows: int) -> list:
    batch = []
    for item in stream:
        batch.append(item)
        if len(batch) == rows:
            break
    return batch


def _build(entry: Path, tower: FrozenImageTower, shards_dir: Path, split: str, cfg: VisionConfig, views: int,
           fingerprint: dict, console: Console, on_chunk: Callable[[int], None] | None,
           plain: FeatureSet | None) -> BuildReport:
    chunks = entry / A.FEATURE_CHUNKS
    chunks.mkdir(parents=True, exist_ok=True)
    write_json_atomic(entry / A.FINGERPRINT, fingerprint)
    chunk_rows = _chunk_rows(chunks, cfg)
    done = _finished_chunks(chunks)
    start, total = done * chunk_rows, fingerprint["split_samples"]
    if done:
        console.print(f"resuming the {split} feature build: {done} chunk(s) ({min(start, total)} images) "
                      "were finished before")
    augment = training_transform(tower.preprocessing) if views > 1 else None
    decoded_views = list(range(0 if plain is None else 1, views))
    # the tower's own preprocessing, whatever its source: it runs in the decoding workers
    dataset = DecodedSamples(shards_dir, split, start, tower.transform, augment, decoded_views)
    stream = decoded_stream(dataset, cfg.workers)  # workers start before the progress thread does

    columns = [TextColumn(f"[bold]caching {split} features"), BarColumn(), MofNCompleteColumn(),
               TextColumn("{task.fields[rate]}"), TimeRemainingColumn()]
    started, embedded, index = time.perf_counter(), 0, done
    with Progress(*columns, console=console, transient=True) as progress:
        task = progress.add_task("cache", total=total, completed=min(start, total), rate="")
        while batch := _next_chunk(stream, chunk_rows):
            _write_chunk(chunks, index, *_embed_chunk(tower, batch, views, plain))
            if on_chunk is not None:
                on_chunk(index)
            index += 1
            embedded += len(batch)
            rate = embedded / max(time.perf_counter() - started, 1e-9)
            progress.update(task, completed=min(start + embedded, total), rate=f"{rate:.0f} img/s")
            if len(batch) < chunk_rows:
                break
    _assemble(entry, chunks, index, shards_dir, split)
    report = BuildReport(images=embedded, seconds=time.perf_counter() - started, resumed_chunks=done)
    reused = f", view 0 from {plain.path.name}" if plain is not None else ""
    console.print(f"cached {embedded} {split} image(s) x {views} view(s){reused} in {report.seconds:.1f}s "
                  f"({report.images_per_s:.0f} img/s) -> {entry}")
    return report


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


def ensure_feature_cache(tower: FrozenImageTower, shards_dir: str | Path, split: str, cfg: VisionConfig,
                         console: Console | None = None, *, views: int = 1, cache_dir: str | Path | None = None,
                         on_chunk: Callable[[int], None] | None = None) -> tuple[Path, BuildReport | None]:
    """The complete entry for this tower, split and views: reused when the fingerprint matches, else
    built (or an interrupted build continued), saying why. Returns (entry, report or None on a hit).

    A K-view entry also leaves the plain entry complete (its view 0); ``on_chunk`` sees only the
    chunks of the entry asked for."""
    console = console or Console(stderr=True)
    shards_dir = Path(shards_dir)
    fingerprint = feature_fingerprint(tower, shards_dir, split, views)
    root = cache_root(shards_dir, cfg, cache_dir)
    entry = root / fingerprint_digest(fingerprint)
    if entry_problem(entry, fingerprint) is None:
        console.print(f"reusing cached {split} features {entry}")
        return entry, None
    check_fits_in_memory(tower, cfg.batch_size)  # before anything is created or decoded
    plain = None
    if views > 1:  # built or reused before our lock is taken: one lock held at a time, never two
        plain = load_feature_cache(ensure_feature_cache(tower, shards_dir, split, cfg, console,
                                                        cache_dir=cache_dir)[0])
    try:
        entry.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise AlignError(f"cannot create the feature cache {entry}: {exc}",
                         "set vision.feature_cache=DIR to a folder you can write") from None
    with _EntryLock(entry, console):
        problem = entry_problem(entry, fingerprint)
        if problem is None:  # another process finished it while we waited
            console.print(f"reusing cached {split} features {entry}")
            return entry, None
        _clear_or_explain(entry, root, fingerprint, problem, console)
        report = _build(entry, tower, shards_dir, split, cfg, views, fingerprint, console, on_chunk, plain)
    return entry, report


def image_features(tower: FrozenImageTower, shards_dir: str | Path, split: str, cfg: VisionConfig,
                   console: Console | None = None, *, views: int = 1, cache_dir: str | Path | None = None,
                   on_chunk: Callable[[int], None] | None = None) -> FeatureSet:
    """One split's frozen features from the cache (built on a miss), row i for ``keys[i]``.

    ``views`` > 1 also caches augmented views (training only; evaluation wants the plain one).
    Images that fail to decode are skipped, counted and reported; callers align tables with ``keys``.
    """
    console = console or Console(stderr=True)
    entry, report = ensure_feature_cache(tower, shards_dir, split, cfg, console, views=views,
                                         cache_dir=cache_dir, on_chunk=on_chunk)
    feats = load_feature_cache(entry)
    feats.build = report
    if feats.skipped:
        console.print(f"[yellow]skipped {len(feats.skipped)} {split} image(s) that failed to decode: "
                      f"{', '.join(feats.skipped[:5])}{' ...' if len(feats.skipped) > 5 else ''}")
    return feats
