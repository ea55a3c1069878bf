"""Bad inputs and faults around training, as a hostile or careless user meets them: every case ends
with exit status 2, a message and a hint, no traceback, and nothing valid lost or half-written.

The corpus is built here: recipe values that used to crash or to pass and do harm, logs torn by a
kill, a run driven to non-finite weights by a real divergence, a checkpoint whose weights were
overwritten with NaN, a tower pass too large for the machine.
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import torch
from safetensors.torch import load_file, save_file

from align import artifacts as A
from align.checkpoint import list_checkpoints
from align.cli import main as cli_main
from recipes import tiny_toml

ROOT = Path(__file__).resolve().parent.parent

# (override, words the message must contain): each used to end in a traceback, or passed and did harm
BAD_VALUES = [
    ("train.lr=nan", "finite"),
    ("train.lr=inf", "finite"),
    ("train.grad_clip=nan", "finite"),
    ("train.log_every=0", "train.log_every"),
    ("train.threads=-1", "train.threads"),
    ('eval.recall_ks=["a"]', "eval.recall_ks"),
    ("eval.prompts=[1]", "eval.prompts"),
    ("eval.field_prompts={glaze=3}", "eval.field_prompts.glaze"),
    ("vision.image_size=100000", "vision.image_size"),
    ("train.batch_size=1", "at least 2"),
]


def _recipe_file(tmp_path: Path, shards, kind: str = "scratch", **changes) -> Path:
    path = tmp_path / "recipe.toml"
    path.write_text(tiny_toml(kind, **changes) + f"[data]\nshards = {json.dumps(str(shards))}\n")
    return path


def _refused(capsys, argv: list[str], *words: str) -> str:
    """Run the CLI; it must exit 2 with a message and a hint, and no traceback."""
    code = cli_main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    assert "error:" in err and "hint:" in err and "Traceback" not in err, err
    flat = " ".join(err.split())  # rich wraps long lines
    for word in words:
        assert word in flat, (word, err)
    return flat


@pytest.mark.parametrize("override, words", BAD_VALUES, ids=[o for o, _ in BAD_VALUES])
def test_bad_recipe_values_are_refused_before_any_work(override, words, small_digits_shards, tmp_path, capsys):
    run = tmp_path / "run"
    _refused(capsys, ["train", str(_recipe_file(tmp_path, small_digits_shards)), "--set", override,
                      "--run-dir", str(run)], words)
    assert not run.exists()  # refused before the run folder was made


def _log_steps(run: Path) -> list[int]:
    return [json.loads(line)["step"] for line in (run / A.METRICS_LOG).read_text().splitlines()]


def test_resume_over_a_torn_last_log_line(small_digits_shards, tmp_path, capsys):
    recipe = _recipe_file(tmp_path, small_digits_shards, train__steps=4, train__checkpoint_every=2)
    run = tmp_path / "run"
    assert cli_main(["train", str(recipe), "--run-dir", str(run)]) == 0
    with open(run / A.METRICS_LOG, "a") as fh:
        fh.write('{"step": 5, "loss": 1.2')  # a kill -9 in the middle of a write
    assert cli_main(["train", str(recipe), "--run-dir", str(run), "--resume", "--set", "train.steps=6"]) == 0
    assert _log_steps(run) == [1, 2, 3, 4, 5, 6]  # every line valid JSON, each step once
    changed = json.loads((run / A.RESUMES_LOG).read_text().splitlines()[-1])
    assert changed["step"] == 4 and changed["changed"]["train.steps"] == [4, 6]  # the free change, recorded


def test_resume_refuses_a_change_that_shapes_the_weights(small_digits_shards, tmp_path, capsys):
    recipe = _recipe_file(tmp_path, small_digits_shards, train__steps=2)
    run = tmp_path / "run"
    assert cli_main(["train", str(recipe), "--run-dir", str(run)]) == 0
    before = (run / A.RESOLVED_RECIPE).read_text()
    _refused(capsys, ["train", str(recipe), "--run-dir", str(run), "--resume", "--set", "train.steps=4",
                      "--set", "train.batch_size=32", "--set", "text.scratch.width=64"],
             "train.batch_size: 16 -> 32", "text.scratch.width: 32 -> 64")
    assert (run / A.RESOLVED_RECIPE).read_text() == before  # the run's recipe is untouched


def test_a_fresh_start_drops_log_lines_no_checkpoint_backs(small_digits_shards, tmp_path):
    """A run killed (-9) before its first checkpoint, then started again: the log restarts at step 1."""
    recipe = _recipe_file(tmp_path, small_digits_shards, train__steps=100000, train__checkpoint_every=0)
    run = tmp_path / "run"
    child = subprocess.Popen([sys.executable, "-m", "align.cli", "train", str(recipe), "--run-dir", str(run)],
                             cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                             env=dict(os.environ, PYTHONPATH=str(ROOT)))
    try:
        deadline = time.monotonic() + 240
        while time.monotonic() < deadline:
            log = run / A.METRICS_LOG
            if log.is_file() and len(log.read_text().splitlines()) >= 3:
                break
            time.sleep(0.2)
        else:
            pytest.fail("the child wrote no log lines in time")
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait(timeout=60)
    assert not list_checkpoints(run) and len(_log_steps(run)) >= 3
    assert cli_main(["train", str(recipe), "--run-dir", str(run), "--resume", "--set", "train.steps=3"]) == 0
    assert _log_steps(run) == [1, 2, 3]


def test_non_finite_training_stops_and_keeps_the_last_good_checkpoint(small_digits_shards, tmp_path, capsys):
    # a real divergence: Adam moves each weight by about lr, so at lr = 1e30 the scratch tower's
    # weights reach 1e30 after one step and LayerNorm's variance overflows float32 on the next
    recipe = _recipe_file(tmp_path, small_digits_shards, train__steps=6, train__lr=1e30, train__warmup_steps=0,
                          train__grad_clip=0.0, train__checkpoint_every=1)
    run = tmp_path / "run"
    flat = _refused(capsys, ["train", str(recipe), "--run-dir", str(run)], "diverged at step", "train.lr")
    kept = list_checkpoints(run)
    assert kept, "the step before the divergence was checkpointed"
    assert f"{kept[-1].name}, is kept" in flat
    for checkpoint in kept:  # no NaN ever reached a checkpoint
        assert all(torch.isfinite(t).all() for t in load_file(str(checkpoint / A.TRAINABLE_WEIGHTS)).values())


def test_export_refuses_non_finite_weights(small_digits_shards, tmp_path, capsys):
    recipe = _recipe_file(tmp_path, small_digits_shards, train__steps=2)
    run = tmp_path / "run"
    assert cli_main(["train", str(recipe), "--run-dir", str(run)]) == 0
    weights_file = list_checkpoints(run)[-1] / A.TRAINABLE_WEIGHTS
    weights = load_file(str(weights_file))
    name = sorted(weights)[0]
    weights[name] = torch.full_like(weights[name], float("nan"))
    save_file(weights, str(weights_file))  # what a diverged run of an older version left behind
    _refused(capsys, ["export", str(run), "--out", str(tmp_path / "export")], "non-finite weights", name)
    assert not (tmp_path / "export").exists()
    _refused(capsys, ["evaluate", str(run)], "non-finite weights")
    assert not (run / A.METRICS).exists()


def test_a_tower_pass_larger_than_memory_is_refused_before_decoding(small_digits_shards, tmp_path, capsys):
    # 1,024 px in batches of 4,096 images: the estimate (activations scale with pixels x batch) is
    # hundreds of GiB, far past any test machine
    cache = tmp_path / "cache"
    recipe = _recipe_file(tmp_path, small_digits_shards, vision__image_size=1024, vision__batch_size=4096,
                          vision__feature_cache=str(cache))
    _refused(capsys, ["features", str(recipe)], "GiB per batch", "vision.batch_size")
    assert not cache.exists() or not any(cache.rglob("*.f16"))
