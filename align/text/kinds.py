"""Text-tower kinds (``text.kind``): everything that differs between them, one object each.

- ``lora``: a pretrained encoder from a local directory, frozen, with peft LoRA adapters; any added
  terms train as peft's trainable token rows beside the adapter (every old row stays bit-identical);
- ``full``: the same encoder with every weight trainable;
- ``scratch``: a small BERT-shaped encoder initialised at random, with a WordPiece tokenizer trained
  on the training captions (so the export path is the same for every kind).

A kind says how it builds its encoder and tokenizer (and so which parameters train), whether DDP
must look for parameters without a gradient, how the export writes and reloads its trained weights
and what the card says about it. Training and export ask the kind, never compare its name: a new
kind is one more class here, plus its name among ``TextConfig.kind``'s choices (a test checks the two
lists agree).

``text.new_tokens`` (a list of terms, or "auto" to mine the captions) adds the trade's words to the
tokenizer as whole tokens (``align.text.vocab``). The extended tokenizer and the term list are saved in
the run's tokenizer folder, so evaluate, resume and export rebuild it.
"""
from __future__ import annotations

import copy
from abc import ABC, abstractmethod
from pathlib import Path
from typing import Sequence

import torch
from torch import nn

from . import vocab
from ..errors import AlignError
from ..recipe import TextConfig
from .tokenizers import (DEFAULT_TEXT_PACKAGE, extend_tokenizer, is_default_text_model, load_pretrained_tokenizer,
                         save_tokenizer_dir, term_record, text_model_dir, train_scratch_tokenizer)
from .tower import TextTower

class TextKind(ABC):
    """What one ``text.kind`` does differently. The defaults suit a tower whose trained weights are the
    whole encoder (nothing merges, no adapter)."""

    name = ""
    # DDP waits for a gradient of every parameter that requires one; a kind whose encoder keeps a
    # trainable parameter the head never uses must say so, and then pays a walk of the autograd graph
    # per backward to find it
    find_unused_parameters = False
    writes_adapter = False  # the export writes adapter/ (peft's format) beside the merged encoder

    @abstractmethod
    def build(self, cfg: TextConfig, *, seed: int, train_captions: Sequence[str] | None,
              tokenizer_dir: Path | None) -> tuple[nn.Module, object]:
        """(encoder, tokenizer), with exactly the parameters that train requiring a gradient."""

    @abstractmethod
    def card(self, cfg: TextConfig) -> dict:
        """What the export's card says about this tower beside its kind, length and vocabulary."""

    def merged_encoder(self, encoder: nn.Module) -> nn.Module:
        """A plain transformers model holding the trained weights (a copy: the trained tower stays the reference)."""
        return copy.deepcopy(encoder)

    def save_adapter(self, encoder: nn.Module, folder: Path, cfg: TextConfig) -> dict:
        """Write the trained weights in the adapter's own format; returns what head.json adds about the base."""
        raise TypeError(f"a {self.name} text tower has no adapter: its trained weights are the whole encoder")

    def load_adapter(self, folder: Path, base_dir: Path, vocab_size: int) -> nn.Module:
        """The base encoder with the adapter written by ``save_adapter`` put back on it."""
        raise TypeError(f"a {self.name} text tower has no adapter: load text_encoder/ instead")


class PretrainedKind(TextKind):
    """A local pretrained transformers encoder, with its tokenizer and any domain terms added to both."""

    def build(self, cfg, *, seed, train_captions, tokenizer_dir):
        from transformers import AutoModel

        path = text_model_dir(cfg)
        tokenizer = load_pretrained_tokenizer(path)
        encoder = AutoModel.from_pretrained(str(path), local_files_only=True)
        new_ids: list[int] = []
        if cfg.new_tokens:
            tokenizer, new_ids = vocab.domain_vocabulary(cfg, encoder, tokenizer, str(path), train_captions,
                                                         tokenizer_dir)
        return self.trainable(encoder, cfg, new_ids), tokenizer

    @abstractmethod
    def trainable(self, encoder: nn.Module, cfg: TextConfig, new_ids: Sequence[int]) -> nn.Module:
        """The encoder with exactly the parameters that train requiring a gradient (``new_ids``: added rows)."""

    def card(self, cfg):
        base = text_model_dir(cfg)
        return {"base_model": f"{DEFAULT_TEXT_PACKAGE} (offline package)" if is_default_text_model(base) else str(base)}


class LoraKind(PretrainedKind):
    name = "lora"
    writes_adapter = True

    def trainable(self, encoder, cfg, new_ids):
        from peft import LoraConfig, get_peft_model

        names = {name.rsplit(".", 1)[-1] for name, _ in encoder.named_modules()}
        missing = [t for t in cfg.lora_targets if t not in names]
        if missing:
            raise AlignError(f"text.lora_targets {missing} name no module of this encoder",
                             "pick from its linear layers, e.g. query, key, value, dense")
        # trainable tokens: only these rows of the input embedding learn (stored as an (n, H) delta)
        lora = LoraConfig(r=cfg.lora_rank, lora_alpha=cfg.lora_alpha, lora_dropout=cfg.lora_dropout,
                          target_modules=list(cfg.lora_targets), bias="none",
                          trainable_token_indices=list(new_ids) or None)
        return get_peft_model(encoder, lora)

    def card(self, cfg):
        return {**super().card(cfg),
                "lora": {"rank": cfg.lora_rank, "alpha": cfg.lora_alpha, "targets": list(cfg.lora_targets)}}

    def merged_encoder(self, encoder):
        """W + (alpha/r) B A folded into every adapted weight (peft), trainable token rows into the matrix."""
        return copy.deepcopy(encoder).merge_and_unload()

    def save_adapter(self, encoder, folder, cfg):
        # never the whole (resized) embedding matrix: added terms travel as peft's trainable token rows,
        # and load_adapter resizes the base before peft puts them back
        encoder.save_pretrained(str(folder), save_embedding_layers=False)
        base = text_model_dir(cfg)
        return {"base_model": str(base), "base_model_package": DEFAULT_TEXT_PACKAGE if is_default_text_model(base) else None}

    def load_adapter(self, folder, base_dir, vocab_size):
        from peft import PeftModel
        from transformers import AutoModel

        base = AutoModel.from_pretrained(str(base_dir), local_files_only=True)
        if vocab_size != base.get_input_embeddings().num_embeddings:  # terms were added
            base.resize_token_embeddings(vocab_size)
        return PeftModel.from_pretrained(base, str(folder)).eval()


class FullKind(PretrainedKind):
    name = "full"
    # the encoder's pooler stays trainable although the tower pools its own way: without the search,
    # DDP would wait forever for the pooler's gradient
    find_unused_parameters = True

    def trainable(self, encoder, cfg, new_ids):
        return encoder.requires_grad_(True)  # the whole matrix trains anyway, new rows included


class ScratchKind(TextKind):
    name = "scratch"

    def build(self, cfg, *, seed, train_captions, tokenizer_dir):
        from transformers import BertConfig, BertModel

        tokenizer = self._tokenizer(cfg, train_captions, tokenizer_dir)
        torch.manual_seed(seed)  # the encoder's init does not depend on how the tokenizer was made
        size = cfg.scratch
        config = BertConfig(vocab_size=len(tokenizer), hidden_size=size.width, num_hidden_layers=size.layers,
                            num_attention_heads=size.attention_heads, intermediate_size=4 * size.width,
                            max_position_embeddings=max(cfg.max_length, 8), hidden_dropout_prob=size.dropout,
                            attention_probs_dropout_prob=size.dropout, pad_token_id=0)
        return BertModel(config, add_pooling_layer=False), tokenizer

    @staticmethod
    def _tokenizer(cfg: TextConfig, train_captions: Sequence[str] | None, tokenizer_dir: Path | None):
        """Reload the run's caption-trained tokenizer, or learn one (plus any domain terms) and save it."""
        from transformers import PreTrainedTokenizerFast

        if tokenizer_dir is not None and (Path(tokenizer_dir) / "tokenizer.json").is_file():
            return PreTrainedTokenizerFast.from_pretrained(str(tokenizer_dir))
        if not train_captions:
            raise AlignError("a scratch text tower needs its tokenizer", "train it first (align train)")
        tokenizer = train_scratch_tokenizer(train_captions, cfg.scratch.vocabulary_size)
        record = None
        if cfg.new_tokens:  # rows of a random encoder: no pieces to average, they learn like every other row
            base_size = len(tokenizer)
            terms = vocab.chosen_terms(cfg, tokenizer, train_captions)
            new_ids = extend_tokenizer(tokenizer, terms)
            record = term_record(cfg.new_tokens, cfg.new_tokens_cap, terms, new_ids, tokenizer, "scratch")
            record["base_vocab_size"] = base_size
        if tokenizer_dir is not None:
            save_tokenizer_dir(tokenizer, Path(tokenizer_dir), record)
        return tokenizer

    def card(self, cfg):
        return {"base_model": "none (trained from nothing)"}


KINDS: dict[str, TextKind] = {kind.name: kind for kind in (LoraKind(), FullKind(), ScratchKind())}


def text_kind(name: str) -> TextKind:
    if name not in KINDS:
        raise AlignError(f"unknown text tower kind {name!r}", f"use one of {', '.join(KINDS)}")
    return KINDS[name]


def build_text_tower(cfg: TextConfig, out_dim: int, *, seed: int = 0, train_captions: Sequence[str] | None = None,
                     tokenizer_dir: Path | None = None) -> TextTower:
    """Build a fresh tower of the recipe's kind.

    ``scratch`` needs either ``train_captions`` (a tokenizer is learned and saved to ``tokenizer_dir``)
    or an existing ``tokenizer_dir`` to reload it (resume, evaluate); so does ``text.new_tokens``
    (terms mined or listed, the extended tokenizer saved with its term record). The projection and any random
    init are seeded, so the same recipe and seed build the same starting weights.
    """
    torch.manual_seed(seed)
    encoder, tokenizer = text_kind(cfg.kind).build(cfg, seed=seed, train_captions=train_captions,
                                                   tokenizer_dir=tokenizer_dir)
    torch.manual_seed(seed + 1)
    return TextTower(encoder, tokenizer, out_dim, cfg.kind, cfg.max_length)
