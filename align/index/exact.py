"""Exact inner-product top-k over a gallery of unit rows: numpy, or faiss ``IndexFlatIP``.

Both give the same rows (ties ordered by row, as a stable sort would). Either takes an optional
``allowed`` mask (N,) bool: rows outside it are never returned, and a query gets fewer than ``k``
results when fewer rows are allowed. A result row of -1 marks such an empty slot.
"""
from __future__ import annotations

import contextlib

import numpy as np

from ..errors import AlignError

FAISS_AUTO_ROWS = 100_000  # above this many images exact search runs in faiss (common practice: exact flat IP)
QUERY_CHUNK = 256  # queries scored at once: bounds the (Q, N) score matrix
# below this many multiply-adds, scoring runs on one BLAS thread: waking more costs more than it saves
# (measured on 2 busy cores, 2,124 x 1280 gallery, one query: 0.6 ms on one thread, 11.6 ms on two)
ONE_THREAD_MACS = 1 << 25
FAISS_ADD_ROWS = 65536  # rows copied into a faiss index at once: a memory map is never read whole


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


def top_k_numpy(gallery: np.ndarray, queries: np.ndarray, k: int,
                allowed: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Exact inner-product top-k: (Q, k') scores, descending, and (Q, k') gallery rows.

    ``k' = min(k, allowed rows)``. Equal scores are ordered by row, so the result does not depend on
    the partition's internals.
    """
    n = gallery.shape[0]
    k = min(k, n if allowed is None else int(allowed.sum()))
    if k == 0:
        return np.zeros((len(queries), 0), np.float32), np.zeros((len(queries), 0), np.int64)
    all_scores, all_rows = [], []
    for start in range(0, len(queries), QUERY_CHUNK):
        chunk = queries[start:start + QUERY_CHUNK]
        with _blas_threads(1 if chunk.shape[0] * gallery.shape[0] * gallery.shape[1] <= ONE_THREAD_MACS else None):
            scores = chunk @ gallery.T  # (q, N)
        if allowed is not None:
            scores[:, ~allowed] = -np.inf  # never among the top k: k is at most the allowed count
        rows = np.argpartition(-scores, k - 1, axis=1)[:, :k] if k < n else np.tile(np.arange(n), (len(scores), 1))
        picked = np.take_along_axis(scores, rows, axis=1)  # (q, k)
        order = np.lexsort((rows, -picked), axis=-1)  # score descending, then row ascending
        all_rows.append(np.take_along_axis(rows, order, axis=1))
        all_scores.append(np.take_along_axis(picked, order, axis=1))
    return np.concatenate(all_scores), np.concatenate(all_rows).astype(np.int64)


def faiss_module():
    try:
        import faiss
    except ImportError:
        raise AlignError("faiss is not installed", "pip install faiss-cpu, or search with the numpy backend") from None
    return faiss


def faiss_flat_index(gallery: np.ndarray):
    """An exact inner-product faiss index over the gallery (it holds its own float32 copy)."""
    faiss = faiss_module()
    index = faiss.IndexFlatIP(gallery.shape[1])
    for start in range(0, gallery.shape[0], FAISS_ADD_ROWS):
        index.add(np.ascontiguousarray(gallery[start:start + FAISS_ADD_ROWS], dtype=np.float32))
    return index


class RowSelector:
    """A faiss ``IDSelectorBitmap`` over an allowed mask; keeps the bitmap alive while faiss reads it."""

    def __init__(self, allowed: np.ndarray):
        faiss = faiss_module()
        self.bits = np.packbits(np.asarray(allowed, dtype=bool), bitorder="little")  # bit i = row i
        self.selector = faiss.IDSelectorBitmap(len(allowed), faiss.swig_ptr(self.bits))


def top_k_faiss(index, queries: np.ndarray, k: int,
                allowed: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Top-k of a faiss flat index; with ``allowed``, rows outside the mask are skipped (faiss IDSelector)."""
    k = min(k, index.ntotal if allowed is None else int(allowed.sum()))
    queries = np.ascontiguousarray(queries, dtype=np.float32)
    if k == 0:
        return np.zeros((len(queries), 0), np.float32), np.zeros((len(queries), 0), np.int64)
    if allowed is None:
        return index.search(queries, k)  # (Q, k) each
    faiss = faiss_module()
    rows = RowSelector(allowed)
    return index.search(queries, k, params=faiss.SearchParameters(sel=rows.selector))


def choose_exact_backend(rows: int, backend: str, faiss_above: int = FAISS_AUTO_ROWS) -> str:
    """``numpy`` or ``faiss`` for ``auto`` / ``exact`` by gallery size; a named one as is."""
    if backend in ("auto", "exact"):
        return "faiss" if rows >= faiss_above else "numpy"
    return backend
