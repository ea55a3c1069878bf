"""Resuming from a mid-run checkpoint reaches the same weights as an uninterrupted run."""
from __future__ import annotations

import json

import pytest
import torch

from align import artifacts as A
from align.checkpoint import latest_checkpoint, list_checkpoints, load_weights
from align.errors import AlignError
from align.training import train
from recipes import tiny_recipe


def _weights(run_dir):
    return load_weights(latest_checkpoint(run_dir))


def test_resume_matches_uninterrupted(small_digits_shards, tmp_path):
    # MiniLM keeps its dropout (p=0.1) on in training (a full fine-tune), so an exact match also
    # proves the RNG state round-trips through the checkpoint.
    recipe = tiny_recipe(small_digits_shards, "full", name="resume", train__steps=12, train__lr=5e-4,
                         train__warmup_steps=3, train__checkpoint_every=6, train__log_every=2,
                         train__threads=0)
    whole = tmp_path / "whole"
    train(recipe, whole)

    cut = tmp_path / "cut"
    # stop after step 6, the way a cancel or a crash after a checkpoint leaves a run
    summary = train(recipe, cut, on_step=lambda rec: rec["step"] < 6)
    assert summary["stopped_early"] and latest_checkpoint(cut).name == "step-000006"
    with pytest.raises(AlignError, match="--resume"):
        train(recipe, cut)
    train(recipe, cut, resume=True)

    a, b = _weights(whole), _weights(cut)
    assert a.keys() == b.keys()
    # CPU, same seed: tolerance 1e-6 absolute (the runs are expected to be bit-identical)
    worst = max(float((a[k] - b[k]).abs().max()) for k in a)
    assert worst <= 1e-6, worst
    log = [json.loads(l)["step"] for l in (cut / A.METRICS_LOG).read_text().splitlines()]
    assert log == list(range(2, 13, 2))
    assert len(list_checkpoints(cut)) <= recipe.train.keep_checkpoints
