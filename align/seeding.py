"""Randomness that every process, and every resumed run, draws the same.

- ``stable_hash``: a 63-bit hash of a string, equal in every process (Python's ``hash()`` is salted
  per process). Step and chunk dropout seeds and the loss's caption/label ids are built on it.
- ``epoch_generator`` / ``seeded_permutation``: an epoch's draws as a function of (seed, epoch)
  alone, so a resumed run replays the batches and views of the uninterrupted one with no sampler
  state to save. ``stream`` keeps independent draws of one epoch (batch order, views) apart.

Changing any number here changes which batches, views and dropout masks a run sees: runs would no
longer resume onto the same weights they left.
"""
from __future__ import annotations

import hashlib

import torch

_EPOCH_STRIDE = 1_000_003  # a prime: (seed, epoch) pairs of realistic size never collide
VIEW_STREAM = 7_777_777  # the view schedule's draws, apart from the batch order's (stream 0)


def stable_hash(text: str) -> int:
    """A 63-bit id for ``text``, the same in every process. Collisions are negligible at 2**-63 per
    pair; equal strings always get equal ids. Non-negative, so it fits a signed 64-bit tensor."""
    return int.from_bytes(hashlib.blake2b(text.encode("utf-8"), digest_size=8).digest(), "little") >> 1


def epoch_generator(seed: int, epoch: int, stream: int = 0) -> torch.Generator:
    """A CPU generator for one epoch's draws of one stream; a function of its arguments only."""
    return torch.Generator().manual_seed(seed * _EPOCH_STRIDE + epoch + stream)


def seeded_permutation(n: int, seed: int, epoch: int) -> torch.Tensor:
    """The order of ``n`` rows in ``epoch``. (n,) long"""
    return torch.randperm(n, generator=epoch_generator(seed, epoch))
