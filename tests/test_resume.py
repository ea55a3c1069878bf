"""Resuming from a mid-run checkpoint reaches the same weights as an uninterrupted run."""
from __future__ import annotations

import json

import pytest
import torch

from align import artifacts as A
from align.checkpoint import latest_checkpoint, list_checkpoints, load_weights
from align.errors import AlignError
from align.recipe import recipe_from_toml
from align.training import train

# MiniLM keeps its dropout (p=0.1) on in training, so an exact match also proves the RNG state
# round-trips through the checkpoint.
RESUME_RECIPE = """
name = "resume"
[vision]
image_size = 32
[text]
kind = "full"
max_length = 12
[train]
steps = 12
batch_size = 16
lr = 5e-4
warmup_steps = 3
checkpoint_every = 6
log_every = 2
"""


def _weights(run_dir):
    return load_weights(latest_checkpoint(run_dir))


def test_resume_matches_uninterrupted(small_digits_shards, tmp_path):
    recipe = recipe_from_toml(RESUME_RECIPE, [f"data.shards={json.dumps(str(small_digits_shards))}"])
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
