"""Pooling the raw output of a graph (onnx, program) into one vector per image.

    output  the graph's output is already (B, D)
    cls     (B, T, D) tokens -> the first token
    mean    (B, T, D) tokens -> the mean over every token; (B, C, H, W) feature map -> the mean over H and W
"""
from __future__ import annotations

import torch

from ..errors import AlignError
from .tower import FrozenImageTower

RULES = {
    "output": "the graph's output as it is, (B, D)",
    "cls": "output[:, 0]: the first token of the (B, T, D) output",
    "mean": "the mean over every position of the output: tokens (B, T, D) over T, a feature map (B, C, H, W) over H, W",
}
_RANKS = {"output": (2,), "cls": (3,), "mean": (3, 4)}


def check_output_rank(shape: tuple, pooling: str, model_path: str) -> None:
    """Refuse at load a pooling that does not fit the output's shape, naming the one that would."""
    if len(shape) in _RANKS[pooling]:
        return
    fits = [name for name, ranks in _RANKS.items() if len(shape) in ranks]
    raise AlignError(f"{model_path} outputs shape {list(shape)}, which vision.pooling = {pooling!r} cannot pool "
                     f"(it takes a rank {' or '.join(map(str, _RANKS[pooling]))} output)",
                     f"set vision.pooling to {' or '.join(repr(f) for f in fits)}" if fits
                     else "export the model so that it outputs (B, D), (B, T, D) or (B, C, H, W)")


def pool_output(out: torch.Tensor, pooling: str) -> torch.Tensor:
    """(B, ...) raw output -> (B, D)."""
    if pooling == "output":
        return out
    if pooling == "cls":
        return out[:, 0]
    return out.mean(dim=1) if out.dim() == 3 else out.mean(dim=(2, 3))


class PooledGraphTower(FrozenImageTower):
    """A tower whose graph (onnx, program) returns raw output that the recipe's pooling reduces."""

    def __init__(self, *, pooling_choice: str, **kwargs):
        super().__init__(**kwargs)
        self.pooling_choice = pooling_choice

    def _forward(self, pixels: torch.Tensor) -> torch.Tensor:
        return pool_output(self.model(pixels), self.pooling_choice)
