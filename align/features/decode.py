"""Images to pixel batches for a cache build, in the main process or in DataLoader workers.

The plain view is the tower's own (evaluation) preprocessing; augmented views are random resized
crops with horizontal flips from timm's training transform, each seeded by (key, view) so a rebuild
gives the same numbers. Which views a build decodes is its choice: a K-view build whose plain view
is already cached decodes only the augmented ones.

A build reads whole chunks, never single images: the process that claims a chunk (see
``chunks.ChunkStore.claim``) decodes its images straight into one preallocated batch of the full
chunk size, in the layout the tower runs in, so the tower always sees the same batch shape (the
last chunk is padded: a different shape can pick a different kernel and change the last bits) and
the main process handles one object per chunk, not one per image.
"""
from __future__ import annotations

import hashlib
import random
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator

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


@dataclass
class DecodedChunk:
    """One chunk's images, decoded. ``pixels[v]`` is view slot v of the whole chunk, (rows, 3, H, W)
    (channels_last when the tower runs that way); rows past ``len(keys)`` and rows whose image
    failed to decode are zeros, run through the tower and dropped."""

    index: int
    keys: list[str]  # every image of the chunk, in canonical order
    decoded: list[bool]  # per key: False = the image failed to decode
    pixels: torch.Tensor  # (V, rows, 3, H, W)

    def pin_memory(self) -> DecodedChunk:
        """The DataLoader's pinning hook (where CUDA is present): page-locked pixels, strides kept."""
        self.pixels = self.pixels.pin_memory()
        return self


@dataclass
class StreamEnd:
    """The last item of a decoding stream: how many images the split holds (every reader counts all)."""

    images: int


@dataclass
class ChunkReader:
    """What a process decodes: the chunks of ``rows`` images, in canonical order, that ``claim``
    grants it (``claim(index)`` is asked once per chunk, as the walk over the split reaches it).

    ``views`` lists the view numbers to decode, in order: 0 is the plain preprocessing, v >= 1 the
    augmented view v. ``pixel_shape`` is the tower's (3, H, W)."""

    shards_dir: Path
    split: str
    rows: int
    plain: Callable
    augment: Callable | None
    views: list[int]
    pixel_shape: tuple[int, int, int]
    channels_last: bool
    claim: Callable[[int], bool] | None = field(repr=False, default=None)  # None: every chunk

    def empty_batch(self, shared: bool) -> torch.Tensor:
        """Zeros of (V, rows, 3, H, W); in shared memory when a worker hands it to the main process
        (sent as a handle, not copied), channels_last when the tower runs that way (no copy there)."""
        c, h, w = self.pixel_shape
        if self.channels_last:  # (V, rows, H, W, 3) seen as (V, rows, 3, H, W)
            batch = torch.zeros(len(self.views), self.rows, h, w, c).permute(0, 1, 4, 2, 3)
        else:
            batch = torch.zeros(len(self.views), self.rows, c, h, w)
        if shared:
            batch.share_memory_()
        return batch

    def decode_into(self, batch: torch.Tensor, row: int, key: str, data: bytes) -> bool:
        """Decode one image's views into ``batch[:, row]``; False when the image cannot be decoded."""
        try:
            image = decode_image(data)
        except Exception:  # PIL raises many types for damaged data
            return False
        for slot, view in enumerate(self.views):
            batch[slot, row] = self.plain(image) if view == 0 else augmented_view(self.augment, image, key, view)
        return True


class DecodedChunks(torch.utils.data.IterableDataset):
    """``DecodedChunk``s of the chunks this reader claims, then one ``StreamEnd``.

    Every reader (each DataLoader worker, each process) walks the whole split, reading the bytes of
    every sample but decoding only the chunks it claims; the claim is atomic, so two readers never
    decode the same chunk, and the walk tells each how many images the split holds."""

    def __init__(self, reader: ChunkReader):
        self.reader = reader

    def __iter__(self) -> Iterator[DecodedChunk | StreamEnd]:
        reader = self.reader
        shared = torch.utils.data.get_worker_info() is not None
        current, position = None, -1
        for position, (key, data, _ext) in enumerate(iter_image_bytes(reader.shards_dir, reader.split)):
            index, row = divmod(position, reader.rows)
            if row == 0:
                if current is not None:
                    yield current
                mine = reader.claim is None or reader.claim(index)
                current = DecodedChunk(index, [], [], reader.empty_batch(shared)) if mine else None
            if current is not None:
                current.keys.append(key)
                current.decoded.append(reader.decode_into(current.pixels, row, key, data))
        if current is not None:
            yield current
        yield StreamEnd(position + 1)


def _as_is(item):
    return item


def _one_thread(_worker_id: int) -> None:
    torch.set_num_threads(1)  # the tower owns the cores; a worker only decodes and resizes


def decoded_chunks(reader: ChunkReader, workers: int) -> Iterator[DecodedChunk | StreamEnd]:
    """Decode here (``workers <= 0``) or in that many DataLoader worker processes, each claiming
    chunks for itself; every worker ends with its own ``StreamEnd``."""
    dataset = DecodedChunks(reader)
    if workers <= 0:
        return iter(dataset)
    # a damaged shard is named here: raised in a worker, the error would come back as its traceback
    check_split(reader.shards_dir, reader.split)
    # two chunks ahead per worker: enough to hide decoding, and a chunk at 224 px is ~40 MB
    loader = torch.utils.data.DataLoader(dataset, batch_size=None, num_workers=workers, collate_fn=_as_is,
                                         worker_init_fn=_one_thread, prefetch_factor=2,
                                         pin_memory=torch.cuda.is_available())
    return iter(loader)
