"""Images to pixel views for a cache build, in the main process or in DataLoader workers.

The plain view is the tower's own (evaluation) preprocessing; augmented views are random resized
crops with horizontal flips from timm's training transform, each seeded by (key, view) so a rebuild
gives the same numbers. Which views a build decodes is its choice: a K-view build whose plain view
is already cached decodes only the augmented ones.
"""
from __future__ import annotations

import hashlib
import random
from pathlib import Path
from typing import Iterator

import torch

from ..data.shards import check_split, decode_image, iter_image_bytes
from .fingerprint import AUGMENTATION


def _view_seed(key: str, view: int) -> int:
    # Not seeding.stable_hash: cached augmented views were drawn from this seed, and a different
    # one would change an entry's numbers without changing its fingerprint.
    digest = hashlib.sha256(f"{AUGMENTATION['seed']}|{key}|{view}".encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "little")


def training_transform(preprocessing: dict):
    """timm's training transform at the tower's size, mean, std and interpolation (crop + flip only)."""
    import timm.data

    return timm.data.create_transform(
        input_size=preprocessing["input_size"], is_training=True, scale=tuple(AUGMENTATION["scale"]),
        ratio=tuple(AUGMENTATION["ratio"]), hflip=AUGMENTATION["hflip"], color_jitter=None,
        interpolation=preprocessing.get("interpolation", "bilinear"), mean=preprocessing["mean"],
        std=preprocessing["std"])


def augmented_view(transform, image, key: str, view: int) -> torch.Tensor:
    """One augmented view, seeded by (key, view); the caller's random state is left as it was."""
    seed = _view_seed(key, view)
    python_state = random.getstate()  # timm's crop draws from python's random, the flip from torch's
    try:
        with torch.random.fork_rng(devices=[]):
            random.seed(seed)
            torch.manual_seed(seed)
            return transform(image)  # (3, H, W)
    finally:
        random.setstate(python_state)


class DecodedSamples(torch.utils.data.IterableDataset):
    """(key, pixels (V, 3, H, W) or None when the image fails to decode), in canonical order from ``start``.

    ``views`` lists the view numbers to decode, in order: 0 is the plain preprocessing, v >= 1 the
    augmented view v. With W workers, worker w takes positions start+w, start+w+W, ...; the
    DataLoader reads workers round-robin, so the stream comes back in canonical order. A failed
    image still yields a record (with None), which keeps the round-robin aligned.
    """

    def __init__(self, shards_dir: Path, split: str, start: int, plain, augment, views: list[int]):
        self.shards_dir, self.split, self.start = shards_dir, split, start
        self.plain, self.augment, self.views = plain, augment, views

    def prepare(self, key: str, data: bytes) -> torch.Tensor | None:
        try:
            image = decode_image(data)
        except Exception:  # PIL raises many types for damaged data
            return None
        views = [self.plain(image) if v == 0 else augmented_view(self.augment, image, key, v) for v in self.views]
        return torch.stack(views)  # (V, 3, H, W)

    def __iter__(self) -> Iterator[tuple[str, torch.Tensor | None]]:
        info = torch.utils.data.get_worker_info()
        worker, workers = (info.id, info.num_workers) if info else (0, 1)
        for position, (key, data, _ext) in enumerate(iter_image_bytes(self.shards_dir, self.split)):
            if position >= self.start and (position - self.start) % workers == worker:
                yield key, self.prepare(key, data)


def _as_is(item):
    return item


def _one_thread(_worker_id: int) -> None:
    torch.set_num_threads(1)  # the tower owns the cores; a worker only decodes and resizes


def decoded_stream(dataset: DecodedSamples, workers: int):
    """Iterate ``dataset`` here (``workers <= 0``) or in that many DataLoader worker processes."""
    if workers <= 0:
        return iter(dataset)
    # a damaged shard is named here: raised in a worker, the error would come back as its traceback
    check_split(dataset.shards_dir, dataset.split)
    loader = torch.utils.data.DataLoader(dataset, batch_size=None, num_workers=workers, collate_fn=_as_is,
                                         worker_init_fn=_one_thread, prefetch_factor=8)
    return iter(loader)
