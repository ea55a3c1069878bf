"""Training throughput: the textbook loop against align's cached-feature step, and both against the machine.

    python tools/bench.py                 # the full run (several minutes on 2 cores)
    python tools/bench.py --quick --json  # a short smoke run; last stdout line is one JSON object

In one process, on the same shards (the demo tile catalogue, drawn by ``align.data.demo``), the same
towers, batch size and step count, it times

(a) the textbook loop: every step decodes its images, preprocesses them and runs the frozen image
    tower (fp32, default memory format), then the text step;
(b) align's training step (``align.training.train``) on the frozen-feature cache;

and measures the machine's matrix-multiply peak (fp32 and bf16), the text step's achieved FLOP/s
(``torch.utils.flop_counter.FlopCounterMode``) as a share of the peak for its dtype, the cache build
rate against the tower's bare inference rate on preloaded tensors, bf16 autocast against fp32 (speed
and loss curve), 1 thread against all cores, and time per epoch at growing pair counts. The scaling
run's pairs are the cached features and captions of the drawn catalogue repeated (the text step's
cost does not depend on which pairs it sees, only on how many and how long the captions are).
Figures go to OUT/bench.json and a plot to OUT/bench.png.
"""
from __future__ import annotations

import argparse
import dataclasses
import io
import json
import math
import os
import statistics
import sys
import time
from pathlib import Path

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
from align.training import TrainingData, prepare_training_data, train  # noqa: E402
from align.vision import load_image_tower  # noqa: E402

FULL = dict(per_pair=4, tile_px=160, sizes=(224, 160), batch=64, steps=12, warmup=2, scaling=(1000, 4000, 16000),
            precision_steps=40, peak_sizes=(512, 1024, 2048), peak_seconds=0.6, build_workers=(0, 2),
            vision_batch=64, tower_repeats=5)
QUICK = dict(per_pair=1, tile_px=64, sizes=(64,), batch=16, steps=4, warmup=1, scaling=(64, 128, 256),
             precision_steps=6, peak_sizes=(256, 512), peak_seconds=0.2, build_workers=(0,),
             vision_batch=16, tower_repeats=3)
TARGETS = {"speedup_vs_textbook": 6.0, "text_step_fraction_of_peak": 0.5, "cache_build_fraction_of_tower": 0.9,
           "scaling_slack": 1.2}

log = Console(stderr=True)
quiet = Console(file=io.StringIO())  # train()'s own bars and messages stay out of the report


def machine() -> dict:
    flags = ""
    if Path("/proc/cpuinfo").is_file():
        flags = next((line for line in Path("/proc/cpuinfo").read_text().splitlines() if line.startswith("flags")), "")
    return {"cpus": os.cpu_count(), "torch_threads": torch.get_num_threads(), "torch": torch.__version__,
            "avx512_bf16": "avx512_bf16" in flags, "amx_bf16": "amx_bf16" in flags,
            "load_average_start": list(os.getloadavg())}


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


def textbook_loop(shards: Path, recipe, size: int, cfg: dict, channels_last: bool) -> float:
    """Decode, preprocess and run the tower every step, then the text step; pairs/s after warm-up."""
    torch.set_num_threads(cfg["threads"])
    tower = load_image_tower(VisionConfig(image_size=size, channels_last=channels_last))
    table = load_table(shards, "train")
    caption_of = dict(zip(table.keys, table.captions))
    text = build_text_tower(recipe.text, tower.feature_dim, seed=recipe.train.seed)
    log_scale = torch.nn.Parameter(torch.tensor(math.log(1 / 0.07)))
    params = [p for p in text.parameters() if p.requires_grad] + [log_scale]
    optimizer = torch.optim.AdamW(params, lr=recipe.train.lr, weight_decay=recipe.train.weight_decay)
    stream = endless_images(shards)
    text.train()
    batch, times = cfg["batch"], []
    for _ in range(cfg["steps"]):
        start = time.perf_counter()
        keys, pixels = [], []
        for key, image in (next(stream) for _ in range(batch)):
            keys.append(key)
            pixels.append(tower.preprocess(image))
        image_emb = tower.embed_pixels(torch.stack(pixels))  # (B, D)
        text_emb = text(**text.tokenize([caption_of[k] for k in keys]))  # (B, D)
        # symmetric InfoNCE with a learned temperature (Radford et al. 2021, the paper's pseudo-code)
        logits = log_scale.exp().clamp(max=100) * text_emb @ image_emb.T  # (B, B)
        target = torch.arange(batch)
        loss = (F.cross_entropy(logits, target) + F.cross_entropy(logits.T, target)) / 2
        loss.backward()
        optimizer.step()
        optimizer.zero_grad(set_to_none=True)
        times.append(time.perf_counter() - start)
    return batch / median_step(times, cfg["warmup"])


def padding_effect(data: TrainingData, recipe, cfg: dict) -> dict:
    """Text step time with each batch padded to its longest caption (align) vs to text.max_length."""
    text = build_text_tower(recipe.text, data.image_features.shape[1], seed=recipe.train.seed)
    text.train()
    params = [p for p in text.parameters() if p.requires_grad]
    optimizer = torch.optim.AdamW(params, lr=recipe.train.lr)
    batch, result = cfg["batch"], {}
    for mode in ("dynamic", "max_length"):
        times, positions = [], []
        for step in range(cfg["steps"]):
            rows = [(step * batch + i) % len(data.captions) for i in range(batch)]
            captions = [data.captions[i] for i in rows]
            start = time.perf_counter()
            if mode == "dynamic":
                tokens = text.tokenize(captions)
            else:
                enc = text.tokenizer(captions, padding="max_length", truncation=True, max_length=text.max_length,
                                     return_tensors="pt")
                tokens = {"input_ids": enc["input_ids"], "attention_mask": enc["attention_mask"]}
            emb = text(**tokens)  # (B, D)
            logits = 14.3 * emb @ data.image_features[rows].T  # (B, B)
            target = torch.arange(batch)
            loss = (F.cross_entropy(logits, target) + F.cross_entropy(logits.T, target)) / 2
            loss.backward()
            optimizer.step()
            optimizer.zero_grad(set_to_none=True)
            times.append(time.perf_counter() - start)
            positions.append(tokens["input_ids"].shape[1])
        result[mode] = {"pairs_per_s": batch / median_step(times, cfg["warmup"]),
                        "mean_padded_length": sum(positions) / len(positions)}
    result["dynamic_speedup"] = result["dynamic"]["pairs_per_s"] / result["max_length"]["pairs_per_s"]
    return result


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
    """A fresh cache build: images/s over the whole build, and of its median full chunk (steady state)."""
    cfg = VisionConfig(image_size=size, workers=workers, feature_cache=str(cache), batch_size=batch)
    tower = load_image_tower(cfg)
    finished: list[float] = []
    feats = image_features(tower, shards, "train", cfg, quiet, on_chunk=lambda _: finished.append(time.perf_counter()))
    full = [b - a for a, b in zip(finished, finished[1:])][:-1] or [feats.build.seconds]  # the last chunk is short
    return {"images_per_s": feats.build.images_per_s,
            "steady_images_per_s": batch / median_step(full, 0) if len(full) > 1 else feats.build.images_per_s}


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
    torch.set_num_threads(cfg["threads"])
    result: dict = {"machine": machine(), "config": {k: list(v) if isinstance(v, tuple) else v for k, v in cfg.items()}}

    phase("measuring the matrix-multiply peak (fp32, bf16)")
    peak = {name: matmul_peak(dtype, cfg["peak_sizes"], cfg["peak_seconds"])
            for name, dtype in (("fp32", torch.float32), ("bf16", torch.bfloat16))}
    result["peak_gflops"] = peak

    phase("drawing and packing the tile catalogue")
    shards = draw_shards(work, cfg)
    result["train_images"] = len(load_table(shards, "train"))

    sizes: dict = {}
    native_data = None
    for size in cfg["sizes"]:
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

        phase(f"[{size} px] the textbook loop (tower every step, fp32)")
        recipe = bench_recipe(shards, work / f"cache-{size}-w0", cfg, size)
        entry["textbook_pairs_per_s"] = textbook_loop(shards, recipe, size, cfg, channels_last=False)
        if size == cfg["sizes"][0] and len(cfg["sizes"]) > 1:
            phase(f"[{size} px] the textbook loop with channels_last (a stronger baseline)")
            entry["textbook_channels_last_pairs_per_s"] = textbook_loop(shards, recipe, size, cfg, channels_last=True)

        phase(f"[{size} px] align's training step on the cache")
        data = prepare_training_data(recipe, quiet)
        records = run_train(recipe, work, data)
        entry["cached_pairs_per_s"], _ = steady_rate(records, cfg["warmup"], cfg["batch"])
        entry["speedup_vs_textbook"] = entry["cached_pairs_per_s"] / entry["textbook_pairs_per_s"]
        if "textbook_channels_last_pairs_per_s" in entry:
            entry["speedup_vs_textbook_channels_last"] = (entry["cached_pairs_per_s"]
                                                          / entry["textbook_channels_last_pairs_per_s"])
        # steps after which building the cache once has cost less than running the tower every step
        saved_per_step = cfg["batch"] / entry["textbook_pairs_per_s"] - cfg["batch"] / entry["cached_pairs_per_s"]
        build_seconds = result["train_images"] / entry["cache_build_images_per_s"]
        entry["cache_pays_off_after_steps"] = build_seconds / saved_per_step if saved_per_step > 0 else None
        sizes[str(size)] = entry
        if native_data is None:
            native_data, native_recipe, native_records = data, recipe, records
    result["sizes"] = sizes
    native = sizes[str(cfg["sizes"][0])]
    result["speedup_vs_textbook"] = native["speedup_vs_textbook"]
    result["cache_build_fraction_of_tower"] = native["cache_build_fraction_of_tower"]

    phase("counting the text step's FLOPs (the same batches, replayed under FlopCounterMode)")
    flops: list = []
    run_train(native_recipe, work, native_data, flops=flops)
    w = cfg["warmup"]
    counted = flops[-1] - flops[w - 1]
    _, step_seconds = steady_rate(native_records, w, cfg["batch"])
    per_step = counted / (len(flops) - w)  # FLOPs of one step, averaged over the same steps
    achieved = per_step / step_seconds / 1e9
    result["text_step"] = {"dtype": "fp32", "gflop_per_step": per_step / 1e9,
                           "achieved_gflops": achieved, "peak_gflops": peak["fp32"],
                           "fraction_of_peak": achieved / peak["fp32"]}
    result["text_step_fraction_of_peak"] = achieved / peak["fp32"]

    phase("bf16 autocast against fp32 (speed and loss curve)")
    precision: dict = {}
    for name in ("fp32", "bf16"):
        recipe = bench_recipe(shards, work / f"cache-{cfg['sizes'][0]}-w0", cfg, cfg["sizes"][0], precision=name,
                              steps=cfg["precision_steps"])
        records = run_train(recipe, work, native_data)
        rate, _ = steady_rate(records, w, cfg["batch"])
        tail = records[-max(1, len(records) // 4):]
        precision[name] = {"pairs_per_s": rate, "loss_curve": [r["loss"] for r in records],
                           "final_loss": sum(r["loss"] for r in tail) / len(tail),
                           "achieved_gflops": result["text_step"]["gflop_per_step"] * rate / cfg["batch"]}
    precision["bf16"]["fraction_of_bf16_peak"] = precision["bf16"]["achieved_gflops"] / peak["bf16"]
    precision["bf16_speed_ratio"] = precision["bf16"]["pairs_per_s"] / precision["fp32"]["pairs_per_s"]
    precision["max_loss_difference"] = max(abs(a - b) for a, b in zip(precision["fp32"]["loss_curve"],
                                                                       precision["bf16"]["loss_curve"]))
    faster = precision["bf16_speed_ratio"] > 1.05
    hurt = precision["bf16"]["final_loss"] > precision["fp32"]["final_loss"] * 1.05 + 0.02
    precision["verdict"] = (("bf16 autocast is faster" if faster else "bf16 autocast is not faster")
                            + (" and hurts the loss" if hurt else " and leaves the loss curve intact")
                            + ("; fp32 stays the default" if not faster or hurt else "; worth train.precision=bf16"))
    result["precision"] = precision

    phase("dynamic padding against padding to text.max_length")
    result["padding"] = padding_effect(native_data, native_recipe, cfg)

    phase("threads: one against all cores")
    threads = {str(cfg["threads"]): native["cached_pairs_per_s"]}
    for count in sorted({1, os.cpu_count() or 1} - {cfg["threads"]}):
        recipe = bench_recipe(shards, work / f"cache-{cfg['sizes'][0]}-w0", cfg, cfg["sizes"][0], threads=count)
        threads[str(count)] = steady_rate(run_train(recipe, work, native_data), w, cfg["batch"])[0]
    torch.set_num_threads(cfg["threads"])
    result["threads_pairs_per_s"] = threads

    phase("time per epoch at " + ", ".join(map(str, cfg["scaling"])) + " pairs")
    epoch_s = []
    for n in cfg["scaling"]:
        steps = math.ceil(n / cfg["batch"])
        recipe = bench_recipe(shards, work / f"cache-{cfg['sizes'][0]}-w0", cfg, cfg["sizes"][0], steps=steps)
        records = run_train(recipe, work, tiled(native_data, n, shards, work))
        epoch_s.append(records[-1]["elapsed_s"])
    small, large = cfg["scaling"][0], cfg["scaling"][-1]
    ratio, expected = epoch_s[-1] / epoch_s[0], large / small
    result["scaling"] = {"pairs": list(cfg["scaling"]), "epoch_s": epoch_s, "ratio_largest_vs_smallest": ratio,
                         "expected_ratio": expected,
                         "linear_within_slack": expected / TARGETS["scaling_slack"] <= ratio
                         <= expected * TARGETS["scaling_slack"]}
    result["machine"]["load_average_end"] = list(os.getloadavg())
    phase("done")
    result["phase_seconds"] = {name: round(b - a, 2) for (name, a), (_, b) in zip(_phases, _phases[1:])}
    result["targets"] = {name: {"value": result[name], "target": f">= {TARGETS[name]}",
                                "met": result[name] >= TARGETS[name]}
                         for name in ("speedup_vs_textbook", "text_step_fraction_of_peak",
                                      "cache_build_fraction_of_tower")}
    result["targets"]["scaling"] = {"value": ratio, "target": f"within {expected:g} x/÷ {TARGETS['scaling_slack']}",
                                    "met": result["scaling"]["linear_within_slack"]}
    return result


# ---------------------------------------------------------------------------------------------
# report


def plot(result: dict, path: Path) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (left, right) = plt.subplots(1, 2, figsize=(11, 4.2))
    pairs, seconds = result["scaling"]["pairs"], result["scaling"]["epoch_s"]
    left.plot(pairs, seconds, "o-", label="measured")
    left.plot(pairs, [seconds[0] * p / pairs[0] for p in pairs], "--", color="grey",
              label="linear from the first point")
    left.set_xscale("log")
    left.set_yscale("log")
    left.set_xlabel("training pairs")
    left.set_ylabel("seconds per epoch")
    left.set_title("time per epoch on the feature cache")
    left.legend()
    names, rates = [], []
    for size, entry in result["sizes"].items():
        names += [f"textbook\n{size} px", f"cached\n{size} px"]
        rates += [entry["textbook_pairs_per_s"], entry["cached_pairs_per_s"]]
        if "textbook_channels_last_pairs_per_s" in entry:
            names.insert(-1, f"textbook\nchannels_last\n{size} px")
            rates.insert(-1, entry["textbook_channels_last_pairs_per_s"])
    right.bar(range(len(rates)), rates, color=["#999999" if n.startswith("textbook") else "#2a6ebb" for n in names])
    right.set_xticks(range(len(rates)), names, fontsize=8)
    right.set_ylabel("pairs / s")
    right.set_title(f"training throughput, batch {result['config']['batch']}")
    fig.tight_layout()
    temp = path.with_name(f".{path.name}.partial.png")
    fig.savefig(temp, dpi=110)
    plt.close(fig)
    os.replace(temp, path)


def report_table(result: dict) -> Table:
    table = Table(title="align bench", show_edge=False)
    table.add_column("figure")
    table.add_column("value", justify="right")
    peak = result["peak_gflops"]
    rows = [("matmul peak fp32 / bf16 (GFLOP/s)", f"{peak['fp32']:.0f} / {peak['bf16']:.0f}")]
    for size, e in result["sizes"].items():
        rows += [(f"{size} px: tower alone (img/s)", f"{e['tower_images_per_s']:.1f}"),
                 (f"{size} px: cache build, steady / whole (img/s, {e['cache_build_workers']} workers)",
                  f"{e['cache_build_steady_images_per_s']:.1f} / {e['cache_build_images_per_s']:.1f}"),
                 (f"{size} px: cache build / tower, steady / whole",
                  f"{e['cache_build_fraction_of_tower']:.2f} / {e['cache_build_whole_fraction_of_tower']:.2f}"),
                 (f"{size} px: textbook loop (pairs/s)", f"{e['textbook_pairs_per_s']:.1f}")]
        if "textbook_channels_last_pairs_per_s" in e:
            rows.append((f"{size} px: textbook + channels_last (pairs/s)",
                         f"{e['textbook_channels_last_pairs_per_s']:.1f}"))
        rows += [(f"{size} px: align on the cache (pairs/s)", f"{e['cached_pairs_per_s']:.1f}"),
                 (f"{size} px: speedup vs textbook", f"{e['speedup_vs_textbook']:.1f}x")]
        if "speedup_vs_textbook_channels_last" in e:
            rows.append((f"{size} px: speedup vs textbook + channels_last",
                         f"{e['speedup_vs_textbook_channels_last']:.1f}x"))
        if e["cache_pays_off_after_steps"] is not None:
            rows.append((f"{size} px: cache pays for itself after (steps)", f"{e['cache_pays_off_after_steps']:.1f}"))
    t, p = result["text_step"], result["precision"]
    rows += [("text step GFLOP per step", f"{t['gflop_per_step']:.2f}"),
             ("text step achieved GFLOP/s (fp32)", f"{t['achieved_gflops']:.1f}"),
             ("text step fraction of fp32 peak", f"{t['fraction_of_peak']:.2f}"),
             ("fp32 / bf16 autocast (pairs/s)", f"{p['fp32']['pairs_per_s']:.1f} / {p['bf16']['pairs_per_s']:.1f}"),
             ("bf16 fraction of bf16 peak", f"{p['bf16']['fraction_of_bf16_peak']:.2f}"),
             ("final loss fp32 / bf16", f"{p['fp32']['final_loss']:.3f} / {p['bf16']['final_loss']:.3f}"),
             ("bf16 verdict", p["verdict"])]
    rows += [(f"{n} thread(s) (pairs/s)", f"{v:.1f}") for n, v in result["threads_pairs_per_s"].items()]
    pad = result["padding"]
    rows.append(("text step, dynamic / max_length padding (pairs/s)",
                 f"{pad['dynamic']['pairs_per_s']:.1f} / {pad['max_length']['pairs_per_s']:.1f} "
                 f"({pad['dynamic']['mean_padded_length']:.0f} vs "
                 f"{pad['max_length']['mean_padded_length']:.0f} tokens)"))
    s = result["scaling"]
    rows += [(f"epoch at {n} pairs (s)", f"{sec:.1f}") for n, sec in zip(s["pairs"], s["epoch_s"])]
    rows.append((f"epoch time ratio {s['pairs'][-1]}/{s['pairs'][0]}", f"{s['ratio_largest_vs_smallest']:.1f} "
                 f"(linear: {s['expected_ratio']:g})"))
    for name, target in result["targets"].items():
        rows.append((f"target {name} {target['target']}", ("met" if target["met"] else "NOT met")
                     + f" ({target['value']:.2f})"))
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
