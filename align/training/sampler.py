"""Which rows a step trains on, and how fast: the seeded batch stream and the learning-rate schedule."""
from __future__ import annotations

import math
from typing import Callable

import torch

from ..errors import AlignError
from ..seeding import seeded_permutation


class EpochSampler:
    """Deterministic batches: a seeded permutation per epoch, read as one endless stream.

    The batch for a step depends only on (seed, step), so a resumed run sees exactly the batches the
    uninterrupted run would have seen, with no sampler state to save.
    """

    def __init__(self, n: int, batch_size: int, seed: int):
        if n < 2:
            raise AlignError(f"only {n} training pair(s): a contrastive loss needs at least 2",
                             "pack more data or lower --val-fraction")
        self.n, self.batch_size, self.seed = n, batch_size, seed
        self._cache: dict[int, torch.Tensor] = {}

    def _perm(self, epoch: int) -> torch.Tensor:
        if epoch not in self._cache:  # keep this epoch and the one before (a batch may straddle them)
            self._cache = {epoch: seeded_permutation(self.n, self.seed, epoch)} | {
                e: p for e, p in self._cache.items() if e == epoch - 1}
        return self._cache[epoch]

    def batch(self, step: int) -> torch.Tensor:
        positions = torch.arange(step * self.batch_size, (step + 1) * self.batch_size)
        epochs, offsets = positions // self.n, positions % self.n
        return torch.stack([self._perm(int(e))[int(o)] for e, o in zip(epochs, offsets)])  # (B,)

    def epoch_of(self, step: int) -> float:
        return step * self.batch_size / self.n


def warmup_cosine(warmup: int, total: int) -> Callable[[int], float]:
    """Linear warm-up to the peak, then cosine decay to zero at the last step (common practice)."""
    def factor(step: int) -> float:
        if step < warmup:
            return (step + 1) / (warmup + 1)
        progress = (step - warmup) / max(1, total - warmup)
        return 0.5 * (1.0 + math.cos(math.pi * min(1.0, progress)))
    return factor
