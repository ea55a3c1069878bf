"""Checks of align.metrics against references outside the project.

References: torchmetrics' retrieval metrics, scikit-learn (top_k_accuracy_score, LogisticRegression,
the bundled digits set), numpy re-implementations written here independently of the module, and
Radford et al. 2021 §3.1.4 for prompt ensembling.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
import torch
from rich.console import Console
from sklearn.datasets import load_digits
from sklearn.metrics import top_k_accuracy_score
from sklearn.model_selection import train_test_split
from torchmetrics.functional.retrieval import retrieval_hit_rate, retrieval_recall
from torchmetrics.retrieval import RetrievalHitRate, RetrievalRecall

from align.metrics import (
    bootstrap_recall_intervals,
    class_text_embeddings,
    display_name,
    first_hit_ranks,
    format_metrics_table,
    hit_matrix,
    linear_probe_accuracy,
    recall_at_k,
    retrieval_metrics,
    retrieval_ranks,
    retrieval_results,
    score_recall,
    zero_shot_accuracy,
)

KS = (1, 3, 5, 10)


def _unit_rows(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    x = rng.standard_normal((n, d)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def _reference_ranks(scores: np.ndarray, hits: np.ndarray) -> np.ndarray:
    """Independent numpy reference: position of the first hit in a stable descending sort."""
    order = np.argsort(-scores, axis=1, kind="stable")          # numpy's stable sort keeps index order on ties
    sorted_hits = np.take_along_axis(hits, order, axis=1)
    ranks = sorted_hits.argmax(axis=1)
    ranks[~hits.any(axis=1)] = -1
    return ranks


# ---------------------------------------------------------------------------------------------
# recall_at_k


def test_recall_single_hit_matches_torchmetrics_and_sklearn():
    rng = np.random.default_rng(0)
    queries, gallery = 40, 30
    scores = rng.standard_normal((queries, gallery)).astype(np.float32)   # continuous: no ties
    assert all(np.unique(row).size == gallery for row in scores)
    target = rng.integers(0, gallery, size=queries)
    hits = np.zeros((queries, gallery), dtype=bool)
    hits[np.arange(queries), target] = True

    ours = recall_at_k(scores, hits, KS)
    for k in KS:
        # torchmetrics RetrievalRecall(top_k=k): fraction of a query's relevant items in its top k,
        # averaged over queries; with one relevant item per query that is "hit in top k".
        metric = RetrievalRecall(top_k=k)
        indexes = torch.arange(queries).repeat_interleave(gallery)
        metric.update(torch.from_numpy(scores).flatten(), torch.from_numpy(hits).flatten(), indexes=indexes)
        assert ours[k] == pytest.approx(float(metric.compute()), abs=1e-6)
        # the functional form, per query and averaged, agrees as well
        per_query = [float(retrieval_recall(torch.from_numpy(scores[q]), torch.from_numpy(hits[q]), top_k=k))
                     for q in range(queries)]
        assert ours[k] == pytest.approx(np.mean(per_query), abs=1e-6)
        # scikit-learn top_k_accuracy_score: each gallery item is a "class", the hit is the true one
        sk = top_k_accuracy_score(target, scores, k=k, labels=np.arange(gallery)) if k < gallery else 1.0
        assert ours[k] == pytest.approx(sk, abs=1e-6)


def test_recall_multi_hit_matches_torchmetrics_hit_rate():
    rng = np.random.default_rng(1)
    queries, gallery = 50, 40
    scores = rng.standard_normal((queries, gallery)).astype(np.float32)
    # label-based hits: several gallery items share a query's label; label 9 is absent from the
    # gallery, so those queries have no hit and must be skipped.
    query_labels = rng.integers(0, 10, size=queries)
    gallery_labels = rng.integers(0, 9, size=gallery)
    hits = hit_matrix(query_labels.tolist(), gallery_labels.tolist())
    assert hits.sum(axis=1).max() > 1                               # genuinely multi-hit
    no_hit = int((~np.isin(query_labels, gallery_labels)).sum())
    assert no_hit >= int((query_labels == 9).sum()) > 0

    result = score_recall(scores, hits, KS)
    assert result.skipped == no_hit and result.scored == queries - no_hit
    for k in KS:
        # torchmetrics RetrievalHitRate(top_k=k): 1 if any relevant item is in the top k; queries
        # without a relevant item are skipped with empty_target_action="skip".
        metric = RetrievalHitRate(top_k=k, empty_target_action="skip")
        indexes = torch.arange(queries).repeat_interleave(gallery)
        metric.update(torch.from_numpy(scores).flatten(), torch.from_numpy(hits).flatten(), indexes=indexes)
        assert result.recall[k] == pytest.approx(float(metric.compute()), abs=1e-6)
        per_query = [float(retrieval_hit_rate(torch.from_numpy(scores[q]), torch.from_numpy(hits[q]), top_k=k))
                     for q in range(queries) if hits[q].any()]
        assert result.recall[k] == pytest.approx(np.mean(per_query), abs=1e-6)
    # torchmetrics' RetrievalRecall (fraction of relevant items found) is a different quantity
    # here: with several hits per query it is lower at small K.
    recall_fraction = RetrievalRecall(top_k=1, empty_target_action="skip")
    recall_fraction.update(torch.from_numpy(scores).flatten(), torch.from_numpy(hits).flatten(),
                           indexes=torch.arange(queries).repeat_interleave(gallery))
    assert float(recall_fraction.compute()) < result.recall[1]


def test_ties_break_by_gallery_index():
    # Documented contract: equal scores rank lower gallery index first, the order numpy's stable
    # argsort of -scores gives.
    scores = np.zeros((1, 6), dtype=np.float32)
    hits = np.zeros((1, 6), dtype=bool)
    hits[0, 3] = True
    assert first_hit_ranks(scores, hits).tolist() == [3]
    assert recall_at_k(scores, hits, [3, 4]) == {3: 0.0, 4: 1.0}
    # random integer scores with many ties against the stable-sort reference
    rng = np.random.default_rng(2)
    scores = rng.integers(0, 4, size=(60, 25)).astype(np.float32)
    hits = rng.random((60, 25)) < 0.1
    np.testing.assert_array_equal(first_hit_ranks(scores, hits), _reference_ranks(scores, hits))


def test_recall_errors_say_what_is_wrong():
    # the metrics are pure: plain ValueErrors, which the evaluator turns into user-facing errors
    scores = np.zeros((2, 3), dtype=np.float32)
    with pytest.raises(ValueError, match="positive integers"):
        recall_at_k(scores, np.ones((2, 3), bool), [0])
    with pytest.raises(ValueError, match="none of the 2 queries"):
        recall_at_k(scores, np.zeros((2, 3), bool), [1])
    with pytest.raises(ValueError, match="one shape"):
        recall_at_k(scores, np.ones((3, 2), bool), [1])
    with pytest.raises(ValueError, match="NaN"):
        recall_at_k(np.full((2, 3), np.nan, np.float32), np.ones((2, 3), bool), [1])


def test_hit_matrix_equals_broadcast_equality():
    # numpy reference: elementwise equality of the id arrays
    rng = np.random.default_rng(3)
    q, g = rng.integers(0, 5, 12), rng.integers(0, 5, 9)
    np.testing.assert_array_equal(hit_matrix(q.tolist(), g.tolist()), q[:, None] == g[None, :])
    labels = [json.dumps({"glaze": "sage", "pattern": p}, sort_keys=True) for p in ("chevron", "terrazzo")]
    assert hit_matrix(labels, labels[::-1] + [None]).tolist() == [[False, True, False], [True, False, False]]
    with pytest.raises(ValueError, match="canonical JSON"):
        hit_matrix([{"glaze": "sage"}], ["x"])


# ---------------------------------------------------------------------------------------------
# retrieval_metrics


def _reference_retrieval(text, image, pairs, image_labels, ks):
    """Full-matrix numpy reference for both directions (labels per image; None = pair only)."""
    n, m = len(text), len(image)
    caption_labels = [image_labels[p] for p in pairs]
    t2i = np.zeros((n, m), bool)
    for i in range(n):
        for j in range(m):
            t2i[i, j] = pairs[i] == j or (caption_labels[i] is not None and caption_labels[i] == image_labels[j])
    out = {}
    for name, scores, hits in (("text_to_image", text @ image.T, t2i), ("image_to_text", image @ text.T, t2i.T)):
        ranks = _reference_ranks(scores, hits)
        valid = ranks[ranks >= 0]
        for k in ks:
            out[f"{name}_recall@{k}"] = float((valid < k).mean())
    return out


def test_retrieval_perfect_embeddings_score_one():
    rng = np.random.default_rng(4)
    emb = _unit_rows(rng, 64, 32)
    metrics = retrieval_metrics(emb, emb.copy(), list(range(64)), ks=(1, 5, 10))
    assert sorted(metrics) == sorted([f"{d}_recall@{k}" for d in ("text_to_image", "image_to_text") for k in (1, 5, 10)])
    assert all(v == 1.0 for v in metrics.values())


def test_retrieval_shuffled_pairs_near_chance():
    rng = np.random.default_rng(5)
    n = 500
    emb = _unit_rows(rng, n, 48)
    shuffled = emb[rng.permutation(n)]        # each caption now points at an unrelated image
    metrics = retrieval_metrics(emb, shuffled, np.arange(n), ks=(1, 5, 10))
    for k in (1, 5, 10):
        # chance: the paired image sits at a uniformly random rank, so P(top K) = K/G; allow five
        # binomial standard deviations over the N queries (plus 1/G for fixed points of the shuffle).
        chance = k / n
        bound = 5 * math.sqrt(chance * (1 - chance) / n) + 1 / n
        for direction in ("text_to_image", "image_to_text"):
            assert abs(metrics[f"{direction}_recall@{k}"] - chance) <= bound


def test_retrieval_with_labels_and_blocks_matches_reference():
    rng = np.random.default_rng(6)
    m = 45
    image = _unit_rows(rng, m, 16)
    # two captions for most images, none for the last three: an uncaptioned image is scored
    # image→text only through its labels, and skipped when it has none
    pairs = np.array([j for j in range(m - 3) for _ in range(2)])
    text = image[pairs] + 0.6 * rng.standard_normal((len(pairs), 16)).astype(np.float32)
    text /= np.linalg.norm(text, axis=1, keepdims=True)
    patterns = ["chevron", "terrazzo", "pinstripe"]
    image_labels = [None if j % 7 == 0 else json.dumps({"pattern": patterns[j % 3]}) for j in range(m)]
    ks = (1, 5, 10)
    reference = _reference_retrieval(text, image, pairs, image_labels, ks)

    full = retrieval_metrics(text, image, pairs, image_labels, ks)
    blocked = retrieval_metrics(text, image, pairs, image_labels, ks, query_block=7)
    assert full == pytest.approx(reference, abs=1e-9)
    assert blocked == pytest.approx(reference, abs=1e-9)
    results = retrieval_results(text, image, pairs, image_labels, ks, query_block=7)
    uncaptioned_unlabelled = sum(image_labels[j] is None for j in range(m - 3, m))
    assert uncaptioned_unlabelled == 1                               # image 42 (42 % 7 == 0)
    assert results["image_to_text"].skipped == 1 and results["text_to_image"].skipped == 0
    # labels make retrieval easier than pair-only at R@1 on this noisy set (more items count as hits)
    pair_only = retrieval_metrics(text, image, pairs, None, ks)
    assert pair_only == pytest.approx(_reference_retrieval(text, image, pairs, [None] * m, ks), abs=1e-9)
    assert full["text_to_image_recall@1"] >= pair_only["text_to_image_recall@1"]


def _tied_rows(rng: np.random.Generator, n: int) -> np.ndarray:
    """Unit rows with entries ±0.5 in 4-d: every dot product is a multiple of 1/4, exact in any
    summation order, so scores tie often and a block's product equals the whole matrix's bit for bit."""
    return (rng.integers(0, 2, (n, 4)) - 0.5).astype(np.float32)


def _reference_ranks_both_ways(text, image, pairs, image_labels):
    """Full-matrix numpy reference ranks (stable descending sort: ties by index), both directions."""
    caption_labels = [image_labels[p] for p in pairs]
    t2i = np.array([[pairs[i] == j or (caption_labels[i] is not None and caption_labels[i] == image_labels[j])
                     for j in range(len(image))] for i in range(len(text))])
    return {"text_to_image": _reference_ranks(text @ image.T, t2i),
            "image_to_text": _reference_ranks(image @ text.T, t2i.T)}


@pytest.mark.parametrize("query_block,gallery_block", [(1, 1), (3, 5), (7, 2), (16, 29), (29, 16), (100, 4)])
def test_blocked_ranks_equal_the_whole_matrix_with_ties(query_block, gallery_block):
    rng = np.random.default_rng(12)
    m = 29
    image = _tied_rows(rng, m)
    pairs = rng.integers(0, m - 2, 37)                      # two images without a caption
    text = _tied_rows(rng, 37)
    image_labels = [None if j % 5 == 0 else json.dumps({"pattern": ["chevron", "terrazzo"][j % 2]})
                    for j in range(m)]
    for labels in (image_labels, None):
        reference = _reference_ranks_both_ways(text, image, pairs, labels or [None] * m)
        scores = text @ image.T
        assert (np.sort(scores, axis=1)[:, 1:] == np.sort(scores, axis=1)[:, :-1]).any()  # ties present
        blocked = retrieval_ranks(text, image, pairs, labels, query_block=query_block, gallery_block=gallery_block)
        for direction in ("text_to_image", "image_to_text"):
            # reference: numpy's stable argsort of the whole (Q, G) score matrix, first hit's position
            np.testing.assert_array_equal(blocked[direction], reference[direction])


def test_blocked_recall_equals_torchmetrics_on_continuous_scores():
    rng = np.random.default_rng(13)
    text, image = _unit_rows(rng, 50, 8), _unit_rows(rng, 50, 8)
    metrics = retrieval_metrics(text, image, None, ks=KS, query_block=6, gallery_block=11)
    for k in KS:
        # torchmetrics RetrievalHitRate over the whole (50, 50) matrix, one relevant item per query
        for name, scores in (("text_to_image", text @ image.T), ("image_to_text", image @ text.T)):
            metric = RetrievalHitRate(top_k=k)
            metric.update(torch.from_numpy(scores).flatten(), torch.eye(50, dtype=torch.bool).flatten(),
                          indexes=torch.arange(50).repeat_interleave(50))
            assert metrics[f"{name}_recall@{k}"] == pytest.approx(float(metric.compute()), abs=1e-6)


def test_blocked_ranks_read_a_float16_memory_map(tmp_path):
    # a gallery left on disk as float16 rows is read a block at a time; equals the float32 copy
    rng = np.random.default_rng(14)
    image = _unit_rows(rng, 40, 8).astype(np.float16)
    mapped = np.memmap(tmp_path / "rows.f16", dtype=np.float16, mode="w+", shape=image.shape)
    mapped[:] = image
    text = _unit_rows(rng, 40, 8)
    direct = retrieval_ranks(text, image.astype(np.float32), None, query_block=9)
    from_map = retrieval_ranks(text, np.memmap(tmp_path / "rows.f16", dtype=np.float16, mode="r", shape=image.shape),
                               None, query_block=9)
    for direction in direct:
        np.testing.assert_array_equal(from_map[direction], direct[direction])


def test_faiss_ranks_equal_exact_on_continuous_scores():
    rng = np.random.default_rng(15)
    m = 120
    image = _unit_rows(rng, m, 16)
    pairs = rng.integers(0, m - 4, 150)
    text = image[pairs] + 0.8 * rng.standard_normal((150, 16)).astype(np.float32)
    text /= np.linalg.norm(text, axis=1, keepdims=True)
    image_labels = [None if j % 4 == 0 else json.dumps({"glaze": str(j % 7)}) for j in range(m)]
    for labels in (image_labels, None):
        exact = retrieval_ranks(text, image, pairs, labels, query_block=32)
        deep = retrieval_ranks(text, image, pairs, labels, query_block=32, method="faiss", depth=10)
        for direction in exact:
            # reference: the exact blocked path (itself checked against numpy's stable sort above);
            # faiss knows ranks only down to its depth, deeper ones read as the depth
            np.testing.assert_array_equal(deep[direction], np.where(exact[direction] >= 10, 10, exact[direction]))
        assert (exact["image_to_text"] == -1).any()   # uncaptioned, unlabelled images: skipped on both paths
        assert retrieval_metrics(text, image, pairs, labels, KS, method="faiss") == \
            retrieval_metrics(text, image, pairs, labels, KS)
    with pytest.raises(ValueError, match="depth"):
        retrieval_ranks(text, image, pairs, method="faiss")
    with pytest.raises(ValueError, match="exact, faiss"):
        retrieval_ranks(text, image, pairs, method="annoy")


def test_bootstrap_drawn_in_pieces_equals_one_draw(monkeypatch):
    import align.metrics.intervals as intervals

    ranks = np.random.default_rng(16).integers(-1, 30, 301)
    valid = ranks[ranks >= 0]
    monkeypatch.setattr(intervals, "DRAW_ELEMENTS", 3 * valid.size + 1)   # three resamples per draw
    pieces = bootstrap_recall_intervals(ranks, [1, 5], resamples=100, seed=3)
    # reference: numpy's generator drawing all (100, n) indices at once, the percentile interval
    draws = np.random.default_rng(3).integers(0, valid.size, (100, valid.size))
    for k in (1, 5):
        low, high = np.quantile((valid[draws] < k).mean(axis=1), [0.025, 0.975])
        assert pieces[k] == pytest.approx((float(low), float(high)), abs=1e-12)   # the mean's summation order aside


def test_retrieval_rejects_bad_input():
    rng = np.random.default_rng(7)
    emb = _unit_rows(rng, 5, 4)
    with pytest.raises(ValueError, match="not L2-normalised"):
        retrieval_metrics(emb * 3, emb, range(5))
    with pytest.raises(ValueError, match="pair_ids"):
        retrieval_metrics(emb, emb, [0, 1, 2, 3, 9])
    with pytest.raises(ValueError, match="4-d"):
        retrieval_metrics(emb, _unit_rows(rng, 5, 3), range(5))
    with pytest.raises(ValueError, match="label_groups has 2"):
        retrieval_metrics(emb, emb, range(5), ["a", "b"])


# ---------------------------------------------------------------------------------------------
# zero-shot


def test_class_text_embeddings_hand_computation():
    # Prompt ensembling, Radford et al. 2021 §3.1.4: normalise each prompt embedding, average,
    # normalise the mean. Vectors of unequal length show the per-prompt normalisation matters.
    table = {
        "a cobalt tile": [3.0, 4.0, 0.0],      # -> (0.6, 0.8, 0)
        "cobalt glaze": [10.0, 0.0, 0.0],      # -> (1, 0, 0)
        "a sage tile": [0.0, 0.0, 2.0],        # -> (0, 0, 1)
        "sage glaze": [0.0, 0.5, 0.0],         # -> (0, 1, 0)
    }
    seen = []

    def embed(texts):
        seen.extend(texts)
        return np.array([table[t] for t in texts])

    out = class_text_embeddings(embed, ["cobalt", "sage"], ["a {} tile", "{} glaze"])
    assert sorted(seen) == sorted(table)
    # by hand: mean (0.8, 0.4, 0) / |.| = (2, 1, 0)/sqrt(5); mean (0, .5, .5) / |.| = (0, 1, 1)/sqrt(2)
    expected = np.array([[2 / math.sqrt(5), 1 / math.sqrt(5), 0.0], [0.0, 1 / math.sqrt(2), 1 / math.sqrt(2)]])
    np.testing.assert_allclose(out, expected, atol=1e-6)
    with pytest.raises(ValueError, match="has no"):
        class_text_embeddings(embed, ["cobalt"], ["no placeholder"])


def test_zero_shot_accuracy_equals_direct_argmax():
    rng = np.random.default_rng(8)
    images, classes = _unit_rows(rng, 200, 24), _unit_rows(rng, 7, 24)
    labels = rng.integers(0, 7, 200)
    # numpy reference: argmax of cosine similarity, computed in float64
    direct = float((np.argmax(images.astype(np.float64) @ classes.T.astype(np.float64), axis=1) == labels).mean())
    assert zero_shot_accuracy(images, classes, labels) == pytest.approx(direct)
    # images built near their class score perfectly
    near = classes[labels] + 0.05 * rng.standard_normal((200, 24)).astype(np.float32)
    assert zero_shot_accuracy(near, classes, labels) == 1.0
    with pytest.raises(ValueError, match="class indices"):
        zero_shot_accuracy(images, classes, labels + 7)


# ---------------------------------------------------------------------------------------------
# linear probe


def _digits_split():
    digits = load_digits()   # scikit-learn's bundled copy of the UCI optical handwritten digits (8x8)
    return train_test_split(digits.data, digits.target, test_size=0.25, random_state=0, stratify=digits.target)


def test_linear_probe_on_digits():
    train_x, test_x, train_y, test_y = _digits_split()
    accuracy = linear_probe_accuracy(train_x, train_y, test_x, test_y)
    # from memory: logistic regression on standardised digit pixels scores about 0.95-0.97 held out
    assert accuracy >= 0.9


def test_linear_probe_unseen_test_class_counts_as_wrong():
    train_x, test_x, train_y, test_y = _digits_split()
    keep = train_y != 9                        # the probe never sees a 9
    accuracy = linear_probe_accuracy(train_x[keep], train_y[keep], test_x, test_y)
    seen = test_y != 9
    accuracy_seen = linear_probe_accuracy(train_x[keep], train_y[keep], test_x[seen], test_y[seen])
    # every test 9 is wrong, so the overall accuracy is the seen-class accuracy scaled by their share
    assert accuracy == pytest.approx(accuracy_seen * seen.mean(), abs=1e-12)
    with pytest.raises(ValueError, match="two classes"):
        linear_probe_accuracy(train_x[:5], np.zeros(5), test_x, test_y)


# ---------------------------------------------------------------------------------------------
# display


def test_display_name():
    assert display_name("fish_scale") == "fish scale"
    assert display_name("  terrazzo_speckle ") == "terrazzo speckle"
    assert display_name("cobalt") == "cobalt"


def test_format_metrics_table_groups_rows():
    metrics = {"text_to_image_recall@5": 0.8, "image_to_text_recall@5": 0.7, "text_to_image_recall@1": 0.5,
               "image_to_text_recall@1": 0.4, "zero_shot_accuracy/glaze": 0.61, "linear_probe_accuracy/glaze": 0.93,
               "zero_shot_accuracy/pattern": 0.52, "images": 120}
    console = Console(record=True, width=100)   # rich renders to plain text for inspection
    console.print(format_metrics_table(metrics))
    lines = console.export_text().splitlines()
    row = {line.split()[1]: line for line in lines if len(line.split()) > 1}
    assert "0.500" in row["R@1"] and "0.400" in row["R@1"]
    assert row["R@1"].index("0.500") < row["R@1"].index("0.400")        # text → image column first
    assert lines.index(row["R@1"]) < lines.index(row["R@5"])            # K ascending
    assert "0.610" in row["glaze"] and "0.930" in row["glaze"]
    assert "0.520" in row["pattern"] and "—" in row["pattern"]          # missing probe value shown as a dash
    assert "120" in row["images"]
