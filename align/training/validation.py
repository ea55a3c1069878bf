"""Validation during training: recall on a fixed, seeded subset of the validation split, every N steps.

The images' side comes from the frozen-feature cache (the tower never runs here), so a validation
costs one text pass over the subset's captions and a (n, n) score matrix. It must leave the run
exactly as it found it: the text tower goes back to training mode, and every RNG stream the loop
draws from (CPU, and the device's) is restored afterwards, so a run with validation and a run cut
and resumed in between reach the same weights bit for bit. The subset is drawn from a generator of
its own, never from the training stream.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
from rich.console import Console

from ..errors import AlignError
from ..features import cache_root, split_features
from ..features.table import split_table
from ..metrics import recall_metrics_from_ranks, retrieval_ranks
from ..recipe import Recipe
from ..seeding import epoch_generator
from ..text import TextTower

VALIDATION_STREAM = 3_333_331  # the subset's draw, apart from the batch order's and the views' streams
PREFIX = "val/"  # validation keys in metrics.jsonl: val/text_to_image_recall@1, ..., val/mean_recall


@dataclass
class ValidationSet:
    """The fixed subset: caption i describes image feature row i."""

    captions: list[str]
    image_features: torch.Tensor  # (n, D) float32, unit norm
    label_groups: list[int | None]  # one per row, the labels' id; None = the row matches only its own pair


def draw_subset(n: int, samples: int, seed: int) -> list[int]:
    """Which of ``n`` validation rows the subset holds, ascending; a function of (n, samples, seed) only."""
    order = torch.randperm(n, generator=epoch_generator(seed, 0, VALIDATION_STREAM))  # (n,)
    return sorted(order[:samples].tolist())


def prepare_validation(recipe: Recipe, data_dir, console: Console) -> ValidationSet:
    """The recipe's validation subset, its image features as the training rows got theirs (the tower's
    cache, built once if missing, or the stored vectors) and its captions from the split's training
    table: only the subset's rows are read."""
    split = recipe.data.eval_split
    try:
        feats = split_features(recipe.vision, data_dir, split, console).features
        table = split_table(feats, data_dir, split, cache_root(data_dir, recipe.vision), console)
    except AlignError as exc:
        raise AlignError(f"train.eval_every needs the validation split '{split}': {exc.message}",
                         "pack with a validation share (align pack --val-fraction 0.1), or set train.eval_every=0"
                         ) from None
    if len(table) < 2:  # images that failed to decode dropped out
        raise AlignError(f"train.eval_every needs at least 2 validation pairs, '{split}' has {len(table)}",
                         "pack with a larger --val-fraction, or set train.eval_every=0")
    chosen = np.array(draw_subset(len(table), recipe.train.eval_samples, recipe.train.seed), dtype=np.int64)
    return ValidationSet(captions=table.captions.take(chosen),
                         image_features=feats.unit_rows(table.feature_rows[chosen]),
                         label_groups=[None if i < 0 else int(i) for i in table.label_ids[chosen]])


@torch.no_grad()
def embed_captions(tower: TextTower, captions: list[str], device: torch.device, batch_size: int = 256) -> torch.Tensor:
    """The captions through the tower in eval mode, on ``device``. (n, D) float32 on the CPU"""
    was_training = tower.training
    tower.eval()
    try:
        out = []
        for start in range(0, len(captions), batch_size):
            tokens = {k: v.to(device) for k, v in tower.tokenize(captions[start:start + batch_size]).items()}
            out.append(tower(**tokens).float().cpu())
        return torch.cat(out)
    finally:
        tower.train(was_training)


def validation_recall(tower: TextTower, validation: ValidationSet, recall_ks: list[int],
                      device: torch.device) -> dict[str, float]:
    """Recall@K both ways on the subset and their mean, keyed ``val/...``; every RNG state is restored."""
    devices = [device.index if device.index is not None else torch.cuda.current_device()] \
        if device.type == "cuda" else []
    with torch.random.fork_rng(devices=devices, device_type="cuda"):
        text = embed_captions(tower, validation.captions, device).numpy()  # (n, D)
    groups = validation.label_groups if any(g is not None for g in validation.label_groups) else None
    ranks = retrieval_ranks(text, validation.image_features.numpy(), None, groups)
    recall = recall_metrics_from_ranks(ranks, recall_ks)
    recall["mean_recall"] = float(np.mean(list(recall.values())))
    return {PREFIX + k: v for k, v in recall.items()}


def improves(value: float, best: float | None) -> bool:
    """A strictly higher recall is a new best; a tie keeps the earlier step."""
    return best is None or value > best
