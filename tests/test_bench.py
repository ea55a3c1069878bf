"""tools/bench.py runs end to end in its quick mode and reports every figure as finite, positive JSON.

Speed targets are not asserted here (they depend on the machine and its load); the full bench
reports them. This only proves the benchmark works from a clean folder with one command.
"""
from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent


def test_quick_bench_prints_its_figures_as_json(tmp_path):
    out = tmp_path / "bench"
    env = dict(os.environ, PYTHONPATH=str(REPO))
    # one thread: while other tests share the cores, two OpenMP threads per process were measured
    # running several times slower than one (they wait on each other at every parallel region)
    done = subprocess.run([sys.executable, str(REPO / "tools" / "bench.py"), "--quick", "--json", "--threads", "1",
                           "--out", str(out)],
                          env=env, capture_output=True, text=True, timeout=900)
    assert done.returncode == 0, done.stderr[-3000:]
    result = json.loads(done.stdout.strip().splitlines()[-1])  # the last stdout line is the JSON object
    for key in ("speedup_vs_textbook", "text_step_fraction_of_peak", "cache_build_fraction_of_tower"):
        assert math.isfinite(result[key]) and result[key] > 0, (key, result[key])
    assert result["peak_gflops"]["fp32"] > 0 and result["peak_gflops"]["bf16"] > 0
    assert all(math.isfinite(s) and s > 0 for s in result["scaling"]["epoch_s"])
    assert len(result["scaling"]["epoch_s"]) == len(result["scaling"]["pairs"]) == 3
    assert result["precision"]["fp32"]["pairs_per_s"] > 0 and result["precision"]["bf16"]["pairs_per_s"] > 0
    assert set(result["targets"]) == {"speedup_vs_textbook", "text_step_fraction_of_peak",
                                      "cache_build_fraction_of_tower", "scaling"}
    assert json.loads((out / "bench.json").read_text())["speedup_vs_textbook"] == result["speedup_vs_textbook"]
    assert (out / "bench.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG spec, 5.2)
