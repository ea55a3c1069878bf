"""Scale: training from stored vectors at 100k, 1M and 4M pairs, parallel pack, parallel feature build.

    python tools/bench_scale.py                          # the full run (prepares ~25 GB under --out once)
    python tools/bench_scale.py --sizes 2000 20000 --quick   # a quick look
    make bench                                           # runs this after the other benchmarks

Datasets: seeded synthetic stored vectors (768-d, float16 source), captions drawn from the demo
catalogue's templates with their glaze and pattern as labels, packed by ``align pack --vectors`` and
prepared by ``align features`` (the caption table and any cache the recipe needs). Preparation runs
once per size and is kept under ``--out`` (a stamp file marks a finished one); it is not timed.

Per size, in a fresh child process (``align train`` of the LoRA MiniLM text tower on the stored
vectors, batch ``--batch``, one logged line per step), what is measured:

* ``first_step_s``: seconds from the child's start to its first optimizer step's log line (the
  process start, the imports, the text tower, opening the training table, one step);
* ``peak_rss``: the child's peak resident set size (``wait4``'s ``ru_maxrss``), nothing subtracted;
  ``peak_anon`` / ``peak_file_pages``: the peaks of its anonymous memory and of the file pages it
  has mapped (``RssAnon`` / ``RssFile``, sampled every 20 ms): the process's own memory, and page
  cache of the memory-mapped features and table (shared with other processes, reclaimable);
* ``steps_per_s``: steady-state steps per second over the logged steps after the first two.

Pack: the demo catalogue's drawn tiles packed with 1 and with 2 worker processes (one thread each),
alternating, ``--rounds`` rounds, median of the per-round ratios. Feature build: the frozen
EfficientNet-Lite0 tower over those tiles with 1 and with 2 local processes (one thread each, the
stand-in on this machine for two devices), alternating the same way.

Prints a table, writes ``scale.json`` (keys ``rss_ratio_4m_vs_100k``, ``first_step_s_4m``,
``pack_speedup_2_workers``, ``build_speedup_2_processes``, every row, and each target met or not)
and ``scale.png`` under ``--out``; ``--json`` also prints the JSON as the last line.
"""
from __future__ import annotations

import argparse
import csv
import json
import os
import re
import shutil
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
ALIGN = [sys.executable, "-m", "align.cli"]
GIB = 1024 ** 3
DIM = 768
TARGETS = {  # key: (limit, "max" = at most / "min" = at least)
    "rss_ratio_4m_vs_100k": (1.3, "max"),
    "first_step_s_4m": (60.0, "max"),
    "pack_speedup_2_workers": (1.7, "min"),
    "build_speedup_2_processes": (1.7, "min"),
}


def _env(threads: int | None = None) -> dict:
    from align.offline import offline_env

    env = offline_env(dict(os.environ))
    env["PYTHONPATH"] = str(ROOT)
    env["COLUMNS"] = "400"  # rich writes long lines whole into the logs the benchmark reads
    if threads is not None:
        env["OMP_NUM_THREADS"] = env["MKL_NUM_THREADS"] = str(threads)
    return env


def _run(cmd: list[str], *, threads: int | None = None, log: Path | None = None) -> None:
    out = open(log, "w") if log else subprocess.DEVNULL
    try:
        done = subprocess.run(cmd, env=_env(threads), stdout=out, stderr=subprocess.STDOUT, cwd=ROOT)
    finally:
        if log:
            out.close()
    if done.returncode:
        tail = log.read_text()[-3000:] if log else ""
        raise SystemExit(f"failed ({done.returncode}): {' '.join(map(str, cmd))}\n{tail}")


# --------------------------------------------------------------------------- stored-vector datasets

def write_source(folder: Path, n: int, seed: int = 0) -> None:
    """rows.csv (key, caption, glaze, pattern), keys.txt and vectors.npy (n, 768) float16.

    Each vector is its glaze's and its pattern's seeded direction plus noise, so the pairs carry a
    signal a text tower can learn; the values only have to be realistic in size, not meaningful."""
    import numpy as np

    from align.data.demo import GLAZES, PATTERNS, caption_for

    glazes, patterns = list(GLAZES), list(PATTERNS)
    rng = np.random.default_rng(seed)
    centres_g = rng.standard_normal((len(glazes), DIM)).astype(np.float32)
    centres_p = rng.standard_normal((len(patterns), DIM)).astype(np.float32)
    vectors = np.lib.format.open_memmap(folder / "vectors.npy", mode="w+", dtype=np.float16, shape=(n, DIM))
    block = 100_000
    with open(folder / "rows.csv", "w", newline="", encoding="utf-8") as rows, \
            open(folder / "keys.txt", "w", encoding="utf-8") as keys:
        table = csv.writer(rows)
        table.writerow(["key", "caption", "glaze", "pattern"])
        for start in range(0, n, block):
            stop = min(n, start + block)
            g = rng.integers(len(glazes), size=stop - start)
            p = rng.integers(len(patterns), size=stop - start)
            noise = rng.standard_normal((stop - start, DIM), dtype=np.float32)
            rows_v = centres_g[g] + centres_p[p] + noise  # (b, 768)
            vectors[start:stop] = (rows_v / np.linalg.norm(rows_v, axis=1, keepdims=True)).astype(np.float16)
            for offset in range(stop - start):
                key = f"t{start + offset:08d}"
                glaze, pattern = glazes[g[offset]], patterns[p[offset]]
                table.writerow([key, caption_for(glaze, pattern, rng), glaze, pattern])
                keys.write(key + "\n")
    vectors.flush()
    del vectors
    (folder / "source-written").write_text("")  # the pack may start (or resume) from these files


def recipe_text(shards: Path, batch: int, steps: int) -> str:
    return f"""name = "scale"
[vision]
source = "stored"
[text]
kind = "lora"
max_length = 32
[data]
shards = "{shards}"
[train]
steps = {steps}
batch_size = {batch}
warmup_steps = 2
log_every = 1
checkpoint_every = {steps}
keep_checkpoints = 1
"""


def prepare(out: Path, n: int, batch: int, steps: int) -> Path:
    """The packed dataset of n pairs and its recipe, made once and in stages (a source already written
    or a pack already made is kept; ``ready`` marks a dataset whose training table is built too)."""
    folder = out / f"stored-{n}"
    recipe, packed = folder / "recipe.toml", folder / "packed"
    if not (folder / "ready").is_file():
        print(f"preparing {n:,} stored-vector pairs under {folder} (once)", flush=True)
        if not (packed / "manifest.json").is_file():
            if not (folder / "source-written").is_file():
                shutil.rmtree(folder, ignore_errors=True)
                folder.mkdir(parents=True)
                write_source(folder, n)
            # else: the source is complete (it is written before the pack starts, and removed only after
            # the pack finished); an interrupted pack resumes from its finished shards
            _run(ALIGN + ["pack", str(folder / "rows.csv"), "--out", str(packed), "--vectors",
                          str(folder / "vectors.npy"), "--vector-keys", str(folder / "keys.txt"),
                          "--vector-model", "synthetic-768", "--shard-size", "10000", "--workers", "2"],
                 log=folder / "pack.log")
            for name in ("vectors.npy", "rows.csv", "keys.txt"):  # the pack holds them now
                (folder / name).unlink()
        recipe.write_text(recipe_text(packed, batch, steps))
        _run(ALIGN + ["features", str(recipe)], log=folder / "features.log")
        (folder / "ready").write_text("")
    recipe.write_text(recipe_text(packed, batch, steps))
    return recipe


def time_training(recipe: Path, run_dir: Path) -> dict:
    """One fresh ``align train`` child: seconds to its first step's log line, peak RSS, steady steps/s."""
    shutil.rmtree(run_dir, ignore_errors=True)
    run_dir.mkdir(parents=True)
    log, errors = run_dir / "metrics.jsonl", run_dir.parent / f"{run_dir.name}.stderr"
    started = time.perf_counter()
    with open(errors, "w") as stderr:
        child = subprocess.Popen(ALIGN + ["train", str(recipe), "--run-dir", str(run_dir)], env=_env(),
                                 stdout=subprocess.DEVNULL, stderr=stderr, cwd=ROOT)
    first_step_s, peak_anon, peak_file = float("nan"), 0, 0
    while True:  # wait4 (not poll) so the rusage read is this child's alone
        try:  # the child's own memory and the file pages (page cache) it has mapped, apart
            status_text = Path(f"/proc/{child.pid}/status").read_text()
            peak_anon = max(peak_anon, int(status_text.split("RssAnon:")[1].split()[0]) * 1024)
            peak_file = max(peak_file, int(status_text.split("RssFile:")[1].split()[0]) * 1024)
        except (OSError, IndexError, ValueError):
            pass
        pid, status, usage = os.wait4(child.pid, os.WNOHANG)
        if first_step_s != first_step_s and log.is_file() and log.stat().st_size:
            first_step_s = time.perf_counter() - started
        if pid:
            break
        time.sleep(0.02)
    child.returncode = os.waitstatus_to_exitcode(status)
    if child.returncode:
        raise SystemExit(f"align train failed:\n{errors.read_text()[-3000:]}")
    records = [json.loads(line) for line in log.read_text().splitlines() if line.strip()]
    records = [r for r in records if "loss" in r]
    steady = records[2:]  # the first steps carry warm-up (allocator, first kernels)
    rate = ((len(steady) - 1) / (steady[-1]["elapsed_s"] - steady[0]["elapsed_s"]) if len(steady) > 1
            else float("nan"))
    return {"first_step_s": first_step_s, "peak_rss": usage.ru_maxrss * 1024, "peak_anon": peak_anon,
            "peak_file_pages": peak_file, "steps_per_s": rate,
            "final_loss": records[-1]["loss"] if records else None}


# --------------------------------------------------------------------------- pack and feature build

def drawn_tiles(out: Path, per_pair: int) -> Path:
    """The demo catalogue's drawn tiles (real PNGs), made once."""
    folder = out / f"tiles-{per_pair}"
    if not (folder / "ready").is_file():
        from align.data.demo import write_catalogue

        shutil.rmtree(folder, ignore_errors=True)
        write_catalogue(folder / "catalogue", per_pair=per_pair)
        (folder / "ready").write_text("")
    return folder / "catalogue"


def time_pack(source: Path, out: Path, workers: int) -> float:
    """Samples per second of ``align pack --workers N`` (one thread per process)."""
    shutil.rmtree(out, ignore_errors=True)
    started = time.perf_counter()
    _run(ALIGN + ["pack", str(source), "--out", str(out), "--workers", str(workers)], threads=1)
    seconds = time.perf_counter() - started
    manifest = json.loads((out / "manifest.json").read_text())
    return sum(split["samples"] for split in manifest["splits"].values()) / seconds


def build_recipe(shards: Path, cache: Path) -> str:
    return f"""name = "scale-build"
[vision]
model = "efficientnet_lite0"
image_size = 224
channels_last = true
batch_size = 32
workers = 0
feature_cache = "{cache}"
[data]
shards = "{shards}"
[train]
threads = 1
"""


def time_build(shards: Path, work: Path, processes: int) -> float:
    """Images per second of ``align features --processes N`` (one thread each), from the command's own
    build lines: the tower passes of every split, timed once every process holds its tower (the
    process start and the weight load are the same whatever N, and left out)."""
    cache = work / f"cache-{processes}"
    shutil.rmtree(cache, ignore_errors=True)
    recipe = work / f"build-{processes}.toml"
    recipe.write_text(build_recipe(shards, cache))
    log = work / f"build-{processes}.log"
    _run(ALIGN + ["features", str(recipe), "--processes", str(processes)], threads=1, log=log)
    built = re.findall(r"cached (\d+) \w+ image\(s\) x \d+ view\(s\) in ([\d.]+)s", log.read_text())
    if not built:
        raise SystemExit(f"no build line in {log}")
    return sum(int(n) for n, _ in built) / sum(float(s) for _, s in built)


def alternate(measure, rounds: int) -> tuple[list[float], list[float], float]:
    """(rates with 1, rates with 2, median of the per-round ratios), 1 and 2 alternating in order."""
    ones, twos, ratios = [], [], []
    for round_ in range(rounds):
        order = (1, 2) if round_ % 2 == 0 else (2, 1)
        rates = {n: measure(n) for n in order}
        ones.append(rates[1])
        twos.append(rates[2])
        ratios.append(rates[2] / rates[1])
    return ones, twos, statistics.median(ratios)


# --------------------------------------------------------------------------- report

def verdicts(summary: dict) -> dict:
    out = {}
    for key, (limit, kind) in TARGETS.items():
        value = summary.get(key)
        met = value is not None and value == value and (value <= limit if kind == "max" else value >= limit)
        out[key] = {"value": value, "target": f"{'<=' if kind == 'max' else '>='} {limit:g}", "met": bool(met)}
    return out


def plot(rows: list[dict], summary: dict, path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 3, figsize=(13, 3.8))
    sizes = [r["pairs"] for r in rows]
    axes[0].plot(sizes, [r["peak_rss"] / GIB for r in rows], "o-", label="peak RSS")
    if all("peak_anon" in r for r in rows):
        axes[0].plot(sizes, [r["peak_anon"] / GIB for r in rows], "s--", label="anonymous (its own memory)")
        axes[0].plot(sizes, [r["peak_file_pages"] / GIB for r in rows], "^:", label="mapped file pages (page cache)")
    axes[0].set(xscale="log", xlabel="training pairs", ylabel="GiB", title="memory of align train")
    axes[0].set_ylim(bottom=0)
    axes[0].legend(loc="lower right", fontsize=8)
    axes[1].plot(sizes, [r["first_step_s"] for r in rows], "o-", label="first optimizer step")
    axes[1].axhline(60, color="grey", linestyle=":", label="target at 4M")
    axes[1].set(xscale="log", xlabel="training pairs", ylabel="seconds from start", title="time to the first step")
    axes[1].set_ylim(bottom=0)
    axes[1].legend(loc="center right", fontsize=8)
    names = ["pack", "feature build"]
    values = [summary.get("pack_speedup_2_workers") or 0, summary.get("build_speedup_2_processes") or 0]
    axes[2].bar(names, values, color=["#4c72b0", "#55a868"])
    axes[2].axhline(1.7, color="grey", linestyle=":", label="target 1.7x")
    axes[2].set(ylabel="2 processes / 1 process", title="two processes, one thread each")
    axes[2].legend(loc="lower right", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def print_table(rows: list[dict], summary: dict) -> None:
    from rich.console import Console
    from rich.table import Table

    table = Table(title="training from stored vectors (768-d), one fresh process per size")
    for name in ("pairs", "first step (s)", "peak RSS (GiB)", "anonymous / file pages (GiB)", "steps/s",
                 "final loss"):
        table.add_column(name, justify="right")
    for r in rows:
        table.add_row(f"{r['pairs']:,}", f"{r['first_step_s']:.1f}", f"{r['peak_rss'] / GIB:.2f}",
                      f"{r['peak_anon'] / GIB:.2f} / {r['peak_file_pages'] / GIB:.2f}",
                      f"{r['steps_per_s']:.2f}", f"{r['final_loss']:.3f}")
    targets = Table(title="targets")
    for name in ("figure", "value", "target", "met"):
        targets.add_column(name)
    for key, v in summary["targets"].items():
        value = "n/a" if v["value"] is None else f"{v['value']:.2f}"
        targets.add_row(key, value, v["target"], "met" if v["met"] else "NOT met")
    console = Console()
    console.print(table)
    console.print(targets)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--out", default=str(ROOT / "bench_out" / "scale"))
    parser.add_argument("--sizes", type=int, nargs="+", default=[100_000, 1_000_000, 4_000_000])
    parser.add_argument("--batch", type=int, default=256, help="pairs per training step")
    parser.add_argument("--steps", type=int, default=12, help="optimizer steps per timed training")
    parser.add_argument("--pack-tiles-per-pair", type=int, default=48, help="drawn tiles per glaze x pattern to pack")
    parser.add_argument("--build-tiles-per-pair", type=int, default=4, help="drawn tiles per glaze x pattern to embed")
    parser.add_argument("--rounds", type=int, default=3, help="alternating rounds of the 1-vs-2 process timings")
    parser.add_argument("--quick", action="store_true", help="small everything: checks the benchmark runs")
    parser.add_argument("--json", action="store_true", help="print the JSON summary as the last line")
    args = parser.parse_args(argv)
    if args.quick:
        args.sizes, args.steps, args.rounds = [2000, 20000], 5, 1
        args.pack_tiles_per_pair = args.build_tiles_per_pair = 1
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)

    rows = []
    for n in args.sizes:
        recipe = prepare(out, n, args.batch, args.steps)
        row = {"pairs": n, **time_training(recipe, out / "runs" / f"train-{n}")}
        print(f"{n:,} pairs: first step {row['first_step_s']:.1f} s, peak RSS {row['peak_rss'] / GIB:.2f} GiB, "
              f"{row['steps_per_s']:.2f} steps/s", flush=True)
        rows.append(row)
    by_size = {r["pairs"]: r for r in rows}
    summary: dict = {"rows": rows, "dim": DIM, "batch": args.batch, "steps": args.steps}
    smallest, largest = min(by_size), max(by_size)
    summary["rss_ratio_largest_vs_smallest"] = by_size[largest]["peak_rss"] / by_size[smallest]["peak_rss"]
    if 100_000 in by_size and 4_000_000 in by_size:
        summary["rss_ratio_4m_vs_100k"] = by_size[4_000_000]["peak_rss"] / by_size[100_000]["peak_rss"]
        # the same split: the process's own memory, and the mapped page cache (shared, reclaimable)
        summary["anon_ratio_4m_vs_100k"] = by_size[4_000_000]["peak_anon"] / by_size[100_000]["peak_anon"]
        summary["first_step_s_4m"] = by_size[4_000_000]["first_step_s"]

    tiles = drawn_tiles(out, args.pack_tiles_per_pair)
    ones, twos, summary["pack_speedup_2_workers"] = alternate(
        lambda n: time_pack(tiles, out / f"pack-{n}", n), args.rounds)
    summary["pack_samples_per_s"] = {"1": ones, "2": twos}
    shards = out / f"build-shards-{args.build_tiles_per_pair}"
    if not (shards / "manifest.json").is_file():
        time_pack(drawn_tiles(out, args.build_tiles_per_pair), shards, 1)
    ones, twos, summary["build_speedup_2_processes"] = alternate(
        lambda n: time_build(shards, out, n), args.rounds)
    summary["build_images_per_s"] = {"1": ones, "2": twos}
    summary["targets"] = verdicts(summary)

    print_table(rows, summary)
    print(f"pack: {statistics.median(summary['pack_samples_per_s']['1']):.0f} samples/s with 1 worker, "
          f"x{summary['pack_speedup_2_workers']:.2f} with 2; feature build: "
          f"{statistics.median(summary['build_images_per_s']['1']):.1f} img/s with 1 process, "
          f"x{summary['build_speedup_2_processes']:.2f} with 2 (median of {args.rounds} alternating rounds)")
    plot(rows, summary, out / "scale.png")
    (out / "scale.json").write_text(json.dumps(summary, indent=2))
    print(f"wrote {out / 'scale.json'} and {out / 'scale.png'}")
    if args.json:
        print(json.dumps(summary))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
