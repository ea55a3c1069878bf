"""Exact first-hit ranks with the score matrix cut into blocks on both sides.

A (Q, G) score matrix of a 10^6-image evaluation would be terabytes; here at most one
(query_block, gallery_block) float32 block and a few temporaries of its size exist at a time, so
memory does not grow with either side. The ranks equal ``first_hit_ranks`` on the whole matrix: a
rank is ``#{g: s_g > s*} + #{g < g*: s_g == s*}`` for the best-ranked hit (s*, g*), and both counts
add up over any partition of the gallery.
"""
from __future__ import annotations

import numpy as np

from .ranks import HitRule, checked_rows, first_hit_ranks

# Rows per side of one score block: (4096, 4096) float32 is 64 MiB.
DEFAULT_BLOCK = 4096


def _best_hits(query: np.ndarray, gallery: np.ndarray, rule: HitRule, q0: int, g_block: int,
               name: str) -> tuple[np.ndarray, np.ndarray]:
    """Pass one: each query's best-ranked hit over the gallery blocks, (score, index); (-inf, -1) if none."""
    b = query.shape[0]
    best_score = np.full(b, -np.inf, dtype=np.float32)                            # (b,)
    best_index = np.full(b, -1, dtype=np.int64)                                   # (b,)
    for g0 in range(0, gallery.shape[0], g_block):
        g1 = min(g0 + g_block, gallery.shape[0])
        hits = rule.block(q0, q0 + b, g0, g1)                                     # (b, g)
        if not hits.any():  # without labels a caption's hits sit near its own row: most blocks skip the product
            continue
        scores = query @ checked_rows(gallery[g0:g1], name).T                     # (b, g)
        masked = np.where(hits, scores, -np.inf)
        local = masked.argmax(axis=1)                                             # first maximum: lowest index
        value = masked[np.arange(b), local]
        better = value > best_score  # strictly: on equal scores the earlier block's lower index stays
        best_score[better] = value[better]
        best_index[better] = g0 + local[better]
    return best_score, best_index


def _count_before(query: np.ndarray, gallery: np.ndarray, best_score: np.ndarray, best_index: np.ndarray,
                  g_block: int, name: str) -> np.ndarray:
    """Pass two: how many items rank before each query's best hit. (b,)"""
    count = np.zeros(query.shape[0], dtype=np.int64)
    threshold, where = best_score[:, None], best_index[:, None]
    for g0 in range(0, gallery.shape[0], g_block):
        g1 = min(g0 + g_block, gallery.shape[0])
        scores = query @ checked_rows(gallery[g0:g1], name).T                     # (b, g)
        count += (scores > threshold).sum(axis=1)
        count += ((scores == threshold) & (np.arange(g0, g1)[None, :] < where)).sum(axis=1)
    return count


def blocked_first_hit_ranks(queries: np.ndarray, gallery: np.ndarray, rule: HitRule,
                            query_block: int = DEFAULT_BLOCK, gallery_block: int = DEFAULT_BLOCK,
                            names: tuple[str, str] = ("queries", "gallery")) -> np.ndarray:
    """First-hit ranks (-1 = no hit) of ``queries`` (Q, D) against ``gallery`` (G, D), both unit rows.

    Either may be any row-sliceable array (a float16 memory map too): a block is read as float32 and
    checked when it is scored. A gallery of one block is scored once per query block; a larger one
    twice (find the best hit, then count what ranks before it), the first pass skipping blocks that
    hold none of the block's hits.
    """
    q_block, g_block = max(1, int(query_block)), max(1, int(gallery_block))
    n_queries, n_gallery = queries.shape[0], gallery.shape[0]
    ranks = np.empty(n_queries, dtype=np.int64)
    for q0 in range(0, n_queries, q_block):
        q1 = min(q0 + q_block, n_queries)
        query = checked_rows(queries[q0:q1], names[0])                            # (b, D)
        if n_gallery <= g_block:
            ranks[q0:q1] = first_hit_ranks(query @ checked_rows(gallery[:], names[1]).T,
                                           rule.block(q0, q1, 0, n_gallery))
            continue
        best_score, best_index = _best_hits(query, gallery, rule, q0, g_block, names[1])
        count = _count_before(query, gallery, best_score, best_index, g_block, names[1])
        ranks[q0:q1] = np.where(best_index >= 0, count, -1)
    return ranks
