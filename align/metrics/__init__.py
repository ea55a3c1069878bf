"""Metric functions over embeddings: retrieval recall@K, zero-shot accuracy, linear-probe accuracy,
bootstrap intervals of recall, confusion matrices.

Pure functions on numpy arrays; nothing here loads a model. The evaluator embeds captions and
images, then hands the arrays to these functions. Bad input raises a plain ``ValueError``; the
evaluator, which knows the recipe and the data, turns it into a user-facing error.

``ranks`` first-hit ranks, recall from them, hit rules; ``blocked`` exact ranks in blocks on both
sides; ``faiss_ranks`` ranks through a flat faiss index; ``retrieval`` recall both ways;
``classify`` zero-shot, the stratified probe sample and the probe, confusion matrices;
``intervals`` bootstrap intervals; ``table`` the printed table.

Conventions
-----------
* Similarity is the dot product of L2-normalised embeddings (cosine similarity).
* Ranking is by descending score; **ties are broken by gallery index, lower index first** (the
  order a stable sort of ``-scores`` gives). Ranks are 0-based: rank 0 is the top item.
* A query with no hit anywhere in the gallery cannot be scored. It is left out of the recall
  average and counted in ``RecallResult.skipped``.
"""
from __future__ import annotations

from .blocked import DEFAULT_BLOCK, blocked_first_hit_ranks
from .classify import (class_text_embeddings, confusion_matrix, display_name, linear_probe_accuracy,
                       per_class_recall, stratified_sample, zero_shot_accuracy, zero_shot_predictions)
from .faiss_ranks import faiss_first_hit_ranks
from .intervals import bootstrap_recall_intervals
from .ranks import (HitRule, RecallResult, first_hit_ranks, hit_matrix, recall_at_k, recall_from_ranks,
                    score_recall)
from .retrieval import (METHODS, recall_metrics_from_ranks, retrieval_metrics, retrieval_ranks,
                        retrieval_results)
from .table import format_metrics_table

__all__ = ["DEFAULT_BLOCK", "METHODS", "HitRule", "RecallResult",
           "blocked_first_hit_ranks", "bootstrap_recall_intervals", "class_text_embeddings", "confusion_matrix",
           "display_name", "faiss_first_hit_ranks", "first_hit_ranks", "format_metrics_table", "hit_matrix",
           "linear_probe_accuracy", "per_class_recall", "recall_at_k", "recall_from_ranks",
           "recall_metrics_from_ranks", "retrieval_metrics", "retrieval_ranks", "retrieval_results",
           "score_recall", "stratified_sample", "zero_shot_accuracy", "zero_shot_predictions"]
