"""Bootstrap intervals of recall@K, drawn in pieces so memory stays bounded at any query count."""
from __future__ import annotations

from typing import Sequence

import numpy as np

from .ranks import check_ks

# Drawn indices held at once: 2^23 int64 is 64 MiB (plus the gathered ranks, as many again).
DRAW_ELEMENTS = 1 << 23


def bootstrap_recall_intervals(ranks: np.ndarray, ks: Sequence[int], resamples: int = 1000, seed: int = 0,
                               level: float = 0.95) -> dict[int, tuple[float, float]]:
    """Percentile-bootstrap interval of recall@K over the scored queries (Efron & Tibshirani 1993, §13.3).

    ``ranks`` as ``first_hit_ranks`` gives them (-1 = no hit, left out as in the recall). One set
    of ``resamples`` draws of the queries with replacement, ``numpy.random.default_rng(seed)
    .integers(0, n, (resamples, n))``, serves every K; the interval is the (1 - level) / 2 and
    (1 + level) / 2 quantiles (linear interpolation) of the resampled recalls. Drawn a few resamples
    at a time (the generator gives the same numbers as one draw), at most 256 and at most
    ``DRAW_ELEMENTS`` indices, so memory does not grow with n.
    """
    ks = check_ks(ks)
    if resamples < 1 or not 0 < level < 1:
        raise ValueError(f"need at least one resample and a level in (0, 1), got {resamples} and {level}")
    valid = np.asarray(ranks)[np.asarray(ranks) >= 0]                             # (n,)
    if valid.size == 0:
        raise ValueError("no query has a hit in the gallery, so recall has no interval")
    per_draw = max(1, min(256, DRAW_ELEMENTS // valid.size))
    rng, recalls = np.random.default_rng(seed), []
    for start in range(0, resamples, per_draw):
        drawn = valid[rng.integers(0, valid.size, (min(per_draw, resamples - start), valid.size))]   # (b, n)
        recalls.append(np.stack([(drawn < k).mean(axis=1) for k in ks], axis=1))                    # (b, len(ks))
    low, high = np.quantile(np.concatenate(recalls), [(1 - level) / 2, (1 + level) / 2], axis=0)  # (len(ks),)
    return {k: (float(lo), float(hi)) for k, lo, hi in zip(ks, low, high)}
