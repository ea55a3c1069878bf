"""First-hit ranks through a faiss flat inner-product index, down to a fixed depth.

faiss returns each query's top ``depth`` items (exact scores, its own BLAS), which is all recall@K
needs for K <= depth: a query whose best hit lies deeper gets rank ``depth`` (read: "at least
depth"). Its order among equal scores is its own, so the ranks equal the exact path's where no two
items tie for a query's top places; on data with ties they may differ.
"""
from __future__ import annotations

import numpy as np

from .ranks import HitRule, checked_rows

FAISS_ADD_ROWS = 65536  # gallery rows copied into the index at once: a memory map is never read whole


def _faiss():
    try:
        import faiss
    except ImportError:
        raise ValueError("faiss is not installed (pip install faiss-cpu), or rank with the exact method") from None
    return faiss


def faiss_first_hit_ranks(queries: np.ndarray, gallery: np.ndarray, rule: HitRule, depth: int,
                          query_block: int, names: tuple[str, str] = ("queries", "gallery")) -> np.ndarray:
    """Ranks (-1 = no hit anywhere; ``depth`` = not within the top ``depth``) of ``queries`` (Q, D)
    against ``gallery`` (G, D), both unit rows. The index holds a float32 copy of the gallery."""
    if depth < 1:
        raise ValueError(f"the faiss ranking depth must be at least 1, got {depth}")
    faiss = _faiss()
    index = faiss.IndexFlatIP(gallery.shape[1])
    for g0 in range(0, gallery.shape[0], FAISS_ADD_ROWS):
        index.add(np.ascontiguousarray(checked_rows(gallery[g0:g0 + FAISS_ADD_ROWS], names[1])))
    k = min(depth, gallery.shape[0])
    ranks = np.empty(queries.shape[0], dtype=np.int64)
    block = max(1, int(query_block))
    for q0 in range(0, queries.shape[0], block):
        q1 = min(q0 + block, queries.shape[0])
        _, items = index.search(np.ascontiguousarray(checked_rows(queries[q0:q1], names[0])), k)  # (b, k)
        hits = rule.at(np.arange(q0, q1), items)                                  # (b, k)
        ranks[q0:q1] = np.where(hits.any(axis=1), hits.argmax(axis=1), depth)
    ranks[~rule.any_hit()] = -1
    return ranks
