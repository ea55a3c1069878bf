"""Evaluate a run: retrieval both ways, zero-shot per label field, and the linear-probe ceiling.

Beside ``metrics.json`` it keeps the details a person looks at (recall with bootstrap intervals,
each field's confusion matrix, retrieval examples) in ``evaluation.json`` and writes the report.
With no checkpoint named it takes the run's default (the best validation step's under
``train.keep_best``, else the newest) and says which.

The linear probe is trained on the same frozen image features the text side was aligned to, so it
is the ceiling zero-shot classification is chasing: the closer the two, the better the text tower
has learned to name what the image tower already sees.

At scale: the evaluation images are held once as float32 unit rows (the gallery every measure
reads); scores are computed in ``eval.block_rows`` blocks on both sides (or by faiss under
``eval.recall_method = "faiss"``); the probe reads only its sample of the training rows (at most
``eval.probe_rows``, stratified per field) from the feature cache's float16 memory map.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from rich.console import Console

from . import artifacts as A
from .data.shards import SplitTable, load_table
from .errors import DataError
from .features import FeatureSet, split_features
from .fileio import write_json_atomic
from .labels import label_group
from .metrics import (class_text_embeddings, display_name, format_metrics_table, linear_probe_accuracy,
                      recall_metrics_from_ranks, retrieval_ranks, stratified_sample, zero_shot_predictions)
from .report import write_details, write_report
from .report.details import bootstrap_note, field_detail, recall_with_intervals, retrieval_examples
from .run import RunDir, shards_dir

# metrics.json keys "<name>/<field>" that belong to the default evaluation (not a tagged set)
FIELD_METRICS = ("zero_shot_accuracy", "linear_probe_accuracy", "linear_probe_rows")


def _field_values(labels: list[dict], field: str) -> list[str | None]:
    return [str(lab[field]) if field in lab else None for lab in labels]


def _rows_with_features(table: SplitTable, feats: FeatureSet) -> list[int]:
    """Table rows of the images that decoded, in feature order."""
    rows = {k: i for i, k in enumerate(table.keys)}
    return [rows[k] for k in feats.keys]


def unit_rows(feats: FeatureSet, rows: np.ndarray, block: int) -> np.ndarray:
    """View-0 rows ``rows`` as float32 unit rows, read ``block`` at a time from the float16 memory
    map through ``FeatureSet.unit_rows`` (the rows training sees), so no second float32 copy of the
    table exists. (n, D)"""
    rows = np.asarray(rows, dtype=np.int64)
    out = np.empty((rows.size, feats.array.shape[2]), dtype=np.float32)          # (n, D)
    for start in range(0, rows.size, block):
        out[start:start + block] = feats.unit_rows(rows[start:start + block]).numpy()  # (b, D)
    return out


def _probe(recipe, train_feats: FeatureSet, train_values: list[str | None], image_emb: np.ndarray,
           have: list[int], eval_values: list[str | None]) -> tuple[float, int]:
    """Linear-probe accuracy on the field's stratified training sample, and the sample's size."""
    train_have = np.array([i for i, v in enumerate(train_values) if v is not None], dtype=np.int64)
    values = np.array([train_values[i] for i in train_have], dtype=object)
    sample = stratified_sample(values.astype(str), recipe.eval.probe_rows, recipe.train.seed)  # (n,) ascending
    train_x = unit_rows(train_feats, train_have[sample], recipe.eval.block_rows)  # (n, D)
    accuracy = linear_probe_accuracy(train_x, values[sample].tolist(), image_emb, [eval_values[i] for i in have],
                                     C=recipe.eval.probe_c, max_iter=recipe.eval.probe_max_iter,
                                     seed=recipe.train.seed, test_rows=have, block=recipe.eval.block_rows)
    return accuracy, int(sample.size)


def _zero_shot_and_probe(recipe, embed, labels: list[dict], image_emb: np.ndarray, train_labels: list[dict],
                         train_feats: FeatureSet) -> tuple[dict, dict]:
    """Zero-shot per label field (prompt ensembling) beside the linear probe on the same features.
    Returns (metrics, per field: its classes, confusion matrix and per-class recall)."""
    metrics: dict = {}
    details: dict = {}
    for field in sorted({f for lab in labels for f in lab}):
        eval_values = _field_values(labels, field)
        train_values = _field_values(train_labels, field)
        classes = sorted({v for v in eval_values + train_values if v is not None})
        if len(classes) < 2:
            continue
        index = {c: i for i, c in enumerate(classes)}
        templates = recipe.eval.field_prompts.get(field, recipe.eval.prompts)
        class_emb = class_text_embeddings(embed, [display_name(c) for c in classes], templates)
        have = [i for i, v in enumerate(eval_values) if v is not None]
        true = np.array([index[eval_values[i]] for i in have], dtype=np.int64)
        predicted = zero_shot_predictions(image_emb, class_emb, recipe.eval.block_rows)[have]  # (n,)
        metrics[f"zero_shot_accuracy/{field}"] = float((predicted == true).mean())
        if len({v for v in train_values if v is not None}) >= 2:
            metrics[f"linear_probe_accuracy/{field}"], metrics[f"linear_probe_rows/{field}"] = _probe(
                recipe, train_feats, train_values, image_emb, have, eval_values)
        details[field] = field_detail(classes, true.tolist(), predicted, metrics[f"zero_shot_accuracy/{field}"],
                                      metrics.get(f"linear_probe_accuracy/{field}"))
    return metrics, details


def _write_metrics(run: RunDir, prefixed: dict, tag: str | None, checkpoint: Path, choice: str) -> None:
    """Merge into metrics.json: a fresh default evaluation replaces the unprefixed keys, keeps tagged sets."""
    path = run.path / A.METRICS
    existing = json.loads(path.read_text(encoding="utf-8")) if path.is_file() else {}
    if not tag:
        existing = {k: v for k, v in existing.items() if "/" in k and k.split("/")[0] not in FIELD_METRICS}
    existing.update(prefixed)
    existing["checkpoint"] = checkpoint.name
    existing["checkpoint_choice"] = choice
    write_json_atomic(path, existing)


def _retrieval_note(recipe) -> dict:
    """How recall ranked the gallery, for evaluation.json."""
    note = {"method": recipe.eval.recall_method, "block_rows": recipe.eval.block_rows}
    if recipe.eval.recall_method == "faiss":
        note["ranks_at_most"] = max(recipe.eval.recall_ks)  # deeper first hits read as this rank
    return note


def evaluate_run(run_dir: str | Path, shards: str | Path | None = None, tag: str | None = None,
                 console: Console | None = None, write: bool = True, checkpoint: str | Path | None = None,
                 report: bool = True) -> dict:
    """Score the default (or given) checkpoint of ``run_dir`` on the eval split; write ``metrics.json``,
    ``evaluation.json`` and, with ``report``, the report.

    ``shards`` evaluates on another packed folder (its eval split); ``tag`` prefixes the keys
    (``tag/...``) so several evaluation sets share one metrics.json.
    """
    console = console or Console(stderr=True)
    run = RunDir(run_dir)
    recipe = run.recipe()
    train_dir = shards_dir(recipe)
    eval_dir = Path(shards) if shards else train_dir
    split = recipe.data.eval_split

    # Frozen features (the tower's, or stored vectors) for the evaluation images and, for the probe
    # and class list, the training images.
    eval_table = load_table(eval_dir, split)
    eval_side = split_features(recipe.vision, eval_dir, split, console)
    eval_feats = eval_side.features
    train_table = load_table(train_dir, recipe.data.train_split)
    train_feats = split_features(recipe.vision, train_dir, recipe.data.train_split, console).features

    trained = run.load_trained(eval_side.fingerprint["feature_dim"], checkpoint, recipe)
    run.check_tower(trained.checkpoint, eval_side.fingerprint)
    choice = run.describe(trained.checkpoint)
    console.print(f"evaluating {choice}")

    # Retrieval both ways; a hit is any image with the same labels (or the pair itself without labels).
    keep = _rows_with_features(eval_table, eval_feats)
    captions = [eval_table.captions[i] for i in keep]
    labels = [eval_table.labels[i] for i in keep]
    image_emb = unit_rows(eval_feats, np.arange(len(keep)), recipe.eval.block_rows)  # (N, D)
    text_emb = trained.tower.embed(captions).numpy()  # (N, D)
    groups = [label_group(lab) for lab in labels]  # None: an unlabelled image matches only its pair
    train_labels = [train_table.labels[i] for i in _rows_with_features(train_table, train_feats)]
    block, ks = recipe.eval.block_rows, recipe.eval.recall_ks
    try:  # the metrics are pure functions: their plain errors become a message with a hint here
        ranks = retrieval_ranks(text_emb, image_emb, None, groups if any(g is not None for g in groups) else None,
                                query_block=block, gallery_block=block, method=recipe.eval.recall_method,
                                depth=max(ks))
        metrics: dict = recall_metrics_from_ranks(ranks, ks)
        field_metrics, fields = _zero_shot_and_probe(recipe, lambda texts: trained.tower.embed(texts).numpy(),
                                                     labels, image_emb, train_labels, train_feats)
        metrics |= field_metrics
        recall = recall_with_intervals(ranks, ks)
    except ValueError as exc:
        raise DataError(f"cannot evaluate {run.path} ({trained.checkpoint.name}) on {eval_dir} [{split}]: {exc}",
                        "check that the split has decodable images with captions, and that the run's weights "
                        "are finite (a run that diverged has nothing to measure)") from None
    metrics["eval_pairs"] = len(captions)
    metrics["temperature"] = float(trained.loss_fn.temperature())

    prefixed = {f"{tag}/{k}": v for k, v in metrics.items()} if tag else dict(metrics)
    if write:
        _write_metrics(run, prefixed, tag, trained.checkpoint, choice)
        write_details(run.path, tag, {
            "checkpoint": trained.checkpoint.name, "checkpoint_choice": choice, "split": split,
            "shards": str(Path(eval_dir).resolve()), "pairs": len(captions), "bootstrap": bootstrap_note(),
            "retrieval": _retrieval_note(recipe), "recall": recall, "fields": fields,
            "examples": retrieval_examples(text_emb, image_emb, groups, captions, [eval_table.keys[i] for i in keep],
                                           labels, ranks["text_to_image"])})
    console.print(format_metrics_table(metrics, title=f"{run.path.name}: {tag or split} ({len(captions)} pairs)"))
    if write and report:
        write_report(run.path, console)
    return prefixed
