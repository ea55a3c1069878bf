"""tools/bench.py runs end to end in its quick mode, twice in the same folder, and reports every
figure as finite, positive JSON with each target's figure and verdict.

Speed targets are not asserted here (they depend on the machine and its load); the full bench
reports them. This only proves the benchmark works from a clean folder with one command, and again
in the folder its first run left (a second `make bench` in the same checkout).
"""
from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent


def _quick_bench(out: Path) -> dict:
    env = dict(os.environ, PYTHONPATH=str(REPO))
    # one thread: while other tests share the cores, two OpenMP threads per process were measured
    # running several times slower than one (they wait on each other at every parallel region)
    done = subprocess.run([sys.executable, str(REPO / "tools" / "bench.py"), "--quick", "--json", "--threads", "1",
                           "--out", str(out)],
                          env=env, capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout.strip().splitlines()[-1])  # the last stdout line is the JSON object


def _finite_positive(value) -> bool:
    return isinstance(value, (int, float)) and math.isfinite(value) and value > 0


def test_quick_bench_prints_its_figures_as_json_and_runs_again_in_the_same_folder(tmp_path):
    out = tmp_path / "bench"
    first = _quick_bench(out)
    rounds = first["config"]["rounds"]
    assert rounds >= 3  # every ratio is the median of at least three alternating rounds
    size = next(iter(first["sizes"].values()))
    for key in ("speedup_vs_textbook", "speedup_vs_strong_textbook", "cached_pairs_per_s",
                "textbook_pairs_per_s", "textbook_strong_pairs_per_s", "cache_build_fraction_of_tower"):
        assert _finite_positive(size[key]), (key, size[key])
    assert all(len(v) == rounds for v in size["rounds"].values())
    assert first["speedup_vs_strong_textbook"] == size["speedup_vs_strong_textbook"]
    assert first["peak_gflops"]["fp32"] > 0 and first["peak_gflops"]["bf16"] > 0
    step = first["text_step"]
    assert _finite_positive(step["fraction_of_fp32_peak"]) and _finite_positive(step["fraction_of_bf16_peak"])
    precision = first["precision"]
    assert _finite_positive(precision["fp32"]["pairs_per_s"]) and _finite_positive(precision["bf16"]["pairs_per_s"])
    assert len(precision["fp32"]["loss_curve"]) == len(precision["bf16"]["loss_curve"]) == first["config"]["precision_steps"]
    scaling = first["scaling"]
    assert len(scaling["pairs"]) == len(scaling["steady_step_s"]) == len(scaling["startup_s"]) == 3
    assert all(_finite_positive(s) for s in scaling["steady_step_s"] + scaling["warmup_s"] + scaling["startup_s"])
    assert set(first["targets"]) == {"speedup_vs_strong_textbook", "text_step_fp32_fraction_of_fp32_peak",
                                     "text_step_bf16_fraction_of_bf16_peak", "scaling_step_ratio",
                                     "bf16_loss_curve_difference"} | {f"cache_build_fraction_of_tower_{s}px"
                                                                      for s in first["sizes"]}
    for target in first["targets"].values():
        assert math.isfinite(target["value"]) and isinstance(target["met"], bool) and target["target"][:2] in (">=", "<=")
    assert json.loads((out / "bench.json").read_text())["speedup_vs_textbook"] == first["speedup_vs_textbook"]
    assert (out / "bench.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG spec, 5.2)

    # the same folder again: caches and runs of the first run are measured afresh, not read back
    second = _quick_bench(out)
    assert _finite_positive(second["speedup_vs_strong_textbook"])
    assert all(_finite_positive(e["cache_build_images_per_s"]) for e in second["sizes"].values())
    assert json.loads((out / "bench.json").read_text())["bench_seconds"] == second["bench_seconds"]
