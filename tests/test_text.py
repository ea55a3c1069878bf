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
