"""Frozen image features: the tower runs once per image, never per training step.

``image_features`` embeds every image of one split of a packed folder and returns the L2-normalised
embeddings in the split's canonical order, so row i belongs to ``load_table(...).keys[i]``. Images
that fail to decode are skipped, counted and reported; callers align their tables with ``keys``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import torch
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from .data.shards import iter_images, load_table
from .recipe import VisionConfig
from .vision import FrozenImageTower


@dataclass
class FeatureSet:
    keys: list[str]
    embeddings: torch.Tensor  # (N, D) float32, L2-normalised
    skipped: list[str] = field(default_factory=list)
    fingerprint: dict = field(default_factory=dict)

    def rows_for(self, keys: list[str]) -> torch.Tensor:
        index = {k: i for i, k in enumerate(self.keys)}
        return self.embeddings[torch.tensor([index[k] for k in keys], dtype=torch.long)]


def image_features(tower: FrozenImageTower, shards_dir: str | Path, split: str, cfg: VisionConfig,
                   console: Console | None = None) -> FeatureSet:
    """Embed one split with the frozen tower, batch by batch, with a progress bar."""
    console = console or Console(stderr=True)
    total = len(load_table(shards_dir, split).keys)
    skipped: list[str] = []
    keys: list[str] = []
    chunks: list[torch.Tensor] = []
    batch: list[torch.Tensor] = []

    def flush():
        if batch:
            chunks.append(tower.embed_pixels(torch.stack(batch)))  # (b, D)
            batch.clear()

    columns = [TextColumn("[bold]embedding {task.fields[split]} images"), BarColumn(), MofNCompleteColumn(),
               TextColumn("{task.fields[rate]}"), TimeRemainingColumn()]
    with Progress(*columns, console=console, transient=True) as progress:
        task = progress.add_task("embed", total=total, split=split, rate="")
        for key, image in iter_images(shards_dir, split, skipped=skipped):
            keys.append(key)
            batch.append(tower.preprocess(image))
            if len(batch) == cfg.batch_size:
                flush()
                done = len(keys)
                elapsed = progress.tasks[0].elapsed or 1e-9
                progress.update(task, completed=done, rate=f"{done / elapsed:.0f} img/s")
        flush()
        progress.update(task, completed=total)
    if skipped:
        console.print(f"[yellow]skipped {len(skipped)} {split} image(s) that failed to decode: "
                      f"{', '.join(skipped[:5])}{' ...' if len(skipped) > 5 else ''}")
    embeddings = torch.cat(chunks) if chunks else torch.empty(0, tower.feature_dim)
    return FeatureSet(keys=keys, embeddings=embeddings, skipped=skipped, fingerprint=tower.fingerprint)
