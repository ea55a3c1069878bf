"""Frozen image features, cached on disk: the tower runs once per image and fingerprint, never per step.

A cache entry is a folder ``<root>/<digest>/`` named by a hash of its fingerprint, which records
everything the numbers depend on: the tower's weights sha256, its preprocessing (size, crop, mean,
std, interpolation), the pooling and normalisation, the split and its content hash from the packed
manifest, and the number of views with their augmentation. An entry holds

- ``fingerprint.json``: the fingerprint (written first: it is the entry's identity);
- ``keys.txt``: one sample key per row, the split's canonical order minus images that failed to decode;
- ``skipped.txt``: the keys whose image failed to decode;
- ``features.f16``: float16 rows of shape (N, K, D), read back as a read-only memory map. It is
  written last, so an entry that has it is complete.

A build embeds one chunk of ``vision.batch_size`` samples at a time and writes each finished chunk to
``chunks/`` under a temporary name, renamed into place; an interrupted build keeps those chunks and
the next call continues after them. Every chunk is computed from the same batch of images whether
the build ran in one go or not, so the assembled file is byte-identical either way.

Views: view 0 is the tower's own (evaluation) preprocessing; views 1..K-1 are random resized crops
with horizontal flips from timm's training transform, each seeded by (key, view) so a rebuild gives
the same numbers. Training shows one view per row per epoch (``ViewSchedule``).
"""
from __future__ import annotations

import fcntl
import hashlib
import json
import os
import random
import shutil
import time
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Callable, Iterator

import numpy as np
import torch
import torch.nn.functional as F
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from . import artifacts as A
from .data.shards import decode_image, iter_image_bytes, load_table, read_manifest
from .errors import AlignError, DataError
from .recipe import VisionConfig
from .vision import FrozenImageTower

FORMAT_VERSION = 1
# Crops keep at least half the picture: a caption describes the whole image, and ImageNet's usual
# (0.08, 1) range can cut away what it names. No colour jitter: colour is often what a caption says.
AUGMENTATION = {"transform": "timm create_transform(is_training=True)", "scale": [0.5, 1.0],
                "ratio": [0.75, 4.0 / 3.0], "hflip": 0.5, "color_jitter": None, "seed": 0,
                "view_0": "the tower's evaluation preprocessing"}


# ---------------------------------------------------------------------------------------------
# fingerprints


def _canonical(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def feature_fingerprint(tower: FrozenImageTower, shards_dir: str | Path, split: str, views: int = 1) -> dict:
    """Everything the cached numbers depend on; equal fingerprints mean interchangeable caches."""
    info = read_manifest(shards_dir)["splits"].get(split)
    if info is None:
        raise DataError(f"split '{split}' is not in {shards_dir}", hint="use train or val")
    return {"format_version": FORMAT_VERSION, "tower": tower.fingerprint, "split": split,
            "split_content_hash": info["content_hash"], "split_samples": info["samples"], "views": views,
            "augmentation": AUGMENTATION if views > 1 else None, "dtype": "float16"}


def fingerprint_digest(fingerprint: dict) -> str:
    return hashlib.sha256(_canonical(fingerprint).encode("utf-8")).hexdigest()[:20]


def _short(value) -> str:
    text = json.dumps(value, ensure_ascii=False)
    return text[:14] + '…"' if isinstance(value, str) and len(value) > 40 else text


def fingerprint_changes(old: dict, new: dict, prefix: str = "") -> list[str]:
    """Dotted paths of the fields that differ, with both values: ``tower.preprocessing.input_size: ...``."""
    changes = []
    for key in sorted(set(old) | set(new)):
        a, b = old.get(key, "<absent>"), new.get(key, "<absent>")
        if isinstance(a, dict) and isinstance(b, dict):
            changes += fingerprint_changes(a, b, f"{prefix}{key}.")
        elif a != b:
            changes.append(f"{prefix}{key}: {_short(a)} -> {_short(b)}")
    return changes


def cache_root(shards_dir: str | Path, cfg: VisionConfig, override: str | Path | None = None) -> Path:
    """Where entries live: an explicit folder, ``vision.feature_cache``, or features/ in the shards folder."""
    return Path(override or cfg.feature_cache or Path(shards_dir) / A.FEATURE_ROOT)


# ---------------------------------------------------------------------------------------------
# the loaded cache


@dataclass
class BuildReport:
    images: int  # images embedded by this call (a resumed build counts only the rest)
    seconds: float
    resumed_chunks: int  # chunks an interrupted build had already finished

    @property
    def images_per_s(self) -> float:
        return self.images / max(self.seconds, 1e-9)


@dataclass
class FeatureSet:
    """One split's cached features: row i belongs to ``keys[i]``."""

    keys: list[str]
    array: np.ndarray  # (N, K, D) float16, a read-only memory map of features.f16
    skipped: list[str] = field(default_factory=list)
    fingerprint: dict = field(default_factory=dict)
    path: Path | None = None
    build: BuildReport | None = None  # set when this call ran the tower

    @property
    def views(self) -> int:
        return int(self.array.shape[1])

    @cached_property
    def embeddings(self) -> torch.Tensor:
        """View 0 (the plain preprocessing) as float32, re-normalised after the float16 round trip. (N, D)"""
        return F.normalize(torch.from_numpy(np.asarray(self.array[:, 0], dtype=np.float32)), dim=-1)

    def _index(self, keys: list[str]) -> np.ndarray:
        where = {k: i for i, k in enumerate(self.keys)}
        missing = [k for k in keys if k not in where]
        if missing:
            raise DataError(f"{len(missing)} key(s) have no cached feature, e.g. {missing[0]}",
                            hint="the table and the cache disagree; rebuild with `align features RECIPE`")
        return np.array([where[k] for k in keys], dtype=np.int64)

    def rows_for(self, keys: list[str]) -> torch.Tensor:
        """View-0 rows for ``keys``, in that order. (n, D) float32"""
        return self.embeddings[torch.from_numpy(self._index(keys))]

    def view_rows_for(self, keys: list[str]) -> torch.Tensor:
        """Every view for ``keys``, in that order, kept in float16 to halve memory. (n, K, D)"""
        return torch.from_numpy(np.ascontiguousarray(self.array[self._index(keys)]))


def load_feature_cache(entry: str | Path) -> FeatureSet:
    """Open a complete entry; AlignError when it is incomplete or damaged."""
    entry = Path(entry)
    problem = _entry_problem(entry)
    if problem:
        raise AlignError(f"feature cache {entry} is unusable: {problem}",
                         "delete that folder, or run `align features RECIPE` to rebuild it")
    fingerprint = json.loads((entry / A.FINGERPRINT).read_text(encoding="utf-8"))
    keys = _read_lines(entry / A.FEATURE_KEYS)
    shape = (len(keys), fingerprint["views"], fingerprint["tower"]["feature_dim"])
    array = (np.memmap(entry / A.FEATURES, dtype=np.float16, mode="r", shape=shape) if keys
             else np.zeros(shape, dtype=np.float16))
    return FeatureSet(keys=keys, array=array, skipped=_read_lines(entry / A.FEATURE_SKIPPED),
                      fingerprint=fingerprint, path=entry)


def _read_lines(path: Path) -> list[str]:
    return [line for line in path.read_text(encoding="utf-8").split("\n") if line] if path.is_file() else []


def _entry_problem(entry: Path, expected: dict | None = None) -> str | None:
    """Why an entry cannot be used as it stands (None = complete and consistent)."""
    if not (entry / A.FINGERPRINT).is_file():
        return f"no {A.FINGERPRINT}"
    try:
        stored = json.loads((entry / A.FINGERPRINT).read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        return f"{A.FINGERPRINT} is not valid JSON"
    if expected is not None and stored != expected:
        return "its fingerprint differs: " + "; ".join(fingerprint_changes(stored, expected))
    if not (entry / A.FEATURES).is_file() or not (entry / A.FEATURE_KEYS).is_file():
        return "the build did not finish"
    rows = len(_read_lines(entry / A.FEATURE_KEYS))
    want = rows * stored["views"] * stored["tower"]["feature_dim"] * 2
    have = (entry / A.FEATURES).stat().st_size
    if have != want:
        return f"{A.FEATURES} holds {have} bytes, {rows} keys need {want}"
    return None


# ---------------------------------------------------------------------------------------------
# decoding (in the main process or in DataLoader workers)


def _view_seed(key: str, view: int) -> int:
    digest = hashlib.sha256(f"{AUGMENTATION['seed']}|{key}|{view}".encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "little")


def training_transform(preprocessing: dict):
    """timm's training transform at the tower's size, mean, std and interpolation (crop + flip only)."""
    import timm.data

    return timm.data.create_transform(
        input_size=preprocessing["input_size"], is_training=True, scale=tuple(AUGMENTATION["scale"]),
        ratio=tuple(AUGMENTATION["ratio"]), hflip=AUGMENTATION["hflip"], color_jitter=None,
        interpolation=preprocessing.get("interpolation", "bilinear"), mean=preprocessing["mean"],
        std=preprocessing["std"])


def augmented_view(transform, image, key: str, view: int) -> torch.Tensor:
    """One augmented view, seeded by (key, view); the caller's random state is left as it was."""
    seed = _view_seed(key, view)
    python_state = random.getstate()  # timm's crop draws from python's random, the flip from torch's
    try:
        with torch.random.fork_rng(devices=[]):
            random.seed(seed)
            torch.manual_seed(seed)
            return transform(image)  # (3, H, W)
    finally:
        random.setstate(python_state)


class _DecodedSamples(torch.utils.data.IterableDataset):
    """(key, pixels (K, 3, H, W) or None when the image fails to decode), in canonical order from ``start``.

    With W workers, worker w takes positions start+w, start+w+W, ...; the DataLoader reads workers
    round-robin, so the stream comes back in canonical order. A failed image still yields a record
    (with None), which keeps the round-robin aligned.
    """

    def __init__(self, shards_dir: Path, split: str, start: int, plain, augment, views: int):
        self.shards_dir, self.split, self.start = shards_dir, split, start
        self.plain, self.augment, self.views = plain, augment, views

    def prepare(self, key: str, data: bytes) -> torch.Tensor | None:
        try:
            image = decode_image(data)
        except Exception:  # PIL raises many types for damaged data
            return None
        views = [self.plain(image)] + [augmented_view(self.augment, image, key, v) for v in range(1, self.views)]
        return torch.stack(views)  # (K, 3, H, W)

    def __iter__(self) -> Iterator[tuple[str, torch.Tensor | None]]:
        info = torch.utils.data.get_worker_info()
        worker, workers = (info.id, info.num_workers) if info else (0, 1)
        for position, (key, data, _ext) in enumerate(iter_image_bytes(self.shards_dir, self.split)):
            if position >= self.start and (position - self.start) % workers == worker:
                yield key, self.prepare(key, data)


def _as_is(item):
    return item


def _one_thread(_worker_id: int) -> None:
    torch.set_num_threads(1)  # the tower owns the cores; a worker only decodes and resizes


def _decoded_stream(dataset: _DecodedSamples, workers: int):
    if workers <= 0:
        return iter(dataset)
    loader = torch.utils.data.DataLoader(dataset, batch_size=None, num_workers=workers, collate_fn=_as_is,
                                         worker_init_fn=_one_thread, prefetch_factor=8)
    return iter(loader)


# ---------------------------------------------------------------------------------------------
# building


def _write_atomic(path: Path, data: bytes) -> None:
    temp = path.with_name(f".{path.name}.{os.getpid()}.partial")
    temp.write_bytes(data)
    os.replace(temp, path)


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


def _assemble(entry: Path, chunks: Path, count: int, shards_dir: Path, split: str) -> None:
    """Concatenate the chunks in order into the final files; features.f16 goes last (completion)."""
    keys, failed = [], []
    temp = entry / f".{A.FEATURES}.{os.getpid()}.partial"
    with open(temp, "wb") as out:
        for index in range(count):
            with np.load(_chunk_path(chunks, index)) as chunk:
                out.write(np.ascontiguousarray(chunk["features"], dtype=np.float16).tobytes())
                keys += chunk["keys"].tolist()
                failed += chunk["failed"].tolist()
    seen = set(keys) | set(failed)
    failed += [k for k in load_table(shards_dir, split).keys if k not in seen]  # samples with no image member
    _write_atomic(entry / A.FEATURE_KEYS, "".join(k + "\n" for k in keys).encode("utf-8"))
    _write_atomic(entry / A.FEATURE_SKIPPED, "".join(k + "\n" for k in failed).encode("utf-8"))
    os.replace(temp, entry / A.FEATURES)
    shutil.rmtree(chunks, ignore_errors=True)


def _build(entry: Path, tower: FrozenImageTower, shards_dir: Path, split: str, cfg: VisionConfig, views: int,
           fingerprint: dict, console: Console, on_chunk: Callable[[int], None] | None) -> BuildReport:
    chunks = entry / A.FEATURE_CHUNKS
    chunks.mkdir(parents=True, exist_ok=True)
    _write_atomic(entry / A.FINGERPRINT, (json.dumps(fingerprint, indent=2, sort_keys=True) + "\n").encode("utf-8"))
    # the chunk size of the first attempt is kept, so a resumed build batches exactly as it did
    plan_path = chunks / "plan.json"
    if plan_path.is_file():
        chunk_rows = int(json.loads(plan_path.read_text(encoding="utf-8"))["chunk_rows"])
    else:
        chunk_rows = cfg.batch_size
        _write_atomic(plan_path, json.dumps({"chunk_rows": chunk_rows}).encode("utf-8"))
    done = _finished_chunks(chunks)
    start = done * chunk_rows
    total = fingerprint["split_samples"]
    if done:
        console.print(f"resuming the {split} feature build: {done} chunk(s) ({min(start, total)} images) "
                      "were finished before")
    import timm.data

    plain = timm.data.create_transform(**tower.preprocessing, is_training=False)
    augment = training_transform(tower.preprocessing) if views > 1 else None
    dataset = _DecodedSamples(shards_dir, split, start, plain, augment, views)
    stream = _decoded_stream(dataset, cfg.workers)  # workers start before the progress thread does

    columns = [TextColumn(f"[bold]caching {split} features"), BarColumn(), MofNCompleteColumn(),
               TextColumn("{task.fields[rate]}"), TimeRemainingColumn()]
    started, embedded, index = time.perf_counter(), 0, done
    with Progress(*columns, console=console, transient=True) as progress:
        task = progress.add_task("cache", total=total, completed=min(start, total), rate="")
        exhausted = False
        while not exhausted:
            batch: list[tuple[str, torch.Tensor | None]] = []
            for item in stream:
                batch.append(item)
                if len(batch) == chunk_rows:
                    break
            exhausted = len(batch) < chunk_rows
            if not batch:
                break
            good = [(key, pixels) for key, pixels in batch if pixels is not None]
            features = np.zeros((len(good), views, tower.feature_dim), dtype=np.float16)  # (n, K, D)
            if good:
                pixels = torch.stack([p for _, p in good])  # (n, K, 3, H, W)
                for view in range(views):
                    features[:, view] = tower.embed_pixels(pixels[:, view].contiguous()).to(torch.float16).numpy()
            _write_chunk(chunks, index, [k for k, _ in good], features, [k for k, p in batch if p is None])
            if on_chunk is not None:
                on_chunk(index)
            index += 1
            embedded += len(batch)
            rate = embedded / max(time.perf_counter() - started, 1e-9)
            progress.update(task, completed=min(start + embedded, total), rate=f"{rate:.0f} img/s")
    _assemble(entry, chunks, index, shards_dir, split)
    report = BuildReport(images=embedded, seconds=time.perf_counter() - started, resumed_chunks=done)
    console.print(f"cached {embedded} {split} image(s) x {views} view(s) in {report.seconds:.1f}s "
                  f"({report.images_per_s:.0f} img/s) -> {entry}")
    return report


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


def _closest_entry(root: Path, fingerprint: dict, skip: Path) -> tuple[Path, list[str]] | None:
    """The existing entry for the same split that differs in the fewest fields (to say what changed)."""
    best = None
    for candidate in sorted(root.iterdir()) if root.is_dir() else []:
        if candidate == skip or not (candidate / A.FINGERPRINT).is_file():
            continue
        try:
            other = json.loads((candidate / A.FINGERPRINT).read_text(encoding="utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError):
            continue
        if other.get("split") != fingerprint["split"]:
            continue
        changes = fingerprint_changes(other, fingerprint)
        rank = (len(changes), -(candidate / A.FINGERPRINT).stat().st_mtime)
        if best is None or rank < best[0]:
            best = (rank, candidate, changes)
    return (best[1], best[2]) if best else None


def ensure_feature_cache(tower: FrozenImageTower, shards_dir: str | Path, split: str, cfg: VisionConfig,
                         console: Console | None = None, *, views: int = 1, cache_dir: str | Path | None = None,
                         on_chunk: Callable[[int], None] | None = None) -> tuple[Path, BuildReport | None]:
    """The complete entry for this tower, split and views: reused when the fingerprint matches, else
    built (or an interrupted build continued), saying why. Returns (entry, report or None on a hit)."""
    console = console or Console(stderr=True)
    shards_dir = Path(shards_dir)
    fingerprint = feature_fingerprint(tower, shards_dir, split, views)
    root = cache_root(shards_dir, cfg, cache_dir)
    entry = root / fingerprint_digest(fingerprint)
    if _entry_problem(entry, fingerprint) is None:
        console.print(f"reusing cached {split} features {entry}")
        return entry, None
    try:
        entry.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise AlignError(f"cannot create the feature cache {entry}: {exc}",
                         "set vision.feature_cache=DIR to a folder you can write") from None
    with _EntryLock(entry, console):
        problem = _entry_problem(entry, fingerprint)
        if problem is None:  # another process finished it while we waited
            console.print(f"reusing cached {split} features {entry}")
            return entry, None
        if (entry / A.FINGERPRINT).is_file() and not problem.startswith("the build did not finish"):
            console.print(f"[yellow]rebuilding feature cache {entry}: {problem}")
            for name in (A.FEATURES, A.FEATURE_KEYS, A.FEATURE_SKIPPED):
                (entry / name).unlink(missing_ok=True)
            shutil.rmtree(entry / A.FEATURE_CHUNKS, ignore_errors=True)
        elif not (entry / A.FEATURE_CHUNKS).is_dir():
            closest = _closest_entry(root, fingerprint, skip=entry)
            if closest is None:
                console.print(f"no cached {split} features for this tower yet; building {entry}")
            else:
                console.print(f"[yellow]rebuilding {split} features into {entry.name}: the fingerprint changed "
                              f"since {closest[0].name} ({'; '.join(closest[1])})")
        report = _build(entry, tower, shards_dir, split, cfg, views, fingerprint, console, on_chunk)
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


# ---------------------------------------------------------------------------------------------
# training with several views


class ViewSchedule:
    """Which cached view each training row shows in each epoch.

    Drawn from (seed, epoch) alone, like the batch order, so a resumed run replays the same views.
    """

    def __init__(self, n: int, views: int, batch_size: int, seed: int):
        self.n, self.views, self.batch_size, self.seed = n, views, batch_size, seed
        self._epoch, self._choice = -1, torch.empty(0, dtype=torch.long)

    def _for_epoch(self, epoch: int) -> torch.Tensor:
        if epoch != self._epoch:
            generator = torch.Generator().manual_seed(self.seed * 1_000_003 + epoch + 7_777_777)
            self._epoch, self._choice = epoch, torch.randint(self.views, (self.n,), generator=generator)
        return self._choice  # (n,)

    def views_for(self, step: int, rows: torch.Tensor) -> torch.Tensor:
        """The view of each row of ``step``'s batch (``rows`` as the sampler gave them). (B,) long"""
        positions = torch.arange(step * self.batch_size, step * self.batch_size + len(rows))
        epochs = (positions // self.n).tolist()
        return torch.tensor([int(self._for_epoch(e)[int(r)]) for e, r in zip(epochs, rows.tolist())])


def view_batch(image_views: torch.Tensor, rows: torch.Tensor, views: torch.Tensor) -> torch.Tensor:
    """Pick one view per row from (N, K, D) float16 and return unit-norm float32. (B, D)"""
    return F.normalize(image_views[rows, views.to(rows.device)].float(), dim=-1)


# ---------------------------------------------------------------------------------------------
# ahead of training: `align features RECIPE`


def recipe_feature_sets(recipe) -> list[tuple[str, int]]:
    """(split, views) of every cache a recipe's training and evaluation will ask for."""
    wanted = [(recipe.data.train_split, recipe.vision.views), (recipe.data.eval_split, 1)]
    if recipe.vision.views > 1:
        wanted.append((recipe.data.train_split, 1))  # evaluate's linear probe reads the plain view
    return list(dict.fromkeys(wanted))


def build_recipe_features(recipe, console: Console | None = None) -> list[FeatureSet]:
    """Build (or reuse) every cache of ``recipe`` so training and evaluation start without the tower."""
    from .vision import load_image_tower

    console = console or Console(stderr=True)
    if not recipe.data.shards:
        raise AlignError("the recipe names no data", "pass --set data.shards=DIR (a folder written by `align pack`)")
    shards_dir = Path(recipe.data.shards)
    splits = read_manifest(shards_dir)["splits"]
    tower = load_image_tower(recipe.vision)
    sets = []
    for split, views in recipe_feature_sets(recipe):
        if not splits.get(split, {}).get("samples"):
            console.print(f"split '{split}' is empty; nothing to cache")
            continue
        sets.append(image_features(tower, shards_dir, split, recipe.vision, console, views=views))
    return sets
