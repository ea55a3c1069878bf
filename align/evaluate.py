"""Evaluate a run: retrieval both ways, zero-shot per label field, and the linear-probe ceiling.

The linear probe is trained on the same frozen image features the text side was aligned to, so it
is the ceiling zero-shot classification is chasing: the closer the two, the better the text tower
has learned to name what the image tower already sees.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from rich.console import Console

from . import artifacts as A
from .checkpoint import write_json_atomic
from .data.shards import load_table
from .errors import AlignError, FingerprintMismatch
from .features import image_features
from .metrics import (class_text_embeddings, display_name, format_metrics_table, linear_probe_accuracy,
                      retrieval_metrics, zero_shot_accuracy)
from .recipe import Recipe, load_recipe
from .train import load_trained, shards_dir
from .vision import load_image_tower


def canonical_labels(labels: dict) -> str | None:
    return json.dumps(labels, sort_keys=True) if labels else None


def load_run_recipe(run_dir: Path) -> Recipe:
    path = Path(run_dir) / A.RESOLVED_RECIPE
    if not path.is_file():
        raise AlignError(f"{run_dir} is not a run folder (no {A.RESOLVED_RECIPE})",
                         "pass the --run-dir you trained into, e.g. runs/demo")
    return load_recipe(path)


def check_tower_matches(checkpoint: Path, tower_fingerprint: dict) -> None:
    state = json.loads((checkpoint / A.TRAINER_STATE).read_text(encoding="utf-8"))
    trained_with = state.get("tower", {}).get("weights_sha256")
    if trained_with and trained_with != tower_fingerprint["weights_sha256"]:
        raise FingerprintMismatch(
            f"the run was trained against image tower {trained_with[:12]}… but the recipe now loads "
            f"{tower_fingerprint['weights_sha256'][:12]}…",
            "evaluate with the same vision.model and vision.weights the run was trained with")


def _field_values(labels: list[dict], field: str) -> list[str | None]:
    return [str(lab[field]) if field in lab else None for lab in labels]


def evaluate_run(run_dir: str | Path, shards: str | Path | None = None, tag: str | None = None,
                 console: Console | None = None, write: bool = True) -> dict:
    """Score the newest checkpoint of ``run_dir`` on the eval split; write ``metrics.json``.

    ``shards`` evaluates on another packed folder (its eval split); ``tag`` prefixes the keys
    (``tag/...``) so several evaluation sets share one metrics.json.
    """
    console = console or Console(stderr=True)
    run_dir = Path(run_dir)
    recipe = load_run_recipe(run_dir)
    train_dir = shards_dir(recipe)
    eval_dir = Path(shards) if shards else train_dir
    split = recipe.data.eval_split

    # Frozen features for the evaluation images and, for the probe and class list, the training images.
    tower = load_image_tower(recipe.vision)
    eval_table = load_table(eval_dir, split)
    eval_feats = image_features(tower, eval_dir, split, recipe.vision, console)
    train_table = load_table(train_dir, recipe.data.train_split)
    train_feats = image_features(tower, train_dir, recipe.data.train_split, recipe.vision, console)

    text_tower, loss_fn, checkpoint = load_trained(run_dir, recipe, tower.feature_dim)
    check_tower_matches(checkpoint, tower.fingerprint)

    rows = {k: i for i, k in enumerate(eval_table.keys)}
    keep = [rows[k] for k in eval_feats.keys]  # captions of images that decoded, in feature order
    captions = [eval_table.captions[i] for i in keep]
    labels = [eval_table.labels[i] for i in keep]
    image_emb = eval_feats.embeddings.numpy()  # (N, D)
    text_emb = text_tower.embed(captions).numpy()  # (N, D)
    groups = [canonical_labels(lab) for lab in labels]
    metrics: dict = retrieval_metrics(text_emb, image_emb, None,
                                      groups if any(g is not None for g in groups) else None,
                                      ks=recipe.eval.recall_ks)

    # Zero-shot per label field (prompt ensembling) beside the linear probe on the same features.
    train_rows = {k: i for i, k in enumerate(train_table.keys)}
    train_labels = [train_table.labels[train_rows[k]] for k in train_feats.keys]
    fields = sorted({f for lab in labels for f in lab})
    for field in fields:
        eval_values = _field_values(labels, field)
        train_values = _field_values(train_labels, field)
        classes = sorted({v for v in eval_values + train_values if v is not None})
        if len(classes) < 2:
            continue
        index = {c: i for i, c in enumerate(classes)}
        templates = recipe.eval.field_prompts.get(field, recipe.eval.prompts)
        class_emb = class_text_embeddings(lambda texts: text_tower.embed(texts).numpy(),
                                          [display_name(c) for c in classes], templates)
        have = [i for i, v in enumerate(eval_values) if v is not None]
        metrics[f"zero_shot_accuracy/{field}"] = zero_shot_accuracy(
            image_emb[have], class_emb, [index[eval_values[i]] for i in have])
        train_have = [i for i, v in enumerate(train_values) if v is not None]
        if len({train_values[i] for i in train_have}) >= 2:
            metrics[f"linear_probe_accuracy/{field}"] = linear_probe_accuracy(
                train_feats.embeddings.numpy()[train_have], [train_values[i] for i in train_have],
                image_emb[have], [eval_values[i] for i in have],
                C=recipe.eval.probe_c, max_iter=recipe.eval.probe_max_iter, seed=recipe.train.seed)
    metrics["eval_pairs"] = len(captions)
    metrics["temperature"] = float(loss_fn.temperature())

    prefixed = {f"{tag}/{k}": v for k, v in metrics.items()} if tag else dict(metrics)
    if write:
        path = run_dir / A.METRICS
        existing = json.loads(path.read_text(encoding="utf-8")) if path.is_file() else {}
        if not tag:  # a fresh default evaluation replaces the unprefixed keys, keeps tagged sets
            existing = {k: v for k, v in existing.items() if "/" in k and k.split("/")[0] not in
                        ("zero_shot_accuracy", "linear_probe_accuracy")}
        existing.update(prefixed)
        existing["checkpoint"] = checkpoint.name
        write_json_atomic(path, existing)
    console.print(format_metrics_table(metrics, title=f"{run_dir.name}: {tag or split} ({len(captions)} pairs)"))
    return prefixed
