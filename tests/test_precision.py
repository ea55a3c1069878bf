"""train.precision: "auto" picks bf16 exactly where the processor multiplies bf16 natively, the run
records the concrete choice, and a resume under "auto" keeps the precision the run began with.

Outside references: the kernel's CPU feature flags in /proc/cpuinfo (``avx512_bf16``, ``amx_bf16``:
the x86 bf16 dot-product instructions, Intel's and AMD's manuals) for what this machine has.
"""
from __future__ import annotations

import dataclasses
import platform
from pathlib import Path

import pytest
import torch

from align import artifacts as A
from align.checkpoint import save_checkpoint
from align.errors import AlignError
from align.recipe import Recipe, TrainConfig, dump_recipe, load_recipe
from align.run import RunDir
from align.text import precision as P

CPU = torch.device("cpu")


def _cpuinfo_flags() -> set[str]:
    text = Path("/proc/cpuinfo").read_text()
    line = next(line for line in text.splitlines() if line.startswith("flags"))
    return set(line.split(":", 1)[1].split())


@pytest.mark.skipif(not Path("/proc/cpuinfo").is_file() or platform.machine() != "x86_64",
                    reason="the reference is Linux's x86 CPU flags")
def test_auto_is_bf16_exactly_where_the_cpu_has_bf16_dot_products():
    native = bool({"avx512_bf16", "amx_bf16"} & _cpuinfo_flags())
    assert P.cpu_has_bf16_matmul() == native
    assert P.resolve_precision("auto", CPU) == ("bf16" if native else "fp32")


def test_explicit_precisions_pass_through_and_others_are_refused():
    assert P.resolve_precision("fp32", CPU) == "fp32" and P.resolve_precision("bf16", CPU) == "bf16"
    with pytest.raises(ValueError, match="precision"):
        P.resolve_precision("fp16", CPU)
    with pytest.raises(ValueError, match="resolve"):
        P.text_autocast("auto", CPU)
    assert P.text_autocast("bf16", CPU).fast_dtype == torch.bfloat16
    choices = {f.name: f for f in dataclasses.fields(TrainConfig)}["precision"].metadata["choices"]
    assert tuple(choices) == P.PRECISIONS and TrainConfig().precision == "auto"


def _run_with_checkpoint(folder: Path, precision: str) -> RunDir:
    """A run folder as train() leaves it: the resolved recipe and one complete checkpoint."""
    recipe = Recipe(train=TrainConfig(precision=precision))
    run = RunDir(folder)
    run.write_recipe(recipe)
    weight = torch.nn.Parameter(torch.zeros(2))
    optimizer = torch.optim.AdamW([weight])
    scheduler = torch.optim.lr_scheduler.LambdaLR(optimizer, lambda step: 1.0)
    save_checkpoint(folder, 1, {"text.w": weight}, optimizer, scheduler, {"elapsed_s": 0.0}, dump_recipe(recipe))
    return run


@pytest.mark.parametrize("recorded", ["fp32", "bf16"])
def test_a_resume_under_auto_keeps_the_runs_own_precision(tmp_path, recorded):
    run = _run_with_checkpoint(tmp_path / "run", recorded)
    settled = run.settle_precision(Recipe(), CPU)  # the default recipe asks for "auto"
    assert settled.train.precision == recorded
    assert run.check_resume(settled) == {}
    # an explicit other precision changes what the steps compute: refused like any such field
    other = "bf16" if recorded == "fp32" else "fp32"
    with pytest.raises(AlignError, match="train.precision"):
        run.check_resume(run.settle_precision(Recipe(train=TrainConfig(precision=other)), CPU))


def test_a_fresh_run_records_the_concrete_precision(tmp_path):
    run = RunDir(tmp_path / "fresh")
    (tmp_path / "fresh").mkdir()
    # a recipe left by an attempt cut before its first checkpoint does not count as the run's own
    run.write_recipe(Recipe(train=TrainConfig(precision="fp32")))
    settled = run.settle_precision(Recipe(), CPU)
    assert settled.train.precision == P.resolve_precision("auto", CPU) != "auto"
    assert Recipe().train.precision == "auto"  # the caller's recipe is left as it was
    run.write_recipe(settled)
    assert load_recipe(run.recipe_path).train.precision == settled.train.precision


def test_training_records_the_precision_it_ran_in(small_digits_shards, tmp_path):
    from align.training import train
    from recipes import tiny_recipe

    recipe = tiny_recipe(small_digits_shards, "lora", name="precision", train__steps=2)
    assert recipe.train.precision == "auto"
    train(recipe, tmp_path / "run")
    expected = P.resolve_precision("auto", CPU)
    run = RunDir(tmp_path / "run")
    assert run.recipe().train.precision == expected
    assert load_recipe(run.latest() / A.RESOLVED_RECIPE).train.precision == expected
