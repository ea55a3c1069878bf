"""Metric functions over embeddings: retrieval recall@K, zero-shot accuracy, linear-probe accuracy,
bootstrap intervals of recall, confusion matrices.

Pure functions on numpy arrays; nothing here loads a model. The evaluator embeds captions and
images, then hands the arrays to these functions. Bad input raises a plain ``ValueError``; the
evaluator, which knows the recipe and the data, turns it into a user-facing error.

Conventions
-----------
* Similarity is the dot product of L2-normalised embeddings (cosine similarity).
* Ranking is by descending score; **ties are broken by gallery index, lower index first** (the
  order a stable sort of ``-scores`` gives). Ranks are 0-based: rank 0 is the top item.
* A query with no hit anywhere in the gallery cannot be scored. It is left out of the recall
  average and counted in ``RecallResult.skipped``.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Callable, Hashable, Mapping, Sequence

import numpy as np
from rich.table import Table

# Score at most this many queries at once: a block of scores is (block, G) float32, so memory
# stays bounded however many captions the evaluation split holds.
DEFAULT_QUERY_BLOCK = 4096

# How far from unit length an embedding may be and still count as L2-normalised (float16 feature
# caches round norms to about 1e-3).
_NORM_TOLERANCE = 1e-2


@dataclass(frozen=True)
class RecallResult:
    """Recall@K over the scorable queries, and how many queries could not be scored."""

    recall: dict[int, float]   # K -> fraction of scored queries with a hit in their top K
    scored: int                # queries with at least one hit in the gallery
    skipped: int               # queries with no hit at all (left out of the average)


# --------------------------------------------------------------------------------------------
# recall@K


def _check_ks(ks: Sequence[int]) -> list[int]:
    ks = list(ks)
    if not ks or any(isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1 for k in ks):
        raise ValueError(f"recall K values must be positive integers such as [1, 5, 10], got {ks!r}")
    return [int(k) for k in ks]


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
    if not np.isfinite(scores).all():
        raise ValueError("similarity scores contain NaN or infinity (the embeddings are not finite)")
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
    ks = _check_ks(ks)
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


def _group_codes(groups: Sequence, what: str, none_is_missing: bool = True) -> np.ndarray:
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
    joint = _group_codes(query_group + gallery_group, "group ids", none_is_missing=False)
    query_codes, gallery_codes = joint[: len(query_group)], joint[len(query_group):]
    return query_codes[:, None] == gallery_codes[None, :]                         # (Q, G)


# --------------------------------------------------------------------------------------------
# retrieval both ways


def _as_embeddings(array, name: str) -> np.ndarray:
    array = np.asarray(array)
    if array.ndim != 2:
        raise ValueError(f"{name} must be a 2-d (items, dim) array, got shape {array.shape}")
    array = array.astype(np.float32, copy=False)
    if not np.isfinite(array).all():
        raise ValueError(f"{name} contain NaN or infinity")
    norms = np.linalg.norm(array, axis=1)
    if array.shape[0] and np.abs(norms - 1.0).max() > _NORM_TOLERANCE:
        raise ValueError(f"{name} are not L2-normalised (row norms range {norms.min():.4g}..{norms.max():.4g}); "
                         "divide each row by its norm before scoring")
    return array


def _blocked_ranks(queries: np.ndarray, gallery: np.ndarray,
                   hits_for: Callable[[int, int], np.ndarray], block: int) -> np.ndarray:
    """First-hit ranks, scoring ``block`` queries at a time so only (block, G) is ever held."""
    ranks = np.empty(queries.shape[0], dtype=np.int64)
    for start in range(0, queries.shape[0], block):
        stop = min(start + block, queries.shape[0])
        scores = queries[start:stop] @ gallery.T                                  # (b, G) float32
        ranks[start:stop] = first_hit_ranks(scores, hits_for(start, stop))
    return ranks


def retrieval_ranks(text_emb: np.ndarray, image_emb: np.ndarray, pair_ids: Sequence[int] | None,
                    label_groups: Sequence[Hashable | None] | None = None,
                    query_block: int = DEFAULT_QUERY_BLOCK) -> dict[str, np.ndarray]:
    """First-hit ranks both ways (-1 = no hit); keys "text_to_image" (N,) and "image_to_text" (M,).

    See ``retrieval_metrics`` for the arguments.
    """
    text = _as_embeddings(text_emb, "text embeddings")                            # (N, D)
    image = _as_embeddings(image_emb, "image embeddings")                         # (M, D)
    n_text, n_image = text.shape[0], image.shape[0]
    if text.shape[1] != image.shape[1]:
        raise ValueError(f"text embeddings are {text.shape[1]}-d but image embeddings are {image.shape[1]}-d")
    if n_text == 0 or n_image == 0:
        raise ValueError("nothing to evaluate: no captions or no images")
    if pair_ids is None:
        if n_text != n_image:
            raise ValueError(f"{n_text} captions but {n_image} images and no pair_ids (for each caption, "
                             "the row of its image)")
        pair_ids = np.arange(n_text)
    pairs = np.asarray(pair_ids)
    if pairs.shape != (n_text,) or not np.issubdtype(pairs.dtype, np.integer) \
            or (pairs < 0).any() or (pairs >= n_image).any():
        raise ValueError(f"pair_ids must give, for each of the {n_text} captions, the row (0..{n_image - 1}) "
                         "of its image")
    pairs = pairs.astype(np.int64)
    if label_groups is not None:
        if len(label_groups) != n_image:
            raise ValueError(f"label_groups has {len(label_groups)} entries but there are {n_image} images "
                             "(one per image, None where an image has no labels)")
        image_codes = _group_codes(label_groups, "label groups")                  # (M,)  -1 = no labels
    else:
        image_codes = np.full(n_image, -1, dtype=np.int64)
    caption_codes = image_codes[pairs]                                            # (N,)  a caption has its image's labels
    block = max(1, int(query_block))

    def text_to_image_hits(start: int, stop: int) -> np.ndarray:
        own = pairs[start:stop, None] == np.arange(n_image)[None, :]              # (b, M)
        codes = caption_codes[start:stop, None]
        return own | ((codes == image_codes[None, :]) & (codes >= 0))

    def image_to_text_hits(start: int, stop: int) -> np.ndarray:
        own = np.arange(start, stop)[:, None] == pairs[None, :]                   # (b, N)
        codes = image_codes[start:stop, None]
        return own | ((codes == caption_codes[None, :]) & (codes >= 0))

    return {"text_to_image": _blocked_ranks(text, image, text_to_image_hits, block),
            "image_to_text": _blocked_ranks(image, text, image_to_text_hits, block)}


def retrieval_results(text_emb: np.ndarray, image_emb: np.ndarray, pair_ids: Sequence[int] | None,
                      label_groups: Sequence[Hashable | None] | None = None, ks: Sequence[int] = (1, 5, 10),
                      query_block: int = DEFAULT_QUERY_BLOCK) -> dict[str, RecallResult]:
    """Recall both ways with skip counts; keys "text_to_image" and "image_to_text".

    See ``retrieval_metrics`` for the arguments.
    """
    ks = _check_ks(ks)
    ranks = retrieval_ranks(text_emb, image_emb, pair_ids, label_groups, query_block)
    return {direction: recall_from_ranks(r, ks) for direction, r in ranks.items()}


def recall_metrics_from_ranks(ranks: Mapping[str, np.ndarray], ks: Sequence[int]) -> dict[str, float]:
    """``{direction}_recall@{k}`` for both directions of ``retrieval_ranks``' answer."""
    return {f"{direction}_recall@{k}": value for direction in ("text_to_image", "image_to_text")
            for k, value in recall_from_ranks(ranks[direction], ks).recall.items()}


def retrieval_metrics(text_emb: np.ndarray, image_emb: np.ndarray, pair_ids: Sequence[int] | None,
                      label_groups: Sequence[Hashable | None] | None = None, ks: Sequence[int] = (1, 5, 10),
                      query_block: int = DEFAULT_QUERY_BLOCK) -> dict[str, float]:
    """Recall@K text→image and image→text.

    ``text_emb`` (N, D) and ``image_emb`` (M, D), both L2-normalised. ``pair_ids`` (N,) gives for
    each caption the row of its image in ``image_emb``; None means caption i pairs with image i
    (needs N == M). ``label_groups`` (M,), optional: one hashable per image (e.g. its labels as
    canonical JSON), None for an image without labels; a caption has its image's labels. With
    labels, a hit is the paired item or any item whose labels are all equal; without, only the
    paired item. An image with no caption cannot be scored image→text and is skipped.

    Scores are computed ``query_block`` queries at a time, so memory is (block, gallery) float32.
    Returns keys ``text_to_image_recall@{k}`` and ``image_to_text_recall@{k}`` for k in ``ks``.
    """
    ks = _check_ks(ks)
    return recall_metrics_from_ranks(retrieval_ranks(text_emb, image_emb, pair_ids, label_groups, query_block), ks)


# --------------------------------------------------------------------------------------------
# zero-shot and linear probe


def _l2_normalise(x: np.ndarray) -> np.ndarray:
    # The floor keeps an all-zero row at zero instead of NaN (same guard as torch's F.normalize).
    return x / np.maximum(np.linalg.norm(x, axis=-1, keepdims=True), 1e-12)


def display_name(label_value: str) -> str:
    """A label value as words for a prompt: "fish_scale" -> "fish scale" (whitespace collapsed)."""
    return " ".join(str(label_value).replace("_", " ").split())


def class_text_embeddings(embed_text: Callable[[list[str]], np.ndarray], class_names: list[str],
                          templates: list[str]) -> np.ndarray:
    """(C, D) class embeddings by prompt ensembling (Radford et al. 2021, §3.1.4).

    Every ``template.format(name)`` is embedded (one call to ``embed_text`` for all C × T prompts),
    each prompt embedding is L2-normalised, the T of a class are averaged in embedding space, and
    the mean is L2-normalised again.
    """
    if not class_names:
        raise ValueError("no class names to embed (zero-shot needs at least one class)")
    if not templates:
        raise ValueError('no prompt templates (give at least one, e.g. "a photo of {}.")')
    for template in templates:
        if "{}" not in template:
            raise ValueError(f"prompt template {template!r} has no '{{}}' for the class name")
    prompts = [template.format(name) for name in class_names for template in templates]   # class-major
    embedded = np.asarray(embed_text(prompts), dtype=np.float32)                  # (C*T, D)
    if embedded.ndim != 2 or embedded.shape[0] != len(prompts):
        raise ValueError(f"the text embedder returned shape {embedded.shape} for {len(prompts)} prompts "
                         "(embed_text must return one row per prompt)")
    per_prompt = _l2_normalise(embedded).reshape(len(class_names), len(templates), -1)  # (C, T, D)
    return _l2_normalise(per_prompt.mean(axis=1))                                 # (C, D)


def zero_shot_accuracy(image_emb: np.ndarray, class_emb: np.ndarray, labels: Sequence[int]) -> float:
    """Fraction of images whose most similar class embedding is their label (ties: lower class index)."""
    image = np.asarray(image_emb, dtype=np.float32)                               # (N, D)
    classes = np.asarray(class_emb, dtype=np.float32)                             # (C, D)
    labels = np.asarray(labels)
    if image.ndim != 2 or classes.ndim != 2 or image.shape[1] != classes.shape[1]:
        raise ValueError(f"image embeddings {image.shape} and class embeddings {classes.shape} must be "
                         f"(N, D) and (C, D) with the same D")
    if labels.shape != (image.shape[0],):
        raise ValueError(f"{image.shape[0]} images but {labels.size} labels (give one label per image)")
    if image.shape[0] == 0:
        raise ValueError("no images to classify")
    if not np.issubdtype(labels.dtype, np.integer) or (labels < 0).any() or (labels >= classes.shape[0]).any():
        raise ValueError(f"labels must be class indices 0..{classes.shape[0] - 1}")
    predicted = (image @ classes.T).argmax(axis=1)                                # (N,)
    return float((predicted == labels).mean())


def linear_probe_accuracy(train_x: np.ndarray, train_y: Sequence, test_x: np.ndarray, test_y: Sequence,
                          C: float = 1.0, max_iter: int = 1000, seed: int = 0) -> float:
    """Test accuracy of a multinomial logistic regression on frozen features.

    Features are standardised with a StandardScaler fit on the training rows only; the classifier
    is scikit-learn's LogisticRegression (lbfgs; multinomial for more than two classes). A test
    class never seen in training cannot be predicted, so those rows count as wrong.
    """
    # Imported here: scikit-learn takes about a second to import and only the probe needs it.
    from sklearn.linear_model import LogisticRegression
    from sklearn.preprocessing import StandardScaler

    train_x = np.asarray(train_x, dtype=np.float64)
    test_x = np.asarray(test_x, dtype=np.float64)
    train_y, test_y = np.asarray(train_y), np.asarray(test_y)
    if train_x.ndim != 2 or test_x.ndim != 2 or train_x.shape[1] != test_x.shape[1]:
        raise ValueError(f"probe features must be (n, D) with one D, got {train_x.shape} and {test_x.shape}")
    if train_y.shape != (train_x.shape[0],) or test_y.shape != (test_x.shape[0],):
        raise ValueError("give one probe label per feature row")
    if test_x.shape[0] == 0:
        raise ValueError("no test rows for the linear probe")
    if np.unique(train_y).size < 2:
        raise ValueError(f"the linear probe needs at least two classes in the training rows, found "
                         f"{np.unique(train_y).size}")
    scaler = StandardScaler().fit(train_x)
    probe = LogisticRegression(C=C, max_iter=max_iter, solver="lbfgs", random_state=seed)
    probe.fit(scaler.transform(train_x), train_y)
    predicted = probe.predict(scaler.transform(test_x))
    return float((predicted == test_y).mean())


# --------------------------------------------------------------------------------------------
# uncertainty and errors


def bootstrap_recall_intervals(ranks: np.ndarray, ks: Sequence[int], resamples: int = 1000, seed: int = 0,
                               level: float = 0.95) -> dict[int, tuple[float, float]]:
    """Percentile-bootstrap interval of recall@K over the scored queries (Efron & Tibshirani 1993, §13.3).

    ``ranks`` as ``first_hit_ranks`` gives them (-1 = no hit, left out as in the recall). One set
    of ``resamples`` draws of the queries with replacement, ``numpy.random.default_rng(seed)
    .integers(0, n, (resamples, n))``, serves every K; the interval is the (1 - level) / 2 and
    (1 + level) / 2 quantiles (linear interpolation) of the resampled recalls. Drawn 256 resamples
    at a time (the same numbers as one draw), so memory stays at (256, n).
    """
    ks = _check_ks(ks)
    if resamples < 1 or not 0 < level < 1:
        raise ValueError(f"need at least one resample and a level in (0, 1), got {resamples} and {level}")
    valid = np.asarray(ranks)[np.asarray(ranks) >= 0]                             # (n,)
    if valid.size == 0:
        raise ValueError("no query has a hit in the gallery, so recall has no interval")
    rng, recalls = np.random.default_rng(seed), []
    for start in range(0, resamples, 256):
        drawn = valid[rng.integers(0, valid.size, (min(256, resamples - start), valid.size))]   # (b, n)
        recalls.append(np.stack([(drawn < k).mean(axis=1) for k in ks], axis=1))              # (b, len(ks))
    low, high = np.quantile(np.concatenate(recalls), [(1 - level) / 2, (1 + level) / 2], axis=0)  # (len(ks),)
    return {k: (float(lo), float(hi)) for k, lo, hi in zip(ks, low, high)}


def zero_shot_predictions(image_emb: np.ndarray, class_emb: np.ndarray) -> np.ndarray:
    """The class each image is most similar to (ties: lower class index). (N,) int"""
    return (np.asarray(image_emb, dtype=np.float32) @ np.asarray(class_emb, dtype=np.float32).T).argmax(axis=1)


def confusion_matrix(true: Sequence[int], predicted: Sequence[int], classes: int) -> np.ndarray:
    """(C, C) counts: row = true class, column = predicted class (scikit-learn's layout)."""
    true, predicted = np.asarray(true, dtype=np.int64), np.asarray(predicted, dtype=np.int64)
    if true.shape != predicted.shape or true.ndim != 1:
        raise ValueError(f"give one prediction per true class, got {true.shape} and {predicted.shape}")
    if true.size and (min(true.min(), predicted.min()) < 0 or max(true.max(), predicted.max()) >= classes):
        raise ValueError(f"class indices must lie in 0..{classes - 1}")
    return np.bincount(true * classes + predicted, minlength=classes * classes).reshape(classes, classes)


def per_class_recall(confusion: np.ndarray) -> np.ndarray:
    """Share of each true class predicted as itself; NaN for a class with no rows. (C,)"""
    support = confusion.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(support > 0, np.diag(confusion) / support, np.nan)


# --------------------------------------------------------------------------------------------
# display

_RECALL_KEY = re.compile(r"^(text_to_image|image_to_text)_recall@(\d+)$")
_FIELD_KEY = re.compile(r"^(zero_shot_accuracy|linear_probe_accuracy)/(.+)$")


def _cell(value) -> str:
    if value is None:
        return "—"
    if isinstance(value, (float, np.floating)):
        return "—" if math.isnan(value) else f"{value:.3f}"
    return str(value)


def format_metrics_table(metrics: Mapping[str, object], title: str = "evaluation") -> Table:
    """A rich table: recall@K both ways side by side, then zero-shot next to linear probe per field.

    Keys the table does not know are listed last, one per row.
    """
    recall: dict[int, dict[str, object]] = {}
    fields: dict[str, dict[str, object]] = {}
    others: list[tuple[str, object]] = []
    for key, value in metrics.items():
        if match := _RECALL_KEY.match(key):
            recall.setdefault(int(match.group(2)), {})[match.group(1)] = value
        elif match := _FIELD_KEY.match(key):
            fields.setdefault(match.group(2), {})[match.group(1)] = value
        else:
            others.append((key, value))

    # Each section: a header row and its body rows; the first header becomes the column headers.
    sections: list[tuple[tuple[str, str, str], list[tuple[str, str, str]]]] = []
    if recall:
        sections.append((("recall", "text → image", "image → text"),
                         [(f"R@{k}", _cell(recall[k].get("text_to_image")), _cell(recall[k].get("image_to_text")))
                          for k in sorted(recall)]))
    if fields:
        sections.append((("field", "zero-shot", "linear probe"),
                         [(name, _cell(row.get("zero_shot_accuracy")), _cell(row.get("linear_probe_accuracy")))
                          for name, row in fields.items()]))
    if others:
        sections.append((("other", "value", ""), [(key, _cell(value), "") for key, value in others]))
    if not sections:
        sections.append((("metric", "value", ""), []))

    first_header = sections[0][0]
    table = Table(title=title)
    table.add_column(first_header[0], style="bold")
    table.add_column(first_header[1], justify="right")
    table.add_column(first_header[2], justify="right")
    for index, (header, rows) in enumerate(sections):
        if index:
            table.add_section()
            table.add_row(*header, style="bold")
        for row in rows:
            table.add_row(*row)
    return table
