"""The loop's own pieces: randomness every process draws alike, each rank's share of a step, and the
check that the frozen image tower left training as it entered."""
from __future__ import annotations

import dataclasses
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
import torch
from rich.console import Console

from align.errors import AlignError
from align.recipe import recipe_from_toml
from align.seeding import epoch_generator, seeded_permutation, stable_hash
from align.training import EpochSampler, StepBatches, check_tower_untouched, prepare_training_data, train
from align.vision import load_image_tower
from recipes import tiny_toml
from test_training_table import hand_made_data

REPO = Path(__file__).resolve().parent.parent
ONE_STEP = tiny_toml("lora", name="one-step", train__steps=1, train__warmup_steps=0, train__lr=5e-4)


def test_stable_hash_is_the_same_in_another_process():
    words = ["a handwritten seven", "step:0:3", "chunk:12:8", "ünïcode"]
    script = f"import json; from align.seeding import stable_hash; print(json.dumps([stable_hash(w) for w in {words!r}]))"
    # another PYTHONHASHSEED: Python's own hash() of these strings differs between the two processes
    env = dict(os.environ, PYTHONPATH=str(REPO), PYTHONHASHSEED="12345")
    other = json.loads(subprocess.run([sys.executable, "-c", script], env=env, capture_output=True, text=True,
                                      check=True).stdout)
    here = [stable_hash(w) for w in words]
    assert here == other and len(set(here)) == len(words)
    assert all(0 <= h < 2 ** 63 for h in here)  # fits a signed 64-bit id tensor


def test_seeded_permutation_is_a_function_of_seed_and_epoch():
    a = seeded_permutation(50, seed=7, epoch=3)
    assert torch.equal(torch.sort(a).values, torch.arange(50))  # a permutation
    assert torch.equal(a, seeded_permutation(50, seed=7, epoch=3))
    assert not torch.equal(a, seeded_permutation(50, seed=7, epoch=4))
    assert not torch.equal(a, seeded_permutation(50, seed=8, epoch=3))
    # streams of one epoch are independent generators: drawing from one leaves the other as it was
    g = epoch_generator(7, 3, stream=1)
    torch.rand(5, generator=epoch_generator(7, 3))
    assert torch.equal(torch.rand(5, generator=g), torch.rand(5, generator=epoch_generator(7, 3, stream=1)))


def test_sampler_reads_one_permutation_per_epoch_as_a_stream():
    sampler = EpochSampler(n=10, batch_size=4, seed=5)
    stream = torch.cat([sampler.batch(step) for step in range(5)])  # 20 positions = epochs 0 and 1
    assert torch.equal(stream[:10], seeded_permutation(10, 5, 0))
    assert torch.equal(stream[10:], seeded_permutation(10, 5, 1))
    # a fresh sampler (a resumed run) gives any step's batch without replaying the earlier ones
    assert torch.equal(EpochSampler(10, 4, 5).batch(3), sampler.batch(3))


@pytest.mark.parametrize("views", [1, 3])
def test_ranks_split_the_captions_and_share_the_global_batch(views, tmp_path):
    # the table in its real on-disk layout (tests/test_training_table.py builds it from files)
    data = hand_made_data(tmp_path, n=12, dim=4, views=views)
    ranks = [StepBatches(data, batch_size=8, seed=1, world=2, rank=r, device=torch.device("cpu")) for r in range(2)]
    alone = StepBatches(data, batch_size=8, seed=1, world=1, rank=0, device=torch.device("cpu"))
    for step in range(4):  # 32 positions over 12 rows: batches straddle epochs
        parts, whole = [r(step) for r in ranks], alone(step)
        assert parts[0].captions + parts[1].captions == whole.captions and len(parts[0].captions) == 4
        for part in parts:  # every rank holds the whole batch's image rows and ids
            assert torch.equal(part.image_features, whole.image_features)
            assert torch.equal(part.caption_ids, whole.caption_ids) and part.label_ids is None
        assert torch.allclose(whole.image_features.norm(dim=1), torch.ones(8), atol=1e-6)
    with pytest.raises(AlignError, match="does not split over 3 processes"):
        StepBatches(data, batch_size=8, seed=1, world=3, rank=0, device=torch.device("cpu"))


@pytest.fixture(scope="module")
def prepared(small_digits_shards, tmp_path_factory):
    cache = tmp_path_factory.mktemp("cache")
    recipe = recipe_from_toml(ONE_STEP, [f"data.shards={json.dumps(str(small_digits_shards))}",
                                         f"vision.feature_cache={json.dumps(str(cache))}"])
    return recipe, prepare_training_data(recipe, Console(quiet=True))


def _tampered(recipe):
    tower = load_image_tower(recipe.vision)  # a copy of its own: the process's shared tower stays as it is
    with torch.no_grad():
        next(tower.model.parameters()).add_(1e-3)
    return tower


def test_prepared_data_holds_the_tower_that_embedded_it(prepared):
    recipe, data = prepared
    assert data.image_tower is not None and data.image_tower.fingerprint == data.tower_fingerprint
    check_tower_untouched(data)  # unchanged: passes
    check_tower_untouched(dataclasses.replace(data, image_tower=None))  # not held here: nothing to hash
    with pytest.raises(RuntimeError, match="frozen image tower changed"):
        check_tower_untouched(dataclasses.replace(data, image_tower=_tampered(recipe)))


def test_training_refuses_to_finish_when_the_image_tower_changed(prepared, tmp_path):
    recipe, data = prepared
    with pytest.raises(RuntimeError, match="frozen image tower changed"):
        train(recipe, tmp_path / "run", console=Console(quiet=True),
              data=dataclasses.replace(data, image_tower=_tampered(recipe)))
    summary = train(recipe, tmp_path / "clean", console=Console(quiet=True), data=data)
    assert summary["steps"] == 1
