"""One contrastive training step: encode this rank's captions, gather the global batch, back-propagate.

Kept apart from the loop so the step's memory strategy can change (chunked re-encoding) without
touching scheduling, logging or checkpoints.
"""
from __future__ import annotations

import torch

from .loss import gather_global
from .text import TextTower


def contrastive_step(model: torch.nn.Module, tower: TextTower, loss_fn: torch.nn.Module, captions: list[str],
                     image_features: torch.Tensor, caption_ids: torch.Tensor, label_ids: torch.Tensor | None,
                     accelerator, autocast) -> torch.Tensor:
    """Forward and backward for one step; returns the (detached) global loss.

    ``captions`` are this rank's slice (b); ``image_features``, ``caption_ids`` and ``label_ids``
    cover the whole global batch (B), identical on every rank.
    """
    tokens = {k: v.to(accelerator.device) for k, v in tower.tokenize(captions).items()}
    with autocast:
        text = model(**tokens)  # (b, D)
    text = gather_global(text.float())  # (B, D); autograd flows back to each rank's own slice
    loss = loss_fn(text, image_features, caption_ids, label_ids)
    accelerator.backward(loss)
    return loss.detach()
