"""Training throughput: the textbook loop against align's cached-feature step, and both against the machine.

    python tools/bench.py                 # the full run (many minutes on 2 cores)
    python tools/bench.py --quick --json  # a short smoke run; last stdout line is one JSON object

In one process, on the same shards (the demo tile catalogue, drawn by ``align.data.demo``), the same
towers, batch size and step count, it times

(a) the textbook loop: every step decodes its images, preprocesses them and runs the frozen image
    tower, then the text step; plain (fp32, default memory format) and strong (channels_last, and
    bf16 autocast where align's own step runs bf16: what a careful user writes). The headline ratio
    is against the strong one; the JSON keeps both;
(b) align's training step (``align.training.train``) on the frozen-feature cache, in the precision
    ``train.precision = "auto"`` picks on this machine;

and measures the machine's matrix-multiply peak (fp32 and bf16, a large matmul in each dtype), the
text step's achieved FLOP/s (``torch.utils.flop_counter.FlopCounterMode``) as a share of both peaks,
the cache build rate against the tower's bare inference rate on preloaded tensors, bf16 against fp32
(speed, and the demo's loss curve both ways), dynamic padding, 1 thread against all cores, and the
steady time per step at growing pair counts (start-up and warm-up reported apart). The scaling run's
pairs are the cached features and captions of the drawn catalogue repeated (the text step's cost
does not depend on which pairs it sees, only on how many and how long the captions are).

Every ratio is the median of per-round ratios over ``rounds`` rounds in which the contenders take
turns, so load that drifts during the run hits each alike. Each target is reported met / not met
with its figure, in the table and in the JSON. A second run in the same ``--out`` folder measures
afresh: caches and runs of an earlier run are removed, the drawn catalogue is reused.
Figures go to OUT/bench.json and a plot to OUT/bench.png.
"""
from __future__ import annotations

import argparse
import dataclasses
import io
import json
import math
import os
import shutil
import statistics
import sys
import time
from pathlib import Path
from typing import Callable

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
from align.offline import use_offline_defaults  # noqa: E402

use_offline_defaults()  # models load from local paths only

import torch  # noqa: E402
import torch.nn.functional as F  # noqa: E402
from rich.console import Console  # noqa: E402
from rich.table import Table  # noqa: E402

from align.data.demo import write_catalogue  # noqa: E402
from align.data.pack import pack_source  # noqa: E402
from align.data.shards import iter_images, load_table  # noqa: E402
from align.features import image_features  # noqa: E402
from align.features.table import open_table, write_table  # noqa: E402
from align.recipe import VisionConfig, recipe_from_dict  # noqa: E402
from align.text import build_text_tower  # noqa: E402
from align.text.precision import resolve_precision, text_autocast  # noqa: E402
from align.training import TrainingData, prepare_training_data, train  # noqa: E402
from align.vision import load_image_tower  # noqa: E402

FULL = dict(per_pair=4, tile_px=160, sizes=(224, 160), batch=64, steps=12, warmup=2, rounds=3,
            scaling=(1000, 4000, 16000), scaling_steps=12, precision_steps=40, peak_sizes=(1024, 2048, 4096),
            peak_seconds=0.6, build_workers=(0, 2), vision_batch=64, tower_repeats=5, thread_probe=True)
# quick: every phase once through at toy sizes, still three rounds per ratio; the one-thread-against-all
# probe is left out (train() runs at the other thread count cost most of a quick run on a loaded machine)
QUICK = dict(per_pair=1, tile_px=64, sizes=(64,), batch=16, steps=3, warmup=1, rounds=3, scaling=(64, 128, 256),
             scaling_steps=3, precision_steps=4, peak_sizes=(256, 512), peak_seconds=0.2, build_workers=(0,),
             vision_batch=16, tower_repeats=3, thread_probe=False)
# (comparison, threshold): the targets, measured side by side in one run
TARGETS = {"speedup_vs_strong_textbook": (">=", 8.0), "text_step_fp32_fraction_of_fp32_peak": (">=", 0.6),
           "text_step_bf16_fraction_of_bf16_peak": (">=", 0.25), "cache_build_fraction_of_tower": (">=", 0.95),
           "scaling_step_ratio": ("<=", 1.1), "bf16_loss_curve_difference": ("<=", 0.01)}

log = Console(stderr=True)
quiet = Console(file=io.StringIO())  # train()'s own bars and messages stay out of the report


def machine() -> dict:
    flags = ""
    if Path("/proc/cpuinfo").is_file():
        flags = next((line for line in Path("/proc/cpuinfo").read_text().splitlines() if line.startswith("flags")), "")
    return {"cpus": os.cpu_count(), "torch_threads": torch.get_num_threads(), "torch": torch.__version__,
            "avx512_bf16": "avx512_bf16" in flags, "amx_bf16": "amx_bf16" in flags,
            "auto_precision": resolve_precision("auto", "cpu"), "load_average_start": list(os.getloadavg())}


def alternating(rounds: int, measures: dict[str, Callable[[], float]]) -> dict[str, list[float]]:
    """Each measurement once per round, in turn: a load spike or drift hits every contender alike."""
    out: dict[str, list[float]] = {name: [] for name in measures}
    for _ in range(rounds):
        for name, measure in measures.items():
            out[name].append(measure())
    return out


def median_ratio(top: list[float], bottom: list[float]) -> float:
    """The median of per-round ratios (each round's pair measured side by side)."""
    return statistics.median(a / b for a, b in zip(top, bottom))


# ---------------------------------------------------------------------------------------------
# the machine's matrix-multiply peak


def matmul_peak(dtype: torch.dtype, sizes, seconds: float = 0.6) -> float:
    """Best GFLOP/s of square matmuls (2 n^3 flops each) over a few sizes."""
    best = 0.0
    for n in sizes:
        a, b = torch.randn(n, n, dtype=dtype), torch.randn(n, n, dtype=dtype)
        a @ b  # first call picks kernels
        reps, elapsed = 0, 0.0
        start = time.perf_counter()
        while elapsed < seconds:
            a @ b
            reps += 1
            elapsed = time.perf_counter() - start
        best = max(best, 2 * n ** 3 * reps / elapsed / 1e9)
    return best


# ---------------------------------------------------------------------------------------------
# data and recipes


def draw_shards(work: Path, cfg: dict) -> Path:
    shards = work / "shards"
    if not (shards / "manifest.json").is_file():
        write_catalogue(work / "drawn", per_pair=cfg["per_pair"], size=cfg["tile_px"], seed=0, console=quiet)
        pack_source(work / "drawn" / "catalogue", shards, val_fraction=0.1, console=quiet)
    return shards


def bench_recipe(shards: Path, cache: Path, cfg: dict, size: int, **overrides):
    """The default LoRA text tower and loss; only sizes, steps and logging are set here."""
    steps = overrides.pop("steps", cfg["steps"])
    return recipe_from_dict({
        "name": "bench",
        "vision": {"image_size": size, "feature_cache": str(cache)},
        "data": {"shards": str(shards)},
        "train": {"batch_size": cfg["batch"], "steps": steps, "warmup_steps": min(5, steps - 1), "log_every": 1,
                  "checkpoint_every": 0, "keep_checkpoints": 1, "threads": cfg["threads"], **overrides},
    })


_runs = 0


def run_train(recipe, work: Path, data: TrainingData, flops: list | None = None) -> list[dict]:
    """align's own training loop on prepared (cached) data; the log record of every step."""
    global _runs
    _runs += 1
    records: list[dict] = []

    def on_step(record):
        if flops is not None:
            flops.append(counter.get_total_flops())
        records.append(dict(record))

    if flops is None:
        train(recipe, work / "runs" / f"run-{_runs}", console=quiet, on_step=on_step, data=data)
    else:
        from torch.utils.flop_counter import FlopCounterMode
        with FlopCounterMode(display=False) as counter:
            train(recipe, work / "runs" / f"run-{_runs}", console=quiet, on_step=on_step, data=data)
    return records


def median_step(times: list[float], warmup: int) -> float:
    # the median step after warm-up: a shared machine's load spikes move it far less than the mean
    return statistics.median(times[warmup:])


def steady_rate(records: list[dict], warmup: int, batch: int) -> tuple[float, float]:
    """(pairs/s, seconds per step) of the median step after ``warmup``, from the loop's own clock."""
    elapsed = [0.0] + [r["elapsed_s"] for r in records]
    step = median_step([b - a for a, b in zip(elapsed, elapsed[1:])], warmup)
    return batch / step, step


def tiled(data: TrainingData, n: int, shards: Path, work: Path) -> TrainingData:
    """``n`` pairs made by repeating the cached pairs: a training table whose rows point at the
    cached feature rows in turn (written like any training table, memory-mapped the same way)."""
    table = load_table(shards, "train")
    labels_of = dict(zip(table.keys, table.labels))
    keys, feature_rows = data.keys, data.table.feature_rows
    folder = work / "tiled" / str(n)
    write_table(folder, ((data.captions[i % len(data)], labels_of[keys[i % len(data)]], int(feature_rows[i % len(data)]))
                         for i in range(n)), {"tiled": n})
    return dataclasses.replace(data, table=open_table(folder))


# ---------------------------------------------------------------------------------------------
# (a) the textbook loop


def endless_images(shards: Path):
    while True:
        yield from iter_images(shards, "train")


class Textbook:
    """The textbook loop, set up once: decode, preprocess and run the tower every step, then the text
    step. ``strong``: channels_last, and the tower and text forward under ``precision``'s autocast
    (bf16 where align's own step runs bf16); the loss stays fp32 either way."""

    def __init__(self, shards: Path, recipe, size: int, cfg: dict, strong: bool, precision: str):
        self.cfg, self.precision = cfg, precision if strong else "fp32"
        self.tower = load_image_tower(VisionConfig(image_size=size, channels_last=strong))
        table = load_table(shards, "train")
        self.caption_of = dict(zip(table.keys, table.captions))
        self.text = build_text_tower(recipe.text, self.tower.feature_dim, seed=recipe.train.seed)
        self.log_scale = torch.nn.Parameter(torch.tensor(math.log(1 / 0.07)))
        params = [p for p in self.text.parameters() if p.requires_grad] + [self.log_scale]
        self.optimizer = torch.optim.AdamW(params, lr=recipe.train.lr, weight_decay=recipe.train.weight_decay)
        self.stream = endless_images(shards)
        self.text.train()

    def step(self) -> None:
        batch = self.cfg["batch"]
        keys, pixels = [], []
        for key, image in (next(self.stream) for _ in range(batch)):
            keys.append(key)
            pixels.append(self.tower.preprocess(image))
        with text_autocast(self.precision, "cpu"):
            image_emb = self.tower.embed_pixels(torch.stack(pixels)).float()  # (B, D)
            text_emb = self.text(**self.text.tokenize([self.caption_of[k] for k in keys])).float()  # (B, D)
        # symmetric InfoNCE with a learned temperature (Radford et al. 2021, the paper's pseudo-code)
        logits = self.log_scale.exp().clamp(max=100) * text_emb @ image_emb.T  # (B, B)
        target = torch.arange(batch)
        loss = (F.cross_entropy(logits, target) + F.cross_entropy(logits.T, target)) / 2
        loss.backward()
        self.optimizer.step()
        self.optimizer.zero_grad(set_to_none=True)

    def pairs_per_s(self) -> float:
        """Pairs/s of the median step after warm-up, over one measurement of ``steps`` steps."""
        torch.set_num_threads(self.cfg["threads"])
        times = []
        for _ in range(self.cfg["steps"]):
            start = time.perf_counter()
            self.step()
            times.append(time.perf_counter() - start)
        return self.cfg["batch"] / median_step(times, self.cfg["warmup"])


class PaddingProbe:
    """Text step time with each batch padded to its longest caption (align) vs to text.max_length."""

    def __init__(self, data: TrainingData, recipe, cfg: dict):
        self.data, self.cfg = data, cfg
        self.text = build_text_tower(recipe.text, data.feature_dim, seed=recipe.train.seed)
        self.text.train()
        self.optimizer = torch.optim.AdamW([p for p in self.text.parameters() if p.requires_grad], lr=recipe.train.lr)
        self.autocast = text_autocast(resolve_precision(recipe.train.precision, "cpu"), "cpu")
        self.lengths: dict[str, list[int]] = {"dynamic": [], "max_length": []}

    def pairs_per_s(self, mode: str) -> float:
        batch, times, text = self.cfg["batch"], [], self.text
        captions_all, features = self.data.captions, self.data.image_features
        for step in range(self.cfg["steps"]):
            rows = [(step * batch + i) % len(captions_all) for i in range(batch)]
            captions = [captions_all[i] for i in rows]
            start = time.perf_counter()
            if mode == "dynamic":
                tokens = text.tokenize(captions)
            else:
                enc = text.tokenizer(captions, padding="max_length", truncation=True, max_length=text.max_length,
                                     return_tensors="pt")
                tokens = {"input_ids": enc["input_ids"], "attention_mask": enc["attention_mask"]}
            with self.autocast:
                emb = text(**tokens).float()  # (B, D)
            logits = 14.3 * emb @ features[rows].T  # (B, B)
            target = torch.arange(batch)
            loss = (F.cross_entropy(logits, target) + F.cross_entropy(logits.T, target)) / 2
            loss.backward()
            self.optimizer.step()
            self.optimizer.zero_grad(set_to_none=True)
            times.append(time.perf_counter() - start)
            self.lengths[mode].append(tokens["input_ids"].shape[1])
        return batch / median_step(times, self.cfg["warmup"])


# ---------------------------------------------------------------------------------------------
# the cache build against the bare tower


def tower_rate(size: int, shards: Path, batch: int, repeats: int = 3) -> float:
    """The tower's inference images/s on preprocessed tensors already in memory (channels_last)."""
    tower = load_image_tower(VisionConfig(image_size=size))
    images = []
    for _, image in iter_images(shards, "train"):
        images.append(tower.preprocess(image))
        if len(images) == batch:
            break
    pixels = torch.stack(images)  # (b, 3, H, W)
    tower.embed_pixels(pixels)  # kernels picked on the first pass
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        tower.embed_pixels(pixels)
        times.append(time.perf_counter() - start)
    return len(images) / median_step(times, 0)


def build_rate(size: int, shards: Path, cache: Path, workers: int, batch: int) -> dict:
    """A fresh cache build: images/s over the whole build, and of its median full chunk (steady state).

    The folder is emptied first: an entry left by an earlier bench run would be found complete and
    not built at all (no build report; nothing measured)."""
    shutil.rmtree(cache, ignore_errors=True)
    cfg = VisionConfig(image_size=size, workers=workers, feature_cache=str(cache), batch_size=batch)
    tower = load_image_tower(cfg)
    finished: list[float] = []
    started = time.perf_counter()
    feats = image_features(tower, shards, "train", cfg, quiet, on_chunk=lambda _: finished.append(time.perf_counter()))
    seconds = feats.build.seconds if feats.build is not None else time.perf_counter() - started
    whole = len(feats) / max(seconds, 1e-9)
    full = [b - a for a, b in zip(finished, finished[1:])][:-1]  # the last chunk is short
    return {"images_per_s": whole, "steady_images_per_s": batch / median_step(full, 0) if len(full) > 1 else whole}


# ---------------------------------------------------------------------------------------------
# the run


_phases: list[tuple[str, float]] = []


def phase(message: str) -> None:
    """Announce a phase on stderr with the time so far, and remember when it began."""
    now = time.perf_counter()
    _phases.append((message, now))
    log.print(f"[{now - _phases[0][1]:6.1f}s] {message}")


def run(cfg: dict, out: Path) -> dict:
    work = out / "work"
    work.mkdir(parents=True, exist_ok=True)
    for stale in ("runs", "tiled"):  # an earlier run's folders: train() refuses a run folder that holds a run
        shutil.rmtree(work / stale, ignore_errors=True)
    torch.set_num_threads(cfg["threads"])
    result: dict = {"machine": machine(), "config": {k: list(v) if isinstance(v, tuple) else v for k, v in cfg.items()}}
    precision = result["machine"]["auto_precision"]  # what align's default recipe trains in here

    phase("measuring the matrix-multiply peak (fp32, bf16)")
    peak = {name: matmul_peak(dtype, cfg["peak_sizes"], cfg["peak_seconds"])
            for name, dtype in (("fp32", torch.float32), ("bf16", torch.bfloat16))}
    result["peak_gflops"] = peak

    phase("drawing and packing the tile catalogue")
    shards = draw_shards(work, cfg)
    result["train_images"] = len(load_table(shards, "train"))

    sizes: dict = {}
    for size in cfg["sizes"]:
        sizes[str(size)], data, recipe, records = measure_size(size, shards, work, cfg, precision, result["train_images"])
        if size == cfg["sizes"][0]:
            native_data, native_recipe, native_records = data, recipe, records
    result["sizes"] = sizes
    native = sizes[str(cfg["sizes"][0])]
    result["speedup_vs_strong_textbook"] = native["speedup_vs_strong_textbook"]
    result["speedup_vs_textbook"] = native["speedup_vs_textbook"]

    phase("counting the text step's FLOPs (the same batches, replayed under FlopCounterMode)")
    result["text_step"] = text_step_flops(native_recipe, native_data, native_records, work, cfg, peak, precision)
    result["text_step"]["rate_pairs_per_s"] = native["cached_pairs_per_s"]

    phase("bf16 against fp32 (speed in alternating rounds, and the loss curve)")
    result["precision"] = precision_comparison(shards, work, cfg, native_data, result["text_step"], peak)

    phase("dynamic padding against padding to text.max_length")
    probe = PaddingProbe(native_data, native_recipe, cfg)
    rounds = alternating(cfg["rounds"], {m: lambda m=m: probe.pairs_per_s(m) for m in ("dynamic", "max_length")})
    result["padding"] = {mode: {"pairs_per_s": statistics.median(rates),
                                "mean_padded_length": statistics.fmean(probe.lengths[mode])}
                         for mode, rates in rounds.items()}
    result["padding"]["dynamic_speedup"] = median_ratio(rounds["dynamic"], rounds["max_length"])

    if cfg["thread_probe"]:
        phase("threads: one against all cores")
        cache = work / f"cache-{cfg['sizes'][0]}-w0"
        rounds = alternating(cfg["rounds"], {str(n): lambda n=n: steady_rate(run_train(
            bench_recipe(shards, cache, cfg, cfg["sizes"][0], threads=n), work, native_data), cfg["warmup"],
            cfg["batch"])[0] for n in sorted({cfg["threads"], 1, os.cpu_count() or 1})})
        torch.set_num_threads(cfg["threads"])
        result["threads_pairs_per_s"] = {n: statistics.median(v) for n, v in rounds.items()}
    else:
        result["threads_pairs_per_s"] = {str(cfg["threads"]): native["cached_pairs_per_s"]}

    phase("steady time per step at " + ", ".join(map(str, cfg["scaling"])) + " pairs")
    result["scaling"] = scaling(shards, work, cfg, native_data)
    result["machine"]["load_average_end"] = list(os.getloadavg())
    phase("done")
    result["phase_seconds"] = {name: round(b - a, 2) for (name, a), (_, b) in zip(_phases, _phases[1:])}
    result["targets"] = targets(result)
    return result


def measure_size(size: int, shards: Path, work: Path, cfg: dict, precision: str, train_images: int):
    """Tower alone, cache builds, and the three loops in alternating rounds at one image size."""
    entry: dict = {}
    phase(f"[{size} px] tower alone on preloaded tensors")
    entry["tower_images_per_s"] = tower_rate(size, shards, batch=cfg["vision_batch"], repeats=cfg["tower_repeats"])
    builds = {}
    for workers in (cfg["build_workers"] if size == cfg["sizes"][0] else (0,)):
        phase(f"[{size} px] building the feature cache with {workers} decoding worker(s)")
        builds[workers] = build_rate(size, shards, work / f"cache-{size}-w{workers}", workers, cfg["vision_batch"])
        entry[f"cache_build_workers_{workers}"] = builds[workers]
    best = max(builds, key=lambda w: builds[w]["steady_images_per_s"])
    entry["cache_build_workers"] = best
    entry["cache_build_images_per_s"] = builds[best]["images_per_s"]  # start-up and the short last chunk included
    entry["cache_build_steady_images_per_s"] = builds[best]["steady_images_per_s"]
    entry["cache_build_fraction_of_tower"] = builds[best]["steady_images_per_s"] / entry["tower_images_per_s"]
    entry["cache_build_whole_fraction_of_tower"] = builds[best]["images_per_s"] / entry["tower_images_per_s"]

    recipe = bench_recipe(shards, work / f"cache-{size}-w0", cfg, size)
    data = prepare_training_data(recipe, quiet)
    plain = Textbook(shards, recipe, size, cfg, strong=False, precision=precision)
    strong = Textbook(shards, recipe, size, cfg, strong=True, precision=precision)
    kept: list = []

    def cached() -> float:
        kept[:] = run_train(recipe, work, data)
        return steady_rate(kept, cfg["warmup"], cfg["batch"])[0]

    phase(f"[{size} px] textbook (fp32), textbook strong (channels_last + {precision}) and align on the cache, "
          f"{cfg['rounds']} alternating rounds")
    rounds = alternating(cfg["rounds"], {"textbook": plain.pairs_per_s, "strong": strong.pairs_per_s, "cached": cached})
    entry["textbook_pairs_per_s"] = statistics.median(rounds["textbook"])
    entry["textbook_strong_pairs_per_s"] = statistics.median(rounds["strong"])
    entry["textbook_strong_is"] = f"channels_last + {precision}"
    entry["cached_pairs_per_s"] = statistics.median(rounds["cached"])
    entry["cached_precision"] = precision
    entry["speedup_vs_textbook"] = median_ratio(rounds["cached"], rounds["textbook"])
    entry["speedup_vs_strong_textbook"] = median_ratio(rounds["cached"], rounds["strong"])
    entry["rounds"] = rounds
    # steps after which building the cache once has cost less than running the tower every step
    saved_per_step = cfg["batch"] / entry["textbook_strong_pairs_per_s"] - cfg["batch"] / entry["cached_pairs_per_s"]
    build_seconds = train_images / entry["cache_build_images_per_s"]
    entry["cache_pays_off_after_steps"] = build_seconds / saved_per_step if saved_per_step > 0 else None
    return entry, data, recipe, kept


def text_step_flops(recipe, data: TrainingData, records: list[dict], work: Path, cfg: dict, peak: dict,
                    precision: str) -> dict:
    """FLOPs per step (counted on a replay of the same batches) over the measured step time."""
    flops: list = []
    run_train(recipe, work, data, flops=flops)
    w = cfg["warmup"]
    per_step = (flops[-1] - flops[w - 1]) / (len(flops) - w)  # FLOPs of one step, averaged over the same steps
    _, step_seconds = steady_rate(records, w, cfg["batch"])
    achieved = per_step / step_seconds / 1e9
    return {"dtype": precision, "gflop_per_step": per_step / 1e9, "achieved_gflops": achieved,
            "fraction_of_fp32_peak": achieved / peak["fp32"], "fraction_of_bf16_peak": achieved / peak["bf16"]}


def precision_comparison(shards: Path, work: Path, cfg: dict, data: TrainingData, text_step: dict, peak: dict) -> dict:
    """fp32 and bf16 steps in alternating rounds (speed), and one longer run each (the loss curve)."""
    cache, size, w = work / f"cache-{cfg['sizes'][0]}-w0", cfg["sizes"][0], cfg["warmup"]
    rounds = alternating(cfg["rounds"], {name: lambda name=name: steady_rate(run_train(
        bench_recipe(shards, cache, cfg, size, precision=name), work, data), w, cfg["batch"])[0]
        for name in ("fp32", "bf16")})
    out: dict = {}
    for name in ("fp32", "bf16"):
        records = run_train(bench_recipe(shards, cache, cfg, size, precision=name, steps=cfg["precision_steps"]),
                            work, data)
        tail = records[-max(1, len(records) // 4):]
        rate = statistics.median(rounds[name])
        achieved = text_step["gflop_per_step"] * rate / cfg["batch"]
        out[name] = {"pairs_per_s": rate, "rounds": rounds[name], "loss_curve": [r["loss"] for r in records],
                     "final_loss": sum(r["loss"] for r in tail) / len(tail), "achieved_gflops": achieved,
                     "fraction_of_own_peak": achieved / peak[name]}
    out["bf16_speed_ratio"] = median_ratio(rounds["bf16"], rounds["fp32"])
    relative = [abs(b - a) / abs(a) for a, b in zip(out["fp32"]["loss_curve"], out["bf16"]["loss_curve"])]
    # the curve's distance: the mean relative difference over every logged step (the max is kept too)
    out["loss_curve_mean_relative_difference"] = statistics.fmean(relative)
    out["loss_curve_max_relative_difference"] = max(relative)
    return out


def scaling(shards: Path, work: Path, cfg: dict, data: TrainingData) -> dict:
    """Steady seconds per step (median after warm-up) at each pair count, in alternating rounds; warm-up
    (the first steps) and start-up (train()'s wall time outside its steps: opening the run and the table,
    building the towers, and the final checkpoint) reported apart."""
    cache, size, w = work / f"cache-{cfg['sizes'][0]}-w0", cfg["sizes"][0], cfg["warmup"]
    tables = {n: tiled(data, n, shards, work) for n in cfg["scaling"]}
    parts: dict = {n: {"steady_s": [], "warmup_s": [], "startup_s": []} for n in cfg["scaling"]}

    def measure(n: int) -> float:
        recipe = bench_recipe(shards, cache, cfg, size, steps=cfg["scaling_steps"])
        started = time.perf_counter()
        records = run_train(recipe, work, tables[n])
        wall = time.perf_counter() - started
        _, steady = steady_rate(records, w, cfg["batch"])
        parts[n]["steady_s"].append(steady)
        parts[n]["warmup_s"].append(records[w - 1]["elapsed_s"])
        parts[n]["startup_s"].append(wall - records[-1]["elapsed_s"])
        return steady

    rounds = alternating(cfg["rounds"], {str(n): lambda n=n: measure(n) for n in cfg["scaling"]})
    small, large = str(cfg["scaling"][0]), str(cfg["scaling"][-1])
    return {"pairs": list(cfg["scaling"]),
            "steady_step_s": [statistics.median(parts[n]["steady_s"]) for n in cfg["scaling"]],
            "warmup_s": [statistics.median(parts[n]["warmup_s"]) for n in cfg["scaling"]],
            "startup_s": [statistics.median(parts[n]["startup_s"]) for n in cfg["scaling"]],
            "steady_ratio_largest_vs_smallest": median_ratio(rounds[large], rounds[small]), "rounds": rounds}


def targets(result: dict) -> dict:
    """Each target: its figure, the threshold, met or not."""
    p = result["precision"]
    values = {"speedup_vs_strong_textbook": result["speedup_vs_strong_textbook"],
              "text_step_fp32_fraction_of_fp32_peak": p["fp32"]["fraction_of_own_peak"],
              "text_step_bf16_fraction_of_bf16_peak": p["bf16"]["fraction_of_own_peak"],
              "scaling_step_ratio": result["scaling"]["steady_ratio_largest_vs_smallest"],
              "bf16_loss_curve_difference": p["loss_curve_mean_relative_difference"]}
    for size, entry in result["sizes"].items():
        values[f"cache_build_fraction_of_tower_{size}px"] = entry["cache_build_fraction_of_tower"]
    out = {}
    for name, value in values.items():
        op, threshold = TARGETS[name.split("_tower_")[0] + "_tower" if name.startswith("cache_build") else name]
        out[name] = {"value": value, "target": f"{op} {threshold:g}",
                     "met": value >= threshold if op == ">=" else value <= threshold}
    return out


# ---------------------------------------------------------------------------------------------
# report


def plot(result: dict, path: Path) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (left, right) = plt.subplots(1, 2, figsize=(11, 4.2))
    s = result["scaling"]
    left.plot(s["pairs"], s["steady_step_s"], "o-", label="steady step (median after warm-up)")
    left.plot(s["pairs"], s["warmup_s"], "s--", label=f"first {result['config']['warmup']} step(s)")
    left.plot(s["pairs"], s["startup_s"], "^:", label="start-up and final checkpoint (outside the steps)")
    left.set_xscale("log")
    left.set_xlabel("training pairs")
    left.set_ylabel("seconds")
    left.set_title("time per step on the feature cache")
    left.legend(fontsize=8)
    names, rates = [], []
    for size, entry in result["sizes"].items():
        names += [f"textbook\n{size} px", f"textbook\n{entry['textbook_strong_is']}\n{size} px",
                  f"align cached\n{entry['cached_precision']}\n{size} px"]
        rates += [entry["textbook_pairs_per_s"], entry["textbook_strong_pairs_per_s"], entry["cached_pairs_per_s"]]
    right.bar(range(len(rates)), rates, color=["#999999" if n.startswith("textbook") else "#2a6ebb" for n in names])
    right.set_xticks(range(len(rates)), names, fontsize=7)
    right.set_ylabel("pairs / s")
    right.set_title(f"training throughput, batch {result['config']['batch']}")
    fig.tight_layout()
    temp = path.with_name(f".{path.name}.partial.png")
    fig.savefig(temp, dpi=110)
    plt.close(fig)
    os.replace(temp, path)


def report_table(result: dict) -> Table:
    table = Table(title=f"align bench ({result['config']['rounds']} alternating rounds per ratio)", show_edge=False)
    table.add_column("figure")
    table.add_column("value", justify="right")
    peak = result["peak_gflops"]
    rows = [("matmul peak fp32 / bf16 (GFLOP/s)", f"{peak['fp32']:.0f} / {peak['bf16']:.0f}"),
            ("train.precision auto resolves to", result["machine"]["auto_precision"])]
    for size, e in result["sizes"].items():
        rows += [(f"{size} px: tower alone (img/s)", f"{e['tower_images_per_s']:.1f}"),
                 (f"{size} px: cache build, steady / whole (img/s, {e['cache_build_workers']} workers)",
                  f"{e['cache_build_steady_images_per_s']:.1f} / {e['cache_build_images_per_s']:.1f}"),
                 (f"{size} px: cache build / tower, steady / whole",
                  f"{e['cache_build_fraction_of_tower']:.2f} / {e['cache_build_whole_fraction_of_tower']:.2f}"),
                 (f"{size} px: textbook loop, fp32 (pairs/s)", f"{e['textbook_pairs_per_s']:.1f}"),
                 (f"{size} px: textbook, {e['textbook_strong_is']} (pairs/s)", f"{e['textbook_strong_pairs_per_s']:.1f}"),
                 (f"{size} px: align on the cache, {e['cached_precision']} (pairs/s)", f"{e['cached_pairs_per_s']:.1f}"),
                 (f"{size} px: speedup vs strong / plain textbook",
                  f"{e['speedup_vs_strong_textbook']:.1f}x / {e['speedup_vs_textbook']:.1f}x")]
        if e["cache_pays_off_after_steps"] is not None:
            rows.append((f"{size} px: cache pays for itself after (steps)", f"{e['cache_pays_off_after_steps']:.1f}"))
    t, p = result["text_step"], result["precision"]
    rows += [("text step GFLOP per step", f"{t['gflop_per_step']:.2f}"),
             (f"text step achieved GFLOP/s ({t['dtype']})", f"{t['achieved_gflops']:.1f}"),
             ("  its fraction of the fp32 / bf16 peak", f"{t['fraction_of_fp32_peak']:.2f} / {t['fraction_of_bf16_peak']:.2f}"),
             ("fp32 / bf16 text step (pairs/s)", f"{p['fp32']['pairs_per_s']:.1f} / {p['bf16']['pairs_per_s']:.1f} "
                                                 f"(bf16 {p['bf16_speed_ratio']:.2f}x)"),
             ("fp32 step / fp32 peak, bf16 step / bf16 peak",
              f"{p['fp32']['fraction_of_own_peak']:.2f}, {p['bf16']['fraction_of_own_peak']:.2f}"),
             ("final loss fp32 / bf16", f"{p['fp32']['final_loss']:.3f} / {p['bf16']['final_loss']:.3f}"),
             ("loss curve bf16 vs fp32, mean / max relative difference",
              f"{p['loss_curve_mean_relative_difference']:.4f} / {p['loss_curve_max_relative_difference']:.4f}")]
    rows += [(f"{n} thread(s) (pairs/s)", f"{v:.1f}") for n, v in result["threads_pairs_per_s"].items()]
    pad = result["padding"]
    rows.append(("text step, dynamic / max_length padding (pairs/s)",
                 f"{pad['dynamic']['pairs_per_s']:.1f} / {pad['max_length']['pairs_per_s']:.1f} "
                 f"({pad['dynamic']['mean_padded_length']:.0f} vs "
                 f"{pad['max_length']['mean_padded_length']:.0f} tokens)"))
    s = result["scaling"]
    rows += [(f"{n} pairs: steady step / warm-up / start-up (s)", f"{st:.3f} / {wu:.2f} / {su:.1f}")
             for n, st, wu, su in zip(s["pairs"], s["steady_step_s"], s["warmup_s"], s["startup_s"])]
    for name, target in result["targets"].items():
        rows.append((f"target {name} {target['target']}", ("met" if target["met"] else "NOT met")
                     + f" ({target['value']:.3f})"))
    rows.append(("load average start / end", f"{result['machine']['load_average_start'][0]:.1f} / "
                 f"{result['machine']['load_average_end'][0]:.1f}"))
    for name, value in rows:
        table.add_row(name, value)
    return table


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="a short smoke run (small images, few steps)")
    parser.add_argument("--json", action="store_true", help="print every figure as one JSON object on the last line")
    parser.add_argument("--threads", type=int, default=0,
                        help="torch threads for every measurement (default: one per core, as align train uses)")
    parser.add_argument("--out", default="bench_out", help="folder for bench.json, bench.png and the work files")
    args = parser.parse_args(argv)
    out = Path(args.out)
    started = time.perf_counter()
    cfg = dict(QUICK if args.quick else FULL, threads=args.threads or os.cpu_count() or 1)
    result = run(cfg, out)
    result["mode"] = "quick" if args.quick else "full"
    result["bench_seconds"] = time.perf_counter() - started
    result["plot"] = str(out / "bench.png")
    plot(result, out / "bench.png")
    temp = out / ".bench.json.partial"
    temp.write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    os.replace(temp, out / "bench.json")
    Console(stderr=args.json).print(report_table(result))
    log.print(f"figures in {out / 'bench.json'}, plot in {out / 'bench.png'} ({result['bench_seconds']:.0f}s)")
    if args.json:
        print(json.dumps(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())
