"""The text head every text tower shares, trained or exported.

An encoder's last hidden states become an embedding in one way only: tokenize (padded to the
batch's longest caption, truncated at ``max_length``), mean over the positions where the attention
mask is 1, a linear projection without bias to the image feature width, L2 normalisation.
``TextTower`` is that head around a transformers encoder: the tower a run trains (``align.text.kinds``
builds it), and the tower ``align.load`` rebuilds from an export's ``text_encoder/`` folder, which is
also what the export traces to ONNX and checks against the trained one.
"""
from __future__ import annotations

from typing import Sequence

import torch
import torch.nn.functional as F
from torch import nn


def mean_pool(hidden: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
    """Average of the token states where the mask is 1. (B, T, H), (B, T) -> (B, H)."""
    mask = attention_mask.unsqueeze(-1).to(hidden.dtype)  # (B, T, 1)
    return (hidden * mask).sum(1) / mask.sum(1).clamp(min=1.0)


class TextTower(nn.Module):
    """Encoder + mean pooling + projection; outputs L2-normalised (B, D) embeddings."""

    def __init__(self, encoder: nn.Module, tokenizer, out_dim: int, kind: str, max_length: int):
        super().__init__()
        self.encoder = encoder
        self.tokenizer = tokenizer
        self.kind = kind
        self.max_length = max_length
        hidden = encoder.config.hidden_size
        self.projection = nn.Linear(hidden, out_dim, bias=False)

    @classmethod
    def with_projection(cls, encoder: nn.Module, tokenizer, weight: torch.Tensor, kind: str,
                        max_length: int) -> "TextTower":
        """A tower around trained weights: ``weight`` (D, H) is the saved projection."""
        tower = cls(encoder, tokenizer, weight.shape[0], kind, max_length)
        with torch.no_grad():
            tower.projection.weight.copy_(weight)
        return tower

    def tokenize(self, texts: Sequence[str]) -> dict[str, torch.Tensor]:
        # dynamic padding: each batch is padded to its own longest caption, not to max_length
        enc = self.tokenizer(list(texts), padding=True, truncation=True, max_length=self.max_length,
                             return_tensors="pt")
        return {"input_ids": enc["input_ids"], "attention_mask": enc["attention_mask"]}

    def forward(self, input_ids: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
        hidden = self.encoder(input_ids=input_ids, attention_mask=attention_mask).last_hidden_state  # (B, T, H)
        pooled = mean_pool(hidden, attention_mask)  # (B, H)
        return F.normalize(self.projection(pooled).float(), dim=-1)  # (B, D)

    @torch.no_grad()
    def embed(self, texts: Sequence[str], batch_size: int = 256) -> torch.Tensor:
        was_training = self.training
        self.eval()
        out = [self(**self.tokenize(texts[i:i + batch_size])) for i in range(0, len(texts), batch_size)]
        self.train(was_training)
        return torch.cat(out) if out else torch.empty(0, self.projection.out_features)
