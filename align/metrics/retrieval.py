"""Recall@K both ways, text→image and image→text, over any gallery size.

Similarity is the dot product of L2-normalised embeddings (cosine similarity). ``exact`` scores in
blocks on both sides (``blocked``), every rank exact; ``faiss`` asks a flat inner-product index for
the top ``depth`` items (``faiss_ranks``), ranks past that depth reading "at least depth".
"""
from __future__ import annotations

from typing import Hashable, Mapping, Sequence

import numpy as np

from .blocked import DEFAULT_BLOCK, blocked_first_hit_ranks
from .faiss_ranks import faiss_first_hit_ranks
from .ranks import HitRule, check_ks, group_codes, recall_from_ranks, RecallResult

METHODS = ("exact", "faiss")


def _pairs_and_codes(n_text: int, n_image: int, pair_ids, label_groups) -> tuple[np.ndarray, np.ndarray]:
    """(N,) image row of each caption and (M,) label code of each image (-1 = no labels), checked."""
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
    if label_groups is None:
        return pairs.astype(np.int64), np.full(n_image, -1, dtype=np.int64)
    if len(label_groups) != n_image:
        raise ValueError(f"label_groups has {len(label_groups)} entries but there are {n_image} images "
                         "(one per image, None where an image has no labels)")
    return pairs.astype(np.int64), group_codes(label_groups, "label groups")


def retrieval_ranks(text_emb: np.ndarray, image_emb: np.ndarray, pair_ids: Sequence[int] | None,
                    label_groups: Sequence[Hashable | None] | None = None,
                    query_block: int = DEFAULT_BLOCK, gallery_block: int | None = None,
                    method: str = "exact", depth: int | None = None) -> dict[str, np.ndarray]:
    """First-hit ranks both ways (-1 = no hit); keys "text_to_image" (N,) and "image_to_text" (M,).

    See ``retrieval_metrics`` for the arguments. ``gallery_block`` defaults to ``query_block``.
    ``method="faiss"`` needs ``depth`` (the largest K): deeper ranks come back as ``depth``.
    """
    if method not in METHODS:
        raise ValueError(f"retrieval method must be one of {', '.join(METHODS)}, got {method!r}")
    if method == "faiss" and depth is None:
        raise ValueError("the faiss method ranks only the top items: give depth (the largest K)")
    # a list or tensor becomes an array; an ndarray (a memory map too) stays as it is, read by blocks
    text_emb, image_emb = (x if isinstance(x, np.ndarray) else np.asarray(x) for x in (text_emb, image_emb))
    for name, array in (("text embeddings", text_emb), ("image embeddings", image_emb)):
        if np.ndim(array) != 2:
            raise ValueError(f"{name} must be a 2-d (items, dim) array, got shape {np.shape(array)}")
    (n_text, dim_text), (n_image, dim_image) = text_emb.shape, image_emb.shape
    if dim_text != dim_image:
        raise ValueError(f"text embeddings are {dim_text}-d but image embeddings are {dim_image}-d")
    if n_text == 0 or n_image == 0:
        raise ValueError("nothing to evaluate: no captions or no images")
    pairs, image_codes = _pairs_and_codes(n_text, n_image, pair_ids, label_groups)
    caption_codes = image_codes[pairs]                                            # (N,) a caption has its image's labels
    images = np.arange(n_image)
    rules = {"text_to_image": HitRule(pairs, images, caption_codes, image_codes),
             "image_to_text": HitRule(images, pairs, image_codes, caption_codes)}
    sides = {"text_to_image": ((text_emb, "text embeddings"), (image_emb, "image embeddings")),
             "image_to_text": ((image_emb, "image embeddings"), (text_emb, "text embeddings"))}
    out = {}
    for direction, ((queries, q_name), (gallery, g_name)) in sides.items():
        if method == "faiss":
            out[direction] = faiss_first_hit_ranks(queries, gallery, rules[direction], int(depth), query_block,
                                                   (q_name, g_name))
        else:
            out[direction] = blocked_first_hit_ranks(queries, gallery, rules[direction], query_block,
                                                     gallery_block or query_block, (q_name, g_name))
    return out


def retrieval_results(text_emb: np.ndarray, image_emb: np.ndarray, pair_ids: Sequence[int] | None,
                      label_groups: Sequence[Hashable | None] | None = None, ks: Sequence[int] = (1, 5, 10),
                      query_block: int = DEFAULT_BLOCK, gallery_block: int | None = None,
                      method: str = "exact") -> dict[str, RecallResult]:
    """Recall both ways with skip counts; keys "text_to_image" and "image_to_text".

    See ``retrieval_metrics`` for the arguments.
    """
    ks = check_ks(ks)
    ranks = retrieval_ranks(text_emb, image_emb, pair_ids, label_groups, query_block, gallery_block, method, max(ks))
    return {direction: recall_from_ranks(r, ks) for direction, r in ranks.items()}


def recall_metrics_from_ranks(ranks: Mapping[str, np.ndarray], ks: Sequence[int]) -> dict[str, float]:
    """``{direction}_recall@{k}`` for both directions of ``retrieval_ranks``' answer."""
    return {f"{direction}_recall@{k}": value for direction in ("text_to_image", "image_to_text")
            for k, value in recall_from_ranks(ranks[direction], ks).recall.items()}


def retrieval_metrics(text_emb: np.ndarray, image_emb: np.ndarray, pair_ids: Sequence[int] | None,
                      label_groups: Sequence[Hashable | None] | None = None, ks: Sequence[int] = (1, 5, 10),
                      query_block: int = DEFAULT_BLOCK, gallery_block: int | None = None,
                      method: str = "exact") -> dict[str, float]:
    """Recall@K text→image and image→text.

    ``text_emb`` (N, D) and ``image_emb`` (M, D), both L2-normalised (any row-sliceable array, a
    memory map too). ``pair_ids`` (N,) gives for each caption the row of its image in
    ``image_emb``; None means caption i pairs with image i (needs N == M). ``label_groups`` (M,),
    optional: one hashable per image (e.g. its labels as canonical JSON), None for an image without
    labels; a caption has its image's labels. With labels, a hit is the paired item or any item
    whose labels are all equal; without, only the paired item. An image with no caption cannot be
    scored image→text and is skipped.

    Scores are computed in (query_block, gallery_block) pieces, so memory does not grow with either
    side. Returns keys ``text_to_image_recall@{k}`` and ``image_to_text_recall@{k}`` for k in ``ks``.
    """
    ks = check_ks(ks)
    return recall_metrics_from_ranks(retrieval_ranks(text_emb, image_emb, pair_ids, label_groups, query_block,
                                                     gallery_block, method, max(ks)), ks)
