"""Text-tower kinds: the recipe's choices and the kind objects agree, and each kind's DDP flag is
what its parameters need.

References outside align: DDP's rule (torch.nn.parallel.DistributedDataParallel docs) that a
parameter requiring a gradient but left without one after backward hangs the reduction unless
``find_unused_parameters=True``; here "left without one" is read from ``param.grad is None`` after a
plain backward.
"""
from __future__ import annotations

import dataclasses

import pytest
import torch

from align.errors import AlignError
from align.recipe import ScratchConfig, TextConfig
from align.text import KINDS, build_text_tower, text_kind

CAPTIONS = ["a cobalt herringbone tile", "the digit seven written by hand", "a plain white tile",
            "terracotta hexagon mosaic"]


def test_every_recipe_kind_has_one_kind_object():
    choices = {f.name: f for f in dataclasses.fields(TextConfig)}["kind"].metadata["choices"]
    assert sorted(choices) == sorted(KINDS)
    assert all(KINDS[name].name == name for name in KINDS)
    with pytest.raises(AlignError, match="unknown text tower kind"):
        text_kind("nonesuch")


@pytest.mark.parametrize("kind", ["lora", "full", "scratch"])
def test_unused_parameter_flag_matches_the_parameters(kind, tmp_path):
    cfg = TextConfig(kind=kind, max_length=16,
                     scratch=ScratchConfig(width=32, layers=1, attention_heads=2, vocabulary_size=200))
    tower = build_text_tower(cfg, 8, train_captions=CAPTIONS * 2, tokenizer_dir=tmp_path / "tokenizer")
    tower.train()
    tower(**tower.tokenize(CAPTIONS)).sum().backward()
    trainable = {n: p for n, p in tower.named_parameters() if p.requires_grad}
    unused = sorted(n for n, p in trainable.items() if p.grad is None)
    assert trainable and "projection.weight" in trainable
    assert bool(unused) == text_kind(kind).find_unused_parameters, unused


@pytest.mark.parametrize("side", ["right", "left"])
def test_remembered_token_ids_pad_exactly_as_the_tokenizer_does(side):
    # Reference: the transformers tokenizer's own padding=True, truncation=True call. The tower
    # tokenizes each caption once and pads remembered ids; the tensors must be the same, on either
    # padding side, with truncation at max_length, repeats and a caption seen in an earlier batch.
    tower = build_text_tower(TextConfig(kind="lora", max_length=6), 8)
    tower.tokenizer.padding_side = side
    batches = [CAPTIONS, CAPTIONS[2:] + CAPTIONS[:1] * 3 + ["a new caption about a glazed tile"], CAPTIONS[:1]]
    for batch in batches:
        ours = tower.tokenize(batch)
        theirs = tower.tokenizer(batch, padding=True, truncation=True, max_length=6, return_tensors="pt")
        assert torch.equal(ours["input_ids"], theirs["input_ids"])
        assert torch.equal(ours["attention_mask"], theirs["attention_mask"])
    assert len(tower._token_ids) == len(set(CAPTIONS)) + 1  # each distinct caption tokenized once
    # a longer max_length or an extended vocabulary makes the remembered ids stale: they are redone
    tower.max_length = 32
    assert torch.equal(tower.tokenize(CAPTIONS)["input_ids"],
                       tower.tokenizer(CAPTIONS, padding=True, truncation=True, max_length=32,
                                       return_tensors="pt")["input_ids"])
    tower.tokenizer.add_tokens(["herringbone"])
    assert int(tower.tokenize(["a cobalt herringbone tile"])["input_ids"][0].eq(len(tower.tokenizer) - 1).sum()) == 1
