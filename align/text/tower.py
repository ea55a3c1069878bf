"""The text head every text tower shares, trained or exported.

An encoder's last hidden states become an embedding in one way only: tokenize (padded to the
batch's longest caption, truncated at ``max_length``), mean over the positions where the attention
mask is 1, a linear projection without bias to the image feature width, L2 normalisation.
``TextTower`` is that head around a transformers encoder: the tower a run trains (``align.text.kinds``
builds it), and the tower ``align.load`` rebuilds from an export's ``text_encoder/`` folder, which is
also what the export traces to ONNX and checks against the trained one.
"""
from __future__ import annotations

from itertools import chain
from typing import Sequence

import torch
import torch.nn.functional as F
from torch import nn


def mean_pool(hidden: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
    """Average of the token states where the mask is 1. (B, T, H), (B, T) -> (B, H)."""
    mask = attention_mask.unsqueeze(-1).to(hidden.dtype)  # (B, T, 1)
    return (hidden * mask).sum(1) / mask.sum(1).clamp(min=1.0)


# Captions whose token ids the tower remembers: a training table of this many distinct captions is
# tokenized once, not every epoch (about 0.2 ms a caption with a fast BERT tokenizer, 2% of a bf16 LoRA
# step on 2 cores); past it the memory is dropped and refilled (~100 bytes a caption)
TOKEN_CACHE_CAPTIONS = 1 << 18


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
        self._token_ids: dict[str, list[int]] = {}  # caption -> its ids, truncated (see tokenize)
        self._token_ids_made_by: tuple = ()

    @classmethod
    def with_projection(cls, encoder: nn.Module, tokenizer, weight: torch.Tensor, kind: str,
                        max_length: int) -> "TextTower":
        """A tower around trained weights: ``weight`` (D, H) is the saved projection."""
        tower = cls(encoder, tokenizer, weight.shape[0], kind, max_length)
        with torch.no_grad():
            tower.projection.weight.copy_(weight)
        return tower

    def tokenize(self, texts: Sequence[str]) -> dict[str, torch.Tensor]:
        """(B, T) ids and attention mask, padded to the batch's longest caption (not to max_length).

        The same tensors as the tokenizer's own ``padding=True, truncation=True`` call, but each
        caption is tokenized once: its ids are remembered (for this tokenizer, vocabulary size and
        max_length) and later batches only pad them."""
        texts = list(texts)
        pad_id = self.tokenizer.pad_token_id
        if not texts or pad_id is None:  # nothing to remember, or the tokenizer's own error
            enc = self.tokenizer(texts, padding=True, truncation=True, max_length=self.max_length, return_tensors="pt")
            return {"input_ids": enc["input_ids"], "attention_mask": enc["attention_mask"]}
        rows = self._ids_of(texts)
        lengths = torch.tensor([len(r) for r in rows])  # (B,)
        width = int(lengths.max())
        position = torch.arange(width)  # (T,)
        if self.tokenizer.padding_side == "left":
            used = position >= width - lengths[:, None]  # (B, T)
        else:
            used = position < lengths[:, None]  # (B, T)
        ids = torch.full((len(rows), width), pad_id, dtype=torch.long)  # (B, T)
        ids[used] = torch.tensor(list(chain.from_iterable(rows)), dtype=torch.long)  # row-major: each row in order
        return {"input_ids": ids, "attention_mask": used.long()}

    def _ids_of(self, texts: list[str]) -> list[list[int]]:
        """Each caption's truncated ids, the new ones tokenized in one call and remembered."""
        made_by = (id(self.tokenizer), len(self.tokenizer), self.max_length)
        if made_by != self._token_ids_made_by or len(self._token_ids) > TOKEN_CACHE_CAPTIONS:
            self._token_ids, self._token_ids_made_by = {}, made_by
        known = self._token_ids
        rows = [known.get(t) for t in texts]
        missing = list(dict.fromkeys(t for t, r in zip(texts, rows) if r is None))
        if missing:
            fresh = self.tokenizer(missing, truncation=True, max_length=self.max_length)["input_ids"]
            new = dict(zip(missing, fresh))
            known.update(new)
            rows = [r if r is not None else new[t] for t, r in zip(texts, rows)]
        return rows

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
