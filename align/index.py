"""Gallery index and text search: ``align index`` and ``align query``.

An index folder holds the gallery's image embeddings from the export's frozen tower:

    INDEX/embeddings.npy   (N, D) float32, every row L2-normalised (memory-mapped when searched)
    INDEX/keys.txt         N lines, row i's key (packed sample key, or path relative to the folder)
    INDEX/index.json       the export it belongs to, the image-side fingerprint, how it was built

The gallery is embedded with the frozen tower (a packed folder goes through the feature cache, so a
gallery that was already embedded for training or evaluation costs no forward pass), or embeddings
the team already has are adopted after two checks: their width, and on a sample of images, that
they equal the tower's own output. Search is exact inner product (cosine, rows are unit length):
numpy by default, faiss ``IndexFlatIP`` for large galleries; both return the same top-k.
"""
from __future__ import annotations

import contextlib
import shutil
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
import torch
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from . import artifacts as A
from .api import AlignedModel, check_image_side_matches, load, open_rgb, read_json
from .errors import AlignError, DataError, FingerprintMismatch
from .fileio import check_output_dir, open_permissions, swap_dir_in, write_json_atomic

FORMAT_VERSION = 1
FAISS_AUTO_ROWS = 100_000  # above this many images "auto" searches with faiss (common practice: exact flat IP)
ADOPT_SAMPLE = 8  # images re-embedded to check adopted embeddings
# float16 storage of unit vectors moves the cosine by ~1e-7 and channels_last by ~1e-7; another input size
# moves it far more (measured on demo tiles: the same tower at 112 px instead of 96 px gave 0.82-0.92)
ADOPT_MIN_COSINE = 0.999
FOLDER_SUFFIXES = (".jpg", ".jpeg", ".png", ".webp", ".bmp", ".tif", ".tiff")
QUERY_CHUNK = 256  # queries scored at once: bounds the (Q, N) score matrix
# below this many multiply-adds, scoring runs on one BLAS thread: waking more costs more than it saves
# (measured on 2 busy cores, 2,124 x 1280 gallery, one query: 0.6 ms on one thread, 11.6 ms on two)
ONE_THREAD_MACS = 1 << 25


# ---------------------------------------------------------------------------------------------
# search


_THREADPOOLS = None


def _blas_threads(limit: int | None):
    """A context that caps numpy's BLAS threads (threadpoolctl ships with scikit-learn); no-op without it."""
    global _THREADPOOLS
    if limit is None:
        return contextlib.nullcontext()
    if _THREADPOOLS is None:
        try:
            from threadpoolctl import ThreadpoolController
            _THREADPOOLS = ThreadpoolController()
        except ImportError:
            _THREADPOOLS = False
    return _THREADPOOLS.limit(limits=limit, user_api="blas") if _THREADPOOLS else contextlib.nullcontext()


def top_k_numpy(gallery: np.ndarray, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Exact inner-product top-k: (Q, k) scores, descending, and (Q, k) gallery rows.

    Equal scores are ordered by row, so the result does not depend on the partition's internals.
    """
    n = gallery.shape[0]
    k = min(k, n)
    all_scores, all_rows = [], []
    for start in range(0, len(queries), QUERY_CHUNK):
        chunk = queries[start:start + QUERY_CHUNK]
        with _blas_threads(1 if chunk.shape[0] * gallery.shape[0] * gallery.shape[1] <= ONE_THREAD_MACS else None):
            scores = chunk @ gallery.T  # (q, N)
        rows = np.argpartition(-scores, k - 1, axis=1)[:, :k] if k < n else np.tile(np.arange(n), (len(scores), 1))
        picked = np.take_along_axis(scores, rows, axis=1)  # (q, k)
        order = np.lexsort((rows, -picked), axis=-1)  # score descending, then row ascending
        all_rows.append(np.take_along_axis(rows, order, axis=1))
        all_scores.append(np.take_along_axis(picked, order, axis=1))
    return np.concatenate(all_scores), np.concatenate(all_rows)


def _faiss():
    try:
        import faiss
    except ImportError:
        raise AlignError("faiss is not installed", "pip install faiss-cpu, or search with the numpy backend") from None
    return faiss


def faiss_flat_index(gallery: np.ndarray):
    """An exact inner-product faiss index over the gallery (it holds its own float32 copy)."""
    faiss = _faiss()
    index = faiss.IndexFlatIP(gallery.shape[1])
    for start in range(0, gallery.shape[0], 65536):  # copy in slices: a memory map is never read whole at once
        index.add(np.ascontiguousarray(gallery[start:start + 65536], dtype=np.float32))
    return index


def top_k_faiss(index, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    k = min(k, index.ntotal)
    scores, rows = index.search(np.ascontiguousarray(queries, dtype=np.float32), k)  # (Q, k) each
    return scores, rows


def choose_backend(rows: int, backend: str = "auto", faiss_above: int = FAISS_AUTO_ROWS) -> str:
    if backend not in ("auto", "numpy", "faiss"):
        raise AlignError(f"unknown search backend {backend!r}", "use auto, numpy or faiss")
    if backend == "auto":
        return "faiss" if rows >= faiss_above else "numpy"
    return backend


@dataclass
class GalleryIndex:
    """An index folder, loaded: keys and their unit-length embeddings."""

    folder: Path
    info: dict
    keys: list[str]
    embeddings: np.ndarray  # (N, D) float32, memory-mapped
    _faiss_index: object = field(default=None, repr=False)

    def __len__(self) -> int:
        return len(self.keys)

    def search(self, queries: np.ndarray, k: int = 10, backend: str = "auto",
               faiss_above: int = FAISS_AUTO_ROWS) -> tuple[list[list[dict]], str]:
        """Top-k of every query row (Q, D): lists of {rank, key, score}; and the backend used."""
        if k < 1:
            raise AlignError(f"-k must be at least 1, got {k}")
        queries = np.atleast_2d(np.asarray(queries, dtype=np.float32))
        if queries.shape[1] != self.embeddings.shape[1]:
            raise AlignError(f"queries are {queries.shape[1]}-wide but the index holds "
                             f"{self.embeddings.shape[1]}-wide embeddings", "embed queries with the index's export")
        used = choose_backend(len(self), backend, faiss_above)
        if used == "faiss":
            if self._faiss_index is None:
                self._faiss_index = faiss_flat_index(self.embeddings)
            scores, rows = top_k_faiss(self._faiss_index, queries, k)
        else:
            scores, rows = top_k_numpy(self.embeddings, queries, k)
        results = [[{"rank": r + 1, "key": self.keys[int(row)], "score": float(score)}
                    for r, (row, score) in enumerate(zip(row_list, score_list))]
                   for row_list, score_list in zip(rows, scores)]
        return results, used


def query_answer(index: GalleryIndex, texts: Sequence[str], queries: np.ndarray, k: int, backend: str,
                 started: float, source: dict, faiss_above: int = FAISS_AUTO_ROWS) -> dict:
    """The answer to a text search, one record for ``align query`` and the service's ``/search``.

    ``queries`` (Q, D) are the embedded ``texts``; ``source`` names what answered (``{"index": folder}``
    or ``{"export": name}``); ``started`` is the ``time.perf_counter()`` the timing counts from.
    Returns ``{**source, backend, gallery_size, elapsed_ms, queries: [{text, results: [{rank, key, score}]}]}``.
    """
    results, used = index.search(queries, k, backend, faiss_above)
    return {**source, "backend": used, "gallery_size": len(index),
            "elapsed_ms": round(1000 * (time.perf_counter() - started), 2),
            "queries": [{"text": t, "results": r} for t, r in zip(texts, results)]}


def load_index(folder: str | Path) -> GalleryIndex:
    folder = Path(folder)
    hint = "build it with `align index EXPORT_DIR SOURCE --out INDEX`"
    if not folder.is_dir():
        raise AlignError(f"no index at {folder}", hint)
    info = read_json(folder / A.INDEX_INFO, "gallery index", hint)
    embeddings = np.load(folder / A.INDEX_EMBEDDINGS, mmap_mode="r")  # (N, D) float32
    keys = (folder / A.INDEX_KEYS).read_text(encoding="utf-8").split("\n")[:-1]
    if len(keys) != embeddings.shape[0] or embeddings.shape[0] != info.get("count"):
        raise AlignError(f"{folder} is damaged: {len(keys)} keys for {embeddings.shape[0]} embeddings", hint + " again")
    return GalleryIndex(folder, info, keys, embeddings)


class GallerySearch:
    """An index and the text side of its export, loaded once, for answering many queries."""

    def __init__(self, index_dir: str | Path, export_dir: str | Path | None = None):
        self.index = load_index(index_dir)
        export_dir = Path(export_dir or self.index.info["export_dir"])
        if not export_dir.is_dir():
            raise AlignError(f"the index's export {export_dir} is not there",
                             "pass --export DIR (the export the index was built with)")
        check_image_side_matches(export_dir, self.index.info["image_fingerprint"])
        self.model: AlignedModel = load(export_dir, image_tower=False)  # queries need only the text side

    def query(self, texts: Sequence[str], k: int = 10, backend: str = "auto",
              faiss_above: int = FAISS_AUTO_ROWS) -> dict:
        started = time.perf_counter()
        return query_answer(self.index, texts, self.model.embed_text(list(texts)), k, backend, started,
                            {"index": str(self.index.folder)}, faiss_above)


def query_index(index_dir: str | Path, texts: Sequence[str], k: int = 10, backend: str = "auto",
                export_dir: str | Path | None = None) -> dict:
    return GallerySearch(index_dir, export_dir).query(texts, k, backend)


# ---------------------------------------------------------------------------------------------
# building


def _is_packed(source: Path) -> bool:
    return (source / A.MANIFEST).is_file()


def folder_images(source: Path) -> list[str]:
    """Image files under a folder, as sorted POSIX paths relative to it (the index keys)."""
    found = [p.relative_to(source).as_posix() for p in source.rglob("*")
             if p.is_file() and p.suffix.lower() in FOLDER_SUFFIXES and not p.name.startswith(".")]
    return sorted(k for k in found if "\n" not in k)


def _progress(console: Console, what: str) -> Progress:
    return Progress(TextColumn(f"[bold]{what}"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                    console=console, transient=True)


def embed_folder(model: AlignedModel, source: Path, console: Console, batch_size: int = 64):
    """Embed every image of a plain folder; undecodable ones are skipped, counted and reported."""
    tower = model.image_tower
    keys = folder_images(source)
    if not keys:
        raise DataError(f"no images in {source}", f"put {', '.join(FOLDER_SUFFIXES)} files there, or pass a packed folder")
    kept, skipped, chunks, batch = [], [], [], []
    with _progress(console, "embedding gallery") as progress:
        task = progress.add_task("embed", total=len(keys))
        for key in keys:
            try:
                batch.append(tower.preprocess(open_rgb(source / key)))
                kept.append(key)
            except AlignError:
                skipped.append(key)
            if len(batch) == batch_size:
                chunks.append(tower.embed_pixels(torch.stack(batch)).numpy())  # (b, D)
                batch.clear()
            progress.advance(task)
        if batch:
            chunks.append(tower.embed_pixels(torch.stack(batch)).numpy())
    return kept, (np.concatenate(chunks) if chunks else np.zeros((0, tower.feature_dim), np.float32)), skipped


def embed_packed(model: AlignedModel, source: Path, console: Console):
    """Every split of a packed folder, through the feature cache (no forward pass when it is warm)."""
    from .data.shards import read_manifest
    from .features import image_features

    cfg = model.vision_config
    keys, chunks, skipped = [], [], []
    for split, info in read_manifest(source)["splits"].items():
        if not info["samples"]:
            continue
        feats = image_features(model.image_tower, source, split, cfg, console)
        keys += feats.keys
        skipped += feats.skipped
        chunks.append(feats.embeddings.float().numpy())
    return keys, np.concatenate(chunks).astype(np.float32), skipped


def images_for_keys(source: Path, keys: list[str]) -> dict[str, object]:
    """The source image of each key (a packed sample key, or a path relative to a folder)."""
    wanted, found = set(keys), {}
    if _is_packed(source):
        from .data.shards import iter_images, read_manifest

        for split, info in read_manifest(source)["splits"].items():
            if not info["samples"] or len(found) == len(wanted):
                continue
            for key, image in iter_images(source, split):
                if key in wanted:
                    found[key] = image
                    if len(found) == len(wanted):
                        break
    else:
        stems = {}
        for rel in folder_images(source):
            stems.setdefault(rel.rsplit(".", 1)[0], []).append(rel)
        for key in keys:
            path = source / key
            if not path.is_file() and len(stems.get(key, [])) == 1:
                path = source / stems[key][0]  # keys written without the file extension
            if path.is_file():
                found[key] = open_rgb(path)
    missing = [k for k in keys if k not in found]
    if missing:
        raise DataError(f"{len(missing)} of the sampled keys have no image in {source}: {', '.join(missing[:3])}",
                        "SOURCE must hold the images the embeddings were made from, under the same keys "
                        "(packed sample keys, or paths relative to the folder)")
    return found


def _read_keys(path: Path, rows: int) -> list[str]:
    if not path.is_file():
        raise DataError(f"no keys file at {path}", "pass --keys FILE.txt with one key per line, in row order")
    keys = path.read_text(encoding="utf-8").splitlines()
    if keys and keys[-1] == "":
        keys = keys[:-1]
    if len(keys) != rows:
        raise DataError(f"{path} has {len(keys)} keys for {rows} embedding rows",
                        "the keys file needs exactly one line per row of the embeddings, in the same order")
    if len(set(keys)) != len(keys):
        raise DataError(f"{path} repeats keys", "every image needs its own key")
    return keys


def adopt_embeddings(model: AlignedModel, source: Path, embeddings_path: Path, keys_path: Path,
                     sample: int = ADOPT_SAMPLE, console: Console | None = None):
    """Check a team's stored embeddings against the export's tower; return (keys, unit rows)."""
    dim = model.embedding_dim
    try:
        stored = np.load(embeddings_path, mmap_mode="r")
    except (OSError, ValueError) as exc:
        raise DataError(f"cannot read {embeddings_path} as a .npy array ({exc})",
                        "save the embeddings with numpy.save as an (N, D) float array") from None
    if stored.ndim != 2 or not np.issubdtype(stored.dtype, np.floating):
        raise DataError(f"{embeddings_path} holds a {stored.dtype} array of shape {stored.shape}, not (N, D) floats",
                        "save the embeddings with numpy.save as an (N, D) float array")
    tower_name = model.image_side["model"]
    if stored.shape[1] != dim:
        raise FingerprintMismatch(
            f"{embeddings_path} holds {stored.shape[1]}-wide embeddings but this export's image tower "
            f"({tower_name}) gives {dim}-wide ones: they come from another tower",
            "index SOURCE without --embeddings to embed it with the export's tower")
    keys = _read_keys(keys_path, stored.shape[0])
    rng = np.random.default_rng(0)
    picked = np.sort(rng.choice(len(keys), size=min(sample, len(keys)), replace=False))
    images = images_for_keys(source, [keys[i] for i in picked])
    tower = model.image_tower
    pixels = torch.stack([tower.preprocess(images[keys[i]]) for i in picked])
    own = tower.embed_pixels(pixels).numpy()  # (s, D)
    theirs = np.asarray(stored[picked], dtype=np.float64)
    norms = np.linalg.norm(theirs, axis=1, keepdims=True)
    cosine = ((theirs / np.maximum(norms, 1e-12)) * own).sum(1)  # (s,)
    if not np.isfinite(cosine).all() or cosine.min() < ADOPT_MIN_COSINE:
        bad = int((~(cosine >= ADOPT_MIN_COSINE)).sum())
        raise FingerprintMismatch(
            f"the embeddings in {embeddings_path} are not this export's image tower's output: on {bad} of "
            f"{len(picked)} sampled images the cosine with the tower's own embedding is below {ADOPT_MIN_COSINE} "
            f"(lowest {np.nanmin(cosine):.4f}, median {np.nanmedian(cosine):.4f})",
            f"they were made by another tower, other weights or other preprocessing (this export needs "
            f"{tower_name}, weights sha256 {model.image_side['weights_sha256'][:12]}…, input "
            f"{model.image_side['preprocessing']['input_size']}), or the keys file is out of order; index "
            "SOURCE without --embeddings to embed it with the export's tower")
    if console is not None:
        console.print(f"adopted embeddings match the tower on {len(picked)} sampled images "
                      f"(lowest cosine {cosine.min():.6f})")
    return keys, stored


def _write_unit_rows(path: Path, rows: np.ndarray) -> None:
    """Save (N, D) as float32 with every row L2-normalised, in slices (a memory map is never read whole)."""
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=rows.shape)
    for start in range(0, rows.shape[0], 65536):
        block = np.asarray(rows[start:start + 65536], dtype=np.float64)
        norms = np.linalg.norm(block, axis=1, keepdims=True)
        if not np.isfinite(block).all() or (norms == 0).any():
            raise DataError(f"embedding rows {start}..{start + len(block) - 1} hold zeros or non-finite values",
                            "remove or re-embed those images")
        out[start:start + len(block)] = block / norms
    out.flush()
    del out


def build_index(export_dir: str | Path, source: str | Path, out: str | Path, *, weights: str | Path | None = None,
                embeddings: str | Path | None = None, keys: str | Path | None = None, sample: int = ADOPT_SAMPLE,
                console: Console | None = None) -> dict:
    """Embed (or adopt) a gallery for ``export_dir`` into the index folder ``out``; returns index.json."""
    console = console or Console(stderr=True)
    started = time.perf_counter()
    export_dir, source, out = Path(export_dir), Path(source), Path(out)
    check_output_dir(out, A.INDEX_INFO, "index")
    if not source.is_dir():
        raise DataError(f"no gallery folder at {source}", "pass a folder of images or a folder written by `align pack`")
    if (embeddings is None) != (keys is None):
        raise AlignError("--embeddings and --keys go together", "pass both to adopt stored embeddings, or neither")
    model = load(export_dir, weights=weights)  # refuses a tower whose fingerprint differs from the export's
    skipped: list[str] = []
    if embeddings is not None:
        row_keys, rows = adopt_embeddings(model, source, Path(embeddings), Path(keys), sample, console)
        how = {"built": "adopted", "embeddings_file": str(Path(embeddings).resolve()), "checked_sample": min(sample, len(row_keys))}
    elif _is_packed(source):
        row_keys, rows, skipped = embed_packed(model, source, console)
        how = {"built": "embedded", "source_kind": "packed"}
    else:
        row_keys, rows, skipped = embed_folder(model, source, console)
        how = {"built": "embedded", "source_kind": "folder"}
    if skipped:
        console.print(f"[yellow]skipped {len(skipped)} image(s) that failed to decode: {', '.join(skipped[:5])}"
                      f"{' ...' if len(skipped) > 5 else ''}")
    if not row_keys:
        raise DataError(f"no usable images in {source}")

    out.parent.mkdir(parents=True, exist_ok=True)
    temp = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.partial-"))
    try:
        _write_unit_rows(temp / A.INDEX_EMBEDDINGS, rows)
        (temp / A.INDEX_KEYS).write_text("".join(k + "\n" for k in row_keys), encoding="utf-8")
        info = {"format_version": FORMAT_VERSION, "export_dir": str(export_dir.resolve()),
                "source": str(source.resolve()), "count": len(row_keys), "dim": int(rows.shape[1]),
                "dtype": "float32", "normalised": "l2", "image_fingerprint": model.image_tower.fingerprint,
                "skipped": skipped, **how, "tower_forward_passes": model.image_tower.forward_passes,
                "seconds": round(time.perf_counter() - started, 2)}
        write_json_atomic(temp / A.INDEX_INFO, info)
        open_permissions(temp)  # temporary files are private; an index is meant to be shared
        swap_dir_in(temp, out)
    except BaseException:
        shutil.rmtree(temp, ignore_errors=True)
        raise
    console.print(f"[green]indexed[/green] {info['count']} images ({how['built']}) into {out} "
                  f"in {info['seconds']:.1f}s")
    return info
