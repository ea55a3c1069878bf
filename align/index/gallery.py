"""An index folder, loaded, and text search over it: ``align query`` and the service's ``/search``.

Backends: ``numpy`` and ``faiss`` (flat) are exact; ``ann`` is the folder's approximate index
(built by ``align index`` for large galleries, read from disk, never rebuilt here). ``auto`` takes the
approximate index when the folder has one, else numpy or faiss by size; ``exact`` never takes it.
A damaged or incomplete folder is refused with what is wrong and how to rebuild it, never a traceback.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from .. import artifacts as A
from ..api import AlignedModel, check_image_side_matches, load, read_json
from ..errors import AlignError
from .ann import ApproximateIndex, load_approximate
from .exact import FAISS_AUTO_ROWS, choose_exact_backend, faiss_flat_index, top_k_faiss, top_k_numpy
from .filters import LabelTable, normalise_where
from .parquet import read_gallery_parquet

BACKENDS = ("auto", "exact", "numpy", "faiss", "ann")
_REBUILD = "build it again with `align index EXPORT_DIR SOURCE --out INDEX`"


@dataclass
class GalleryIndex:
    """An index folder, loaded: keys, their unit-length embeddings and their labels."""

    folder: Path
    info: dict
    keys: list[str]
    embeddings: np.ndarray  # (N, D) float32, memory-mapped (or read from the Parquet file)
    labels: LabelTable = None
    _flat: object = field(default=None, repr=False)
    _approximate: ApproximateIndex | None = field(default=None, repr=False)

    def __post_init__(self):
        if self.labels is None:
            self.labels = LabelTable.empty(len(self.keys))

    def __len__(self) -> int:
        return len(self.keys)

    @property
    def has_approximate(self) -> bool:
        return bool(self.info.get("approximate"))

    def backend_for(self, backend: str, faiss_above: int = FAISS_AUTO_ROWS) -> str:
        if backend not in BACKENDS:
            raise AlignError(f"unknown search backend {backend!r}", f"use one of {', '.join(BACKENDS)}")
        if backend == "ann" and not self.has_approximate:
            raise AlignError(f"{self.folder} has no approximate index",
                             "build one with `align index ... --ann yes`, or search exactly (--exact)")
        if backend == "auto" and self.has_approximate:
            return "ann"
        return "ann" if backend == "ann" else choose_exact_backend(len(self), backend, faiss_above)

    def approximate(self) -> ApproximateIndex:
        """The on-disk approximate index, read (memory-mapped) on first use."""
        if self._approximate is None:
            path = self.folder / A.INDEX_ANN
            if not path.is_file():
                raise AlignError(f"{path} is missing though index.json lists it", f"{_REBUILD}, or query with --exact")
            try:
                self._approximate = load_approximate(path, int(self.info["approximate"]["nprobe"]), len(self))
            except (RuntimeError, ValueError) as exc:
                raise AlignError(f"{path} is damaged ({str(exc).splitlines()[0][:200]})",
                                 f"{_REBUILD}, or query with --exact") from None
        return self._approximate

    def search(self, queries: np.ndarray, k: int = 10, backend: str = "auto", faiss_above: int = FAISS_AUTO_ROWS,
               allowed: np.ndarray | None = None) -> tuple[list[list[dict]], str]:
        """Top-k of every query row (Q, D) among the ``allowed`` rows (all when None): lists of
        {rank, key, score}, and the backend used. A score that is not finite is given as None."""
        if k < 1:
            raise AlignError(f"-k must be at least 1, got {k}")
        queries = np.atleast_2d(np.asarray(queries, dtype=np.float32))
        if queries.shape[1] != self.embeddings.shape[1]:
            raise AlignError(f"queries are {queries.shape[1]}-wide but the index holds "
                             f"{self.embeddings.shape[1]}-wide embeddings", "embed queries with the index's export")
        used = self.backend_for(backend, faiss_above)
        if used == "ann":
            scores, rows = self.approximate().search(self.embeddings, queries, k, allowed)
        elif used == "faiss":
            if self._flat is None:
                self._flat = faiss_flat_index(self.embeddings)
            scores, rows = top_k_faiss(self._flat, queries, k, allowed)
        else:
            scores, rows = top_k_numpy(self.embeddings, queries, k, allowed)
        results = []
        for row_list, score_list in zip(rows.tolist(), scores.tolist()):
            hits = [(row, score) for row, score in zip(row_list, score_list) if row >= 0]
            results.append([{"rank": r + 1, "key": self.keys[row], "score": score if math.isfinite(score) else None}
                            for r, (row, score) in enumerate(hits)])
        return results, used


def query_answer(index: GalleryIndex, texts: Sequence[str], queries: np.ndarray, k: int, backend: str,
                 started: float, source: dict, faiss_above: int = FAISS_AUTO_ROWS,
                 where: Mapping[str, str | Sequence[str]] | None = None) -> dict:
    """The answer to a text search, one record for ``align query`` and the service's ``/search``.

    ``queries`` (Q, D) are the embedded ``texts``; ``source`` names what answered (``{"index": folder}``
    or ``{"export": name}``); ``started`` is the ``time.perf_counter()`` the timing counts from;
    ``where`` keeps the samples whose labels match (``{"glaze": "cobalt"}``, a list of values for any of them).
    Returns ``{**source, backend, gallery_size, elapsed_ms, [filter: {where, matching}],
    queries: [{text, results: [{rank, key, score}]}]}``; every number in it is finite or None.
    """
    queries = np.atleast_2d(np.asarray(queries, dtype=np.float32))
    broken = [t for t, row in zip(texts, queries) if not np.isfinite(row).all()]
    if broken:
        raise AlignError(f"the export's text encoder gave a non-finite embedding for {broken[0]!r}",
                         "its weights hold NaN or infinity: export the run again from a good checkpoint")
    where = normalise_where(where)
    allowed = index.labels.mask(where) if where else None
    results, used = index.search(queries, k, backend, faiss_above, allowed)
    answer = {**source, "backend": used, "gallery_size": len(index)}
    if where:
        answer["filter"] = {"where": where, "matching": int(allowed.sum())}
    answer["elapsed_ms"] = round(1000 * (time.perf_counter() - started), 2)
    answer["queries"] = [{"text": t, "results": r} for t, r in zip(texts, results)]
    return answer


def _damaged(path: Path, exc: Exception) -> AlignError:
    return AlignError(f"{path} is damaged or truncated ({str(exc).splitlines()[0][:200]})", _REBUILD)


def _vectors_and_keys(folder: Path, info: dict) -> tuple[list[str], np.ndarray]:
    """The folder's keys and (N, D) vectors: embeddings.npy + keys.txt, or gallery.parquet alone."""
    npy, keys_path, parquet = folder / A.INDEX_EMBEDDINGS, folder / A.INDEX_KEYS, folder / A.INDEX_PARQUET
    if info.get("format") == "parquet":
        if not parquet.is_file():
            raise AlignError(f"{parquet} is missing: the index is incomplete", _REBUILD)
        try:
            keys, vectors, _ = read_gallery_parquet(parquet)
        except Exception as exc:  # noqa: BLE001 - pyarrow raises its own types for damaged files
            raise _damaged(parquet, exc) from None
        return keys, vectors
    for path in (npy, keys_path):
        if not path.is_file():
            raise AlignError(f"{path} is missing: the index is incomplete", _REBUILD)
    try:
        vectors = np.load(npy, mmap_mode="r")  # (N, D) float32; a short file fails to map
    except (OSError, ValueError, EOFError) as exc:
        raise _damaged(npy, exc) from None
    try:
        keys = keys_path.read_text(encoding="utf-8").split("\n")[:-1]
    except (OSError, UnicodeDecodeError) as exc:
        raise _damaged(keys_path, exc) from None
    return keys, vectors


def load_index(folder: str | Path) -> GalleryIndex:
    folder = Path(folder)
    if not folder.is_dir():
        raise AlignError(f"no index at {folder}", _REBUILD)
    info = read_json(folder / A.INDEX_INFO, "gallery index", _REBUILD)
    keys, vectors = _vectors_and_keys(folder, info)
    if vectors.ndim != 2 or vectors.dtype != np.float32 or vectors.shape[0] != info.get("count") \
            or len(keys) != vectors.shape[0] or vectors.shape[1] != info.get("dim", vectors.shape[1]):
        raise AlignError(f"{folder} is damaged: {len(keys)} keys and {vectors.dtype} vectors of shape "
                         f"{vectors.shape} where index.json says {info.get('count')} x {info.get('dim')}", _REBUILD)
    try:
        labels = LabelTable.load(folder, len(keys))
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise _damaged(folder / A.INDEX_LABEL_CODES, exc) from None
    return GalleryIndex(folder, info, keys, vectors, labels)


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

    def query(self, texts: Sequence[str], k: int = 10, backend: str = "auto", faiss_above: int = FAISS_AUTO_ROWS,
              where: Mapping[str, str | Sequence[str]] | None = None) -> dict:
        started = time.perf_counter()
        return query_answer(self.index, texts, self.model.embed_text(list(texts)), k, backend, started,
                            {"index": str(self.index.folder)}, faiss_above, where)


def query_index(index_dir: str | Path, texts: Sequence[str], k: int = 10, backend: str = "auto",
                export_dir: str | Path | None = None, where: Mapping[str, str | Sequence[str]] | None = None) -> dict:
    return GallerySearch(index_dir, export_dir).query(texts, k, backend, where=where)
