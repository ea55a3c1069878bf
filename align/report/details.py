"""What a report shows beyond the headline metrics, computed once at evaluation and kept as JSON.

``evaluation.json`` in the run folder holds one entry per evaluation set (the untagged one under
""): recall@K both ways with bootstrap intervals, per label field the zero-shot confusion matrix
and per-class recall, and retrieval examples (a fixed sample of captions with their top images,
and the hardest misses). ``align report`` renders from it without loading a model. Numpy only.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from .. import artifacts as A
from ..fileio import write_json_atomic
from ..metrics import bootstrap_recall_intervals, confusion_matrix, per_class_recall, recall_from_ranks

# Resampling the queries 1,000 times puts the percentile interval's ends within about ±0.01 of
# their limit at the split sizes evaluate sees (common practice); seeded, so a report is repeatable.
BOOTSTRAP_RESAMPLES = 1000
BOOTSTRAP_SEED = 0
BOOTSTRAP_LEVEL = 0.95
GALLERY_CAPTIONS = 6  # captions in the fixed retrieval sample
HARDEST_MISSES = 6  # captions whose first hit ranks lowest
TOP = 5  # images shown per caption


def recall_with_intervals(ranks: dict[str, np.ndarray], ks: list[int]) -> dict[str, dict]:
    """``{direction}_recall@{k}`` -> value, 95% interval, queries scored and skipped."""
    out = {}
    for direction, r in ranks.items():
        result = recall_from_ranks(r, ks)
        intervals = bootstrap_recall_intervals(r, ks, BOOTSTRAP_RESAMPLES, BOOTSTRAP_SEED, BOOTSTRAP_LEVEL)
        for k in ks:
            out[f"{direction}_recall@{k}"] = {"value": result.recall[k], "low": intervals[k][0],
                                              "high": intervals[k][1], "scored": result.scored,
                                              "skipped": result.skipped}
    return out


def bootstrap_note() -> dict:
    return {"resamples": BOOTSTRAP_RESAMPLES, "seed": BOOTSTRAP_SEED, "level": BOOTSTRAP_LEVEL,
            "method": "percentile bootstrap over the scored queries"}


def field_detail(classes: list[str], true: list[int], predicted: np.ndarray, zero_shot: float,
                 probe: float | None) -> dict:
    """One label field: its classes, the zero-shot confusion matrix, per-class recall and support."""
    confusion = confusion_matrix(true, predicted, len(classes))
    recall = per_class_recall(confusion)
    return {"classes": classes, "zero_shot": zero_shot, "linear_probe": probe, "confusion": confusion.tolist(),
            "recall": [None if np.isnan(r) else float(r) for r in recall],
            "support": confusion.sum(axis=1).tolist()}


def _hits(row: int, groups: list[str | None]) -> np.ndarray:
    """(M,) bool: the caption's own image, and every image with its (non-empty) labels."""
    own = np.zeros(len(groups), dtype=bool)
    own[row] = True
    if groups[row] is None:
        return own
    return own | np.array([g == groups[row] for g in groups])


def _example(row: int, text_emb: np.ndarray, image_emb: np.ndarray, groups: list[str | None],
             captions: list[str], keys: list[str], labels: list[dict], rank: int) -> dict:
    scores = image_emb @ text_emb[row]                                           # (M,)
    order = np.argsort(-scores, kind="stable")[:TOP]  # ties: lower index first, as the recall ranks them
    hits = _hits(row, groups)
    return {"caption": captions[row], "labels": labels[row], "key": keys[row], "first_hit_rank": int(rank),
            "top": [{"key": keys[j], "score": float(scores[j]), "hit": bool(hits[j]), "labels": labels[j]}
                    for j in order.tolist()]}


def retrieval_examples(text_emb: np.ndarray, image_emb: np.ndarray, groups: list[str | None], captions: list[str],
                       keys: list[str], labels: list[dict], ranks: np.ndarray) -> dict:
    """Text->image examples, caption i paired with image i: a fixed seeded sample of captions, and
    the captions whose first hit ranks lowest (the hardest misses; ties: the earlier caption)."""
    n = len(captions)
    sample = sorted(np.random.default_rng(BOOTSTRAP_SEED).choice(n, min(GALLERY_CAPTIONS, n), replace=False).tolist())
    missed = [i for i in np.argsort(-ranks, kind="stable").tolist() if ranks[i] > 0][:HARDEST_MISSES]
    make = lambda i: _example(i, text_emb, image_emb, groups, captions, keys, labels, ranks[i])  # noqa: E731
    return {"sample": [make(i) for i in sample], "hardest": [make(i) for i in missed]}


def read_details(run_dir: Path) -> dict:
    """Every evaluation set's details, by tag ("" = the default evaluation); {} before any."""
    path = Path(run_dir) / A.EVALUATION_DETAILS
    return json.loads(path.read_text(encoding="utf-8")) if path.is_file() else {}


def write_details(run_dir: Path, tag: str | None, details: dict) -> None:
    """Store one evaluation set's details; the others stay as they were."""
    stored = read_details(run_dir)
    stored[tag or ""] = details
    write_json_atomic(Path(run_dir) / A.EVALUATION_DETAILS, stored)
