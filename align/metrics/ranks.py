"""First-hit ranks and recall@K from them; which gallery items count as a query's hits.

Ranking is by descending score; **ties are broken by gallery index, lower index first** (the order a
stable sort of ``-scores`` gives). Ranks are 0-based: rank 0 is the top item. A query with no hit
anywhere in the gallery cannot be scored: its rank is -1, and it is left out of the recall average
and counted in ``RecallResult.skipped``.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Hashable, Sequence

import numpy as np

# How far from unit length an embedding may be and still count as L2-normalised (float16 feature
# caches round norms to about 1e-3).
NORM_TOLERANCE = 1e-2


@dataclass(frozen=True)
class RecallResult:
    """Recall@K over the scorable queries, and how many queries could not be scored."""

    recall: dict[int, float]   # K -> fraction of scored queries with a hit in their top K
    scored: int                # queries with at least one hit in the gallery
    skipped: int               # queries with no hit at all (left out of the average)


def check_ks(ks: Sequence[int]) -> list[int]:
    ks = list(ks)
    if not ks or any(isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1 for k in ks):
        raise ValueError(f"recall K values must be positive integers such as [1, 5, 10], got {ks!r}")
    return [int(k) for k in ks]


def check_finite(scores: np.ndarray) -> None:
    if not np.isfinite(scores).all():
        raise ValueError("similarity scores contain NaN or infinity (the embeddings are not finite)")


def first_hit_ranks(scores: np.ndarray, hits: np.ndarray) -> np.ndarray:
    """0-based rank of each query's best-ranked hit; -1 for a query with no hit.

    ``scores`` (Q, G) and ``hits`` (Q, G) bool. Ties are broken by gallery index (lower first), so
    the rank of item j is ``#{i: s_i > s_j} + #{i < j: s_i == s_j}``. Costs a few (Q, G) temporaries
    and no sort.
    """
    scores = np.asarray(scores)
    hits = np.asarray(hits, dtype=bool)
    if scores.ndim != 2 or hits.shape != scores.shape:
        raise ValueError(f"scores and hits must be two (queries, gallery) arrays of one shape, got "
                         f"{scores.shape} and {hits.shape}")
    check_finite(scores)
    num_queries, gallery = scores.shape
    if gallery == 0:
        return np.full(num_queries, -1, dtype=np.int64)
    # The best-ranked hit is the highest-scoring hit, and among equal scores the lowest index,
    # which is exactly what argmax (first maximum) picks.
    masked = np.where(hits, scores, -np.inf)                                      # (Q, G)
    best = masked.argmax(axis=1)                                                  # (Q,)
    best_score = scores[np.arange(num_queries), best][:, None]                    # (Q, 1)
    above = (scores > best_score).sum(axis=1)                                     # (Q,)
    tied_before = ((scores == best_score) & (np.arange(gallery)[None, :] < best[:, None])).sum(axis=1)
    ranks = (above + tied_before).astype(np.int64)                                # (Q,)
    ranks[~hits.any(axis=1)] = -1
    return ranks


def recall_from_ranks(ranks: np.ndarray, ks: Sequence[int]) -> RecallResult:
    """Recall@K from first-hit ranks (-1 = no hit, skipped)."""
    ks = check_ks(ks)
    ranks = np.asarray(ranks)
    scorable = ranks >= 0
    scored = int(scorable.sum())
    skipped = int(ranks.size - scored)
    if scored == 0:
        raise ValueError(f"none of the {ranks.size} queries has a hit in the gallery, so recall cannot be scored")
    valid = ranks[scorable]
    recall = {k: float((valid < k).mean()) for k in ks}
    return RecallResult(recall=recall, scored=scored, skipped=skipped)


def score_recall(scores: np.ndarray, hits: np.ndarray, ks: Sequence[int]) -> RecallResult:
    """Recall@K with the count of queries that could not be scored (see ``recall_at_k``)."""
    return recall_from_ranks(first_hit_ranks(scores, hits), ks)


def recall_at_k(scores: np.ndarray, hits: np.ndarray, ks: Sequence[int]) -> dict[int, float]:
    """Fraction of queries with at least one hit among their top K gallery items, for each K.

    ``scores`` (Q, G): similarity of each query to each gallery item. ``hits`` (Q, G) bool: True
    where the gallery item counts as a hit for the query. Ties in score are broken by gallery
    index (lower index ranks first; stable). Queries with no hit at all are excluded from the
    average; ``score_recall`` returns how many.
    """
    return score_recall(scores, hits, ks).recall


def group_codes(groups: Sequence, what: str, none_is_missing: bool = True) -> np.ndarray:
    """Integer code per group id (equal ids, equal codes); None becomes -1 when ``none_is_missing``."""
    codes: dict[Hashable, int] = {}
    out = np.empty(len(groups), dtype=np.int64)
    for i, group in enumerate(groups):
        if group is None and none_is_missing:
            out[i] = -1
            continue
        try:
            out[i] = codes.setdefault(group, len(codes))
        except TypeError:
            raise ValueError(f"{what} must be hashable, got {type(group).__name__} at position {i} "
                             "(pass labels as their canonical JSON text: align.labels.label_group)") from None
    return out


def hit_matrix(query_group: Sequence, gallery_group: Sequence) -> np.ndarray:
    """(Q, G) bool: True where the query's group id equals the gallery item's (None equals None)."""
    query_group, gallery_group = list(query_group), list(gallery_group)
    # One shared code table for both sides, so equal ids get equal codes; None gets its own code
    # here (a hashable like any other), unlike the label codes retrieval uses.
    joint = group_codes(query_group + gallery_group, "group ids", none_is_missing=False)
    query_codes, gallery_codes = joint[: len(query_group)], joint[len(query_group):]
    return query_codes[:, None] == gallery_codes[None, :]                         # (Q, G)


@dataclass(frozen=True)
class HitRule:
    """Which gallery items are a query's hits, answered for any block of the (Q, G) grid.

    Query q and item g are a hit when they are the same pair (``query_pair[q] == gallery_pair[g]``)
    or share a label group (``query_code[q] == gallery_code[g] >= 0``; -1 = no labels). The full
    (Q, G) matrix is never built: ``block`` answers a rectangle, ``at`` chosen pairs.
    """

    query_pair: np.ndarray     # (Q,) int
    gallery_pair: np.ndarray   # (G,) int
    query_code: np.ndarray     # (Q,) int, -1 = no labels
    gallery_code: np.ndarray   # (G,) int, -1 = no labels

    def block(self, q0: int, q1: int, g0: int, g1: int) -> np.ndarray:
        """(q1 - q0, g1 - g0) bool."""
        own = self.query_pair[q0:q1, None] == self.gallery_pair[None, g0:g1]
        codes = self.query_code[q0:q1, None]
        return own | ((codes == self.gallery_code[None, g0:g1]) & (codes >= 0))

    def at(self, queries: np.ndarray, items: np.ndarray) -> np.ndarray:
        """``queries`` (b,) rows and ``items`` (b, k) gallery rows (-1 = empty slot) -> (b, k) bool."""
        safe = np.maximum(items, 0)
        own = self.query_pair[queries, None] == self.gallery_pair[safe]
        codes = self.query_code[queries, None]
        return (own | ((codes == self.gallery_code[safe]) & (codes >= 0))) & (items >= 0)

    def any_hit(self) -> np.ndarray:
        """(Q,) bool: whether the query has a hit anywhere in the gallery."""
        labelled = self.gallery_code[self.gallery_code >= 0]
        return np.isin(self.query_pair, self.gallery_pair) | ((self.query_code >= 0)
                                                              & np.isin(self.query_code, labelled))


def checked_rows(rows: np.ndarray, name: str) -> np.ndarray:
    """A block of embeddings as float32, checked finite and L2-normalised. (b, D)"""
    rows = np.asarray(rows, dtype=np.float32)
    if not np.isfinite(rows).all():
        raise ValueError(f"{name} contain NaN or infinity")
    norms = np.linalg.norm(rows, axis=1)
    if rows.shape[0] and np.abs(norms - 1.0).max() > NORM_TOLERANCE:
        raise ValueError(f"{name} are not L2-normalised (row norms range {norms.min():.4g}..{norms.max():.4g}); "
                         "divide each row by its norm before scoring")
    return rows
