"""One process's part of a cache build: walk the split, claim chunks, run the tower over each.

The same function runs in a one-process build, in every rank under a launcher, and in each local
build process of ``--processes N``: a chunk's bytes do not depend on which of them embedded it.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import torch

from ..vision import FrozenImageTower
from .cache import FeatureSet, load_feature_cache
from .chunks import ChunkStore
from .decode import ChunkReader, DecodedChunk, StreamEnd, decoded_chunks, training_transform


@dataclass(frozen=True)
class ChunkJob:
    """What a builder needs besides the tower (picklable: it travels to local build processes)."""

    entry: Path
    shards_dir: Path
    split: str
    rows: int  # images per chunk, the batch of every tower pass
    views: int
    plain_entry: Path | None  # a K-view build copies view 0 from this complete plain entry
    workers: int  # DataLoader processes decoding for this builder (0 = decode in line)
    only: frozenset[int] | None = None  # claim only these chunks (the ones a dead builder left)

    def claim(self, index: int) -> bool:
        return (self.only is None or index in self.only) and ChunkStore(self.entry).claim(index)


@dataclass
class ShareResult:
    images: int  # images this builder embedded
    split_images: int  # images in the split (every builder walks all of it)
    chunks: int  # chunks this builder wrote


def embed_chunk(tower: FrozenImageTower, chunk: DecodedChunk, views: int,
                plain: FeatureSet | None) -> tuple[list[str], np.ndarray, list[str]]:
    """(keys, features (n, K, D) float16, failed keys) of one chunk. The tower sees the whole padded
    batch of ``rows`` (a fixed shape: the same kernels, so the same bits, for the last chunk too);
    the padding and undecodable rows are dropped after. With ``plain``, view 0 is its stored rows
    and the decoded pixels hold views 1..K-1 only."""
    good = [row for row, ok in enumerate(chunk.decoded) if ok]
    keys = [chunk.keys[row] for row in good]
    features = np.zeros((len(good), views, tower.feature_dim), dtype=np.float16)  # (n, K, D)
    if good:
        first = 0 if plain is None else 1
        if plain is not None:
            features[:, 0] = plain.stored_rows_for(keys)
        take = torch.tensor(good)
        for slot in range(chunk.pixels.shape[0]):
            embedded = tower.embed_pixels(chunk.pixels[slot])  # (rows, D)
            features[:, first + slot] = embedded[take].to(torch.float16).numpy()
    return keys, features, [key for key, ok in zip(chunk.keys, chunk.decoded) if not ok]


class ShareWalk:
    """One walk over the split, embedding every chunk this process claims. Decoding workers start
    here, before any progress thread does: a fork beside a running thread can copy a held lock."""

    def __init__(self, tower: FrozenImageTower, job: ChunkJob):
        self.tower, self.job, self.store = tower, job, ChunkStore(job.entry)
        self.plain = load_feature_cache(job.plain_entry) if job.plain_entry is not None else None
        decoded_views = list(range(0 if self.plain is None else 1, job.views))
        augment = training_transform(tower.preprocessing) if job.views > 1 else None
        # the tower's own preprocessing, whatever its source: it runs where the decoding runs
        reader = ChunkReader(job.shards_dir, job.split, job.rows, tower.transform, augment, decoded_views,
                             tuple(tower.preprocessing["input_size"]), tower.channels_last, job.claim)
        self.stream = decoded_chunks(reader, job.workers)

    def run(self, on_chunk: Callable[[int, int], None] | None = None) -> ShareResult:
        """``on_chunk(index, images)`` after each chunk is written."""
        result = ShareResult(0, 0, 0)
        for item in self.stream:
            if isinstance(item, StreamEnd):
                result.split_images = max(result.split_images, item.images)
                continue
            self.store.write(item.index, *embed_chunk(self.tower, item, self.job.views, self.plain))
            result.images += len(item.keys)
            result.chunks += 1
            if on_chunk is not None:
                on_chunk(item.index, len(item.keys))
        return result


def embed_claimed(tower: FrozenImageTower, job: ChunkJob,
                  on_chunk: Callable[[int, int], None] | None = None) -> ShareResult:
    """Embed every chunk this process claims on one walk over the split."""
    return ShareWalk(tower, job).run(on_chunk)
