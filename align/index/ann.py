"""The on-disk approximate index: faiss IVF with 8-bit scalar codes, candidates re-scored exactly.

    coarse    ``nlist`` = 2·sqrt(N) centroids (k-means on a seeded sample of 64 rows per list)
    codes     every row as 8-bit scalar-quantised codes in its nearest centroid's list (a quarter of
              the float32 vectors it sits beside: 1.3 GB at 1M x 1280 instead of 5.1 GB)
    search    the ``nprobe`` nearest lists are scanned for ``RERANK x k`` candidates, which are then
              re-scored against the float32 rows the exact path uses and ranked as it ranks them
              (score descending, ties by row): every score returned is the exact inner product,
              only the candidate set is approximate
    tuning    ``nprobe`` is the smallest power of two whose recall@10 against exact search reaches
              ``TARGET_RECALL`` on a tuning sample of queries; recall@10 is then measured on a
              separate held sample and reported (index.json), so the figure is not the one tuned on

IVF rather than HNSW: the graph costs ~efConstruction·M distance evaluations per insert, the
inverted file one assignment against ``nlist`` centroids; at 1M x 1280 on a 2-core machine that is
the difference between an hour and a few minutes of building (tools/bench_index.py measures ours).

A filter (``allowed`` rows) goes to faiss as an ``IDSelectorBitmap``; ``nprobe`` is divided by the
allowed fraction (up to every list) so about as many allowed candidates are scanned as without one.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .exact import FAISS_ADD_ROWS, RowSelector, faiss_module, top_k_numpy

TARGET_RECALL = 0.97  # tuned for, on the tuning queries: margin above the 0.95 the held sample is held to
RECALL_K = 10
RERANK = 4  # candidates fetched per result, re-scored exactly
TRAIN_PER_LIST = 64  # k-means sample rows per centroid (faiss warns below 39)


def list_count(rows: int) -> int:
    """Inverted lists for ``rows`` vectors: 2·sqrt(N) (common practice: 1-16·sqrt(N)), at least one."""
    return max(1, min(int(round(2 * math.sqrt(rows))), rows // 39))


def recall_at_k(found: np.ndarray, truth: np.ndarray) -> float:
    """Mean over queries of |found ∩ truth| / |truth| (rows of -1 never count)."""
    hits = [len(set(f[f >= 0].tolist()) & set(t[t >= 0].tolist())) / max(1, int((t >= 0).sum()))
            for f, t in zip(found, truth)]
    return float(np.mean(hits)) if hits else 1.0


@dataclass
class ApproximateIndex:
    """A faiss IVF-SQ8 index and how it is searched; ``vectors`` are the float32 rows it re-scores with."""

    index: object
    nprobe: int
    rerank: int = RERANK

    @property
    def nlist(self) -> int:
        return int(faiss_module().extract_index_ivf(self.index).nlist)

    def search(self, vectors: np.ndarray, queries: np.ndarray, k: int, allowed: np.ndarray | None = None,
               nprobe: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(Q, k') exact scores, descending, and (Q, k') rows; -1 / -inf where fewer were found."""
        faiss = faiss_module()
        queries = np.ascontiguousarray(np.atleast_2d(queries), dtype=np.float32)
        probe = nprobe or self.nprobe
        selector = None
        if allowed is not None:
            count = int(allowed.sum())
            k = min(k, count)
            if k == 0:
                return np.zeros((len(queries), 0), np.float32), np.zeros((len(queries), 0), np.int64)
            # scan about as many allowed rows as an unfiltered search would scan rows
            probe = min(self.nlist, math.ceil(probe * len(allowed) / count))
            selector = RowSelector(allowed)
        k = min(k, self.index.ntotal)
        params = faiss.SearchParametersIVF(nprobe=min(probe, self.nlist),
                                           sel=selector.selector if selector else None)
        _, candidates = self.index.search(queries, k * self.rerank, params=params)  # (Q, k·R), -1 padded
        return rescore(vectors, queries, candidates, k)


def rescore(vectors: np.ndarray, queries: np.ndarray, candidates: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Exact inner products of each query with its candidate rows; the top k, ranked as the exact path ranks."""
    valid = candidates >= 0
    unique = np.unique(candidates[valid])  # sorted: the memory map is read in row order
    block = np.asarray(vectors[unique], dtype=np.float32)  # (U, D)
    where = np.searchsorted(unique, np.where(valid, candidates, unique[0] if len(unique) else 0))
    scores = np.einsum("qd,qcd->qc", queries, block[where]) if len(unique) else np.zeros(candidates.shape, np.float32)
    scores = np.where(valid, scores, -np.inf).astype(np.float32)  # (Q, C)
    rows = np.where(valid, candidates, np.iinfo(np.int64).max)  # empty slots sort last among equal scores
    order = np.lexsort((rows, -scores), axis=-1)[:, :k]  # score descending, then row ascending
    top_rows = np.take_along_axis(candidates, order, axis=1).astype(np.int64)
    return np.take_along_axis(scores, order, axis=1), top_rows


def _train_sample(vectors: np.ndarray, nlist: int, seed: int) -> np.ndarray:
    rows = vectors.shape[0]
    size = min(rows, TRAIN_PER_LIST * nlist)
    picked = np.sort(np.random.default_rng(seed).choice(rows, size=size, replace=False))
    return np.ascontiguousarray(vectors[picked], dtype=np.float32)


def build_ivf(vectors: np.ndarray, seed: int = 0):
    """Train the coarse centroids and the scalar quantiser on a seeded sample, then add every row."""
    faiss = faiss_module()
    nlist = list_count(vectors.shape[0])
    index = faiss.index_factory(vectors.shape[1], f"IVF{nlist},SQ8", faiss.METRIC_INNER_PRODUCT)
    ivf = faiss.extract_index_ivf(index)
    ivf.cp.seed = seed  # k-means initialisation: the same rows give the same index
    index.train(_train_sample(vectors, nlist, seed))
    for start in range(0, vectors.shape[0], FAISS_ADD_ROWS):
        index.add(np.ascontiguousarray(vectors[start:start + FAISS_ADD_ROWS], dtype=np.float32))
    return index


def _truth_and_found(index: ApproximateIndex, vectors: np.ndarray, queries: np.ndarray, truth: np.ndarray,
                     self_rows: np.ndarray | None, nprobe: int) -> float:
    """recall@10 of the index at ``nprobe``; a query that is a gallery row does not count itself."""
    extra = 0 if self_rows is None else 1
    _, found = index.search(vectors, queries, RECALL_K + extra, nprobe=nprobe)
    return recall_at_k(_drop_self(found, self_rows), truth)


def _drop_self(rows: np.ndarray, self_rows: np.ndarray | None) -> np.ndarray:
    """Each query's own gallery row removed from its result (queries drawn from the gallery)."""
    if self_rows is None:
        return rows
    kept = [r[r != s][:RECALL_K] for r, s in zip(rows, self_rows)]
    return np.stack([np.pad(r, (0, RECALL_K - len(r)), constant_values=-1) for r in kept])


def exact_truth(vectors: np.ndarray, queries: np.ndarray, self_rows: np.ndarray | None) -> np.ndarray:
    _, rows = top_k_numpy(vectors, queries, RECALL_K + (0 if self_rows is None else 1))
    return _drop_self(rows, self_rows)


def _tune_nprobe(recall_at, nlist: int, target: float) -> tuple[int, float]:
    """The smallest ``nprobe`` (within 1/8) whose recall reaches ``target``: doubling, then bisection."""
    low, high, reached = 0, 1, recall_at(1)
    while reached < target and high < nlist:
        low, high = high, min(2 * high, nlist)
        reached = recall_at(high)
    while reached >= target and high - low > max(1, high // 8):
        middle = (low + high) // 2
        recall = recall_at(middle)
        if recall >= target:
            high, reached = middle, recall
        else:
            low = middle
    return high, reached


def build_approximate(vectors: np.ndarray, tune_queries: np.ndarray, held_queries: np.ndarray, *,
                      tune_self: np.ndarray | None = None, held_self: np.ndarray | None = None,
                      target: float = TARGET_RECALL, seed: int = 0) -> tuple[ApproximateIndex, dict]:
    """Build, tune ``nprobe`` on ``tune_queries`` and measure recall@10 on ``held_queries``.

    ``*_self``: when the queries are gallery rows, each one's own row (left out of both rankings).
    Returns the index and its report (build seconds, nlist, nprobe, recall@10 tuned and held).
    """
    started = time.perf_counter()
    index = ApproximateIndex(build_ivf(vectors, seed), nprobe=1)
    built = time.perf_counter() - started
    tune_truth = exact_truth(vectors, tune_queries, tune_self)
    nprobe, tuned = _tune_nprobe(lambda p: _truth_and_found(index, vectors, tune_queries, tune_truth, tune_self, p),
                                 index.nlist, target)
    index.nprobe = nprobe
    held = _truth_and_found(index, vectors, held_queries, exact_truth(vectors, held_queries, held_self),
                            held_self, nprobe)
    report = {"kind": "faiss IVF-SQ8, exact re-scoring", "nlist": index.nlist, "nprobe": nprobe,
              "rerank": index.rerank, "target_recall_at_10": target, "tuned_recall_at_10": round(tuned, 4),
              "recall_at_10": round(held, 4), "held_queries": len(held_queries),
              "build_seconds": round(built, 2), "tune_seconds": round(time.perf_counter() - started - built, 2)}
    return index, report


def save_approximate(index: ApproximateIndex, path: Path) -> None:
    faiss_module().write_index(index.index, str(path))


def load_approximate(path: Path, nprobe: int, rows: int) -> ApproximateIndex:
    """Read the index memory-mapped (its lists stay on disk until searched); plain errors when damaged."""
    faiss = faiss_module()
    index = faiss.read_index(str(path), faiss.IO_FLAG_MMAP)  # RuntimeError when the file is damaged
    if index.ntotal != rows:
        raise ValueError(f"it holds {index.ntotal} rows, the gallery {rows}")
    return ApproximateIndex(index, nprobe=nprobe)
