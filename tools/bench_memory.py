"""Peak memory of one training step against the global batch, with and without gradient caching.

    python tools/bench_memory.py                       # the full run: batches 256 .. 16,384
    python tools/bench_memory.py --batches 256 1024    # a quick look
    make bench                                         # runs this after tools/bench.py

Every configuration runs in a fresh child process (so one configuration's allocations cannot hide
in another's numbers), builds the default LoRA MiniLM text tower and the loss, and takes optimizer
steps on a synthetic global batch: captions of 3 to 24 words drawn from a fixed vocabulary, image
features of the frozen tower's width (1280, EfficientNet-Lite0) drawn at random. What is measured:

* ``peak_rss``: the child's peak resident set size (``getrusage(RUSAGE_SELF).ru_maxrss``) at the
  end, the whole process, nothing subtracted: interpreter, torch, the tower, the optimizer state
  and the step itself;
* ``before_step_rss``: its resident size just before the first step (after loading), so the
  step's own increment, ``peak - before``, can be read too;
* ``step_s`` / ``step_cpu_s``: wall and process-CPU seconds of the fastest step after one warm-up
  step, at ``--timing-batch``, for the step unchunked, chunked with length buckets (what training
  does) and chunked without them; the three run in turns, ``--timing-rounds`` times, in alternating
  order, and each keeps its best. On a machine shared with other work, wall time swings with the
  neighbours' load; with one thread the CPU time does not, so both overheads are reported.

Chunked runs use ``train.chunk_size = --chunk`` with length buckets; every run uses
``loss.block_size = --block`` so a B x B matrix is never held. Unchunked runs escalate through the
batches until one runs out of memory; each child's address space is capped (``RLIMIT_AS``, below
what the machine has free) so running out is an allocation error in the child, never swapping or
the kernel's OOM killer. Prints a table; writes ``memory.json`` (key ``peak_rss_ratio_16384_vs_256``
and every row) and ``memory.png`` under ``--out``.
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
GIB = 1024 ** 3
FEATURE_DIM = 1280  # EfficientNet-Lite0's pooled width, the default frozen tower
WORDS = ("cobalt terracotta sage ochre ivory charcoal glazed matte gloss satin herringbone chevron "
         "terrazzo hexagonal pinstripe speckled porcelain ceramic stoneware tile floor wall kitchen "
         "bathroom outdoor frost-resistant rectified edge trim sheet mosaic handmade crackle").split()


# --------------------------------------------------------------------------- child

def synthetic_batch(batch: int, seed: int = 0):
    """Captions of 3..24 words (mostly 5..12, as catalogue captions run) and random unit image features."""
    import numpy as np
    import torch
    import torch.nn.functional as F

    rng = np.random.default_rng(seed)
    lengths = np.clip(rng.gamma(4.0, 2.2, size=batch).astype(int) + 3, 3, 24)
    captions = [" ".join(rng.choice(WORDS, size=n)) for n in lengths]
    gen = torch.Generator().manual_seed(seed)
    image = F.normalize(torch.randn(batch, FEATURE_DIM, generator=gen), dim=-1)  # (B, D)
    return captions, image


def rss_bytes() -> int:
    import psutil
    return psutil.Process().memory_info().rss


def run_child(batch: int, chunk: int, block: int, steps: int, threads: int, buckets: int) -> dict:
    """Build the tower and the loss, take ``steps`` optimizer steps; report memory and time."""
    sys.path.insert(0, str(ROOT))
    from align.offline import use_offline_defaults
    use_offline_defaults()
    import torch
    from accelerate import Accelerator
    from transformers.utils import logging as hf_logging

    from align.loss import build_loss, positive_ids
    from align.recipe import LossConfig, TextConfig
    from align.training import contrastive_step, step_seed
    from align.text import build_text_tower

    hf_logging.disable_progress_bar()
    hf_logging.set_verbosity_error()
    torch.set_num_threads(threads)
    accelerator = Accelerator(cpu=True)
    tower = build_text_tower(TextConfig(kind="lora"), FEATURE_DIM, seed=0)  # the recipe's default tower
    loss_fn = build_loss(LossConfig(block_size=block))
    params = [p for p in list(tower.parameters()) + list(loss_fn.parameters()) if p.requires_grad]
    optimizer = torch.optim.AdamW(params, lr=1e-4)
    captions, image = synthetic_batch(batch)
    caption_ids, _ = positive_ids(captions, None, "caption")
    tower.train()
    autocast = torch.autocast("cpu", enabled=False)
    before = rss_bytes()
    times, cpu_times = [], []
    for step in range(steps):
        started, cpu_started = time.perf_counter(), time.process_time()
        contrastive_step(tower, tower, loss_fn, captions, image, caption_ids, None, accelerator, autocast,
                         chunk_size=chunk, length_buckets=bool(buckets), seed=step_seed(0, step))
        torch.nn.utils.clip_grad_norm_(params, 1.0)
        optimizer.step()
        optimizer.zero_grad(set_to_none=True)
        times.append(time.perf_counter() - started)
        cpu_times.append(time.process_time() - cpu_started)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # Linux reports KiB
    return {"batch": batch, "chunk": chunk, "block": block, "threads": threads, "length_buckets": bool(buckets),
            "peak_rss": peak,
            "before_step_rss": before, "step_times_s": times, "step_cpu_times_s": cpu_times,
            # the fastest timed step: other processes on the machine only ever add time
            "step_s": min(times[1:]) if len(times) > 1 else None,
            "step_cpu_s": min(cpu_times[1:]) if len(cpu_times) > 1 else None}


# --------------------------------------------------------------------------- parent

def free_memory_bytes() -> int:
    import psutil
    return psutil.virtual_memory().available


def measure(batch: int, chunk: int, args, steps: int = 1, buckets: bool = True) -> dict:
    """One configuration in a fresh child with a capped address space; {"oom": True} if it ran out."""
    # Address space counts mappings that are never resident (libraries, reserved arenas, ~3 GiB
    # for torch), so a cap at (free memory - 2 GiB) keeps the resident part well inside what is free.
    cap = int(min(args.cap_gib * GIB, free_memory_bytes() - 2 * GIB))

    def limit():
        resource.setrlimit(resource.RLIMIT_AS, (cap, cap))

    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", str(batch), str(chunk), str(args.block),
           str(steps), str(args.threads), str(int(buckets))]
    proc = subprocess.run(cmd, preexec_fn=limit, capture_output=True, text=True, timeout=args.child_timeout_s)
    lines = [line for line in proc.stdout.splitlines() if line.startswith("{")]
    if proc.returncode == 0 and lines:
        row = json.loads(lines[-1])
    elif proc.returncode in (3, -9) or "memory" in proc.stderr.lower():
        row = {"batch": batch, "chunk": chunk, "oom": True}
    else:
        raise RuntimeError(f"child for batch {batch} chunk {chunk} failed (exit {proc.returncode}):\n"
                           f"{proc.stderr[-3000:]}")
    row["address_space_cap"] = cap
    return row


def _gib(value) -> str:
    return f"{value / GIB:.2f}" if value is not None else "-"


def table(rows: list[dict]) -> str:
    lines = ["| global batch | chunk_size | peak RSS (GiB) | RSS before step (GiB) | step increment (GiB) |",
             "| ---: | ---: | ---: | ---: | ---: |"]
    for r in rows:
        chunk = str(r["chunk"]) if r["chunk"] else "none"
        if r.get("oom"):
            lines.append(f"| {r['batch']:,} | {chunk} | out of memory (cap {_gib(r['address_space_cap'])} GiB "
                         f"address space) | - | - |")
            continue
        lines.append(f"| {r['batch']:,} | {chunk} | {_gib(r['peak_rss'])} | {_gib(r['before_step_rss'])} | "
                     f"{_gib(r['peak_rss'] - r['before_step_rss'])} |")
    return "\n".join(lines)


def plot(rows: list[dict], path: Path, chunk: int) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    for chunked, label, style in ((True, f"chunk_size {chunk}", "o-"), (False, "no chunking", "s--")):
        done = [r for r in rows if bool(r["chunk"]) == chunked and not r.get("oom")]
        ax.plot([r["batch"] for r in done], [r["peak_rss"] / GIB for r in done], style, label=label)
        for r in rows:
            if bool(r["chunk"]) == chunked and r.get("oom"):
                ax.axvline(r["batch"], color="grey", linestyle=":")
                ax.annotate(f"out of memory\nat {r['batch']:,}", (r["batch"], ax.get_ylim()[1] * 0.8),
                            ha="right", fontsize=8)
    ax.set_xscale("log", base=2)
    batches = sorted({r["batch"] for r in rows})
    if batches:
        ax.set_xticks(batches, [f"{b:,}" for b in batches])
    ax.set_xlabel("global batch (pairs per step)")
    ax.set_ylabel("peak resident memory of the process (GiB)")
    ax.set_title("One training step, LoRA MiniLM text tower")
    ax.grid(True, alpha=0.3)
    ax.legend()
    fig.tight_layout()
    tmp = path.with_suffix(".tmp.png")
    fig.savefig(tmp, dpi=120)
    os.replace(tmp, path)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--batches", type=int, nargs="+", default=[256, 1024, 4096, 16384])
    parser.add_argument("--chunk", type=int, default=256, help="train.chunk_size of the chunked runs")
    parser.add_argument("--block", type=int, default=256, help="loss.block_size of every run")
    parser.add_argument("--timing-batch", type=int, default=512,
                        help="batch at which chunked and unchunked step times are compared (must fit unchunked)")
    parser.add_argument("--timing-steps", type=int, default=2, help="timed steps after one warm-up step")
    parser.add_argument("--timing-rounds", type=int, default=2, help="turns of the three timed configurations")
    parser.add_argument("--no-memory", action="store_true", help="only the step-time comparison")
    parser.add_argument("--threads", type=int, default=os.cpu_count() or 1)
    parser.add_argument("--cap-gib", type=float, default=16.0, help="most address space a child may map")
    parser.add_argument("--child-timeout-s", type=int, default=3600)
    parser.add_argument("--out", default="bench_out/memory")
    parser.add_argument("--child", nargs=6, type=int,
                        metavar=("BATCH", "CHUNK", "BLOCK", "STEPS", "THREADS", "BUCKETS"),
                        help=argparse.SUPPRESS)
    args = parser.parse_args(argv)

    if args.child:
        try:
            print(json.dumps(run_child(*args.child)), flush=True)
        except (MemoryError, RuntimeError) as exc:
            if "memory" not in str(exc).lower() and not isinstance(exc, MemoryError):
                raise
            print(f"out of memory: {str(exc)[:200]}", file=sys.stderr)
            return 3
        return 0

    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    rows: list[dict] = []
    started, load_start = time.perf_counter(), os.getloadavg()
    for batch in ([] if args.no_memory else args.batches):
        print(f"chunked   batch {batch:>6,} ...", flush=True)
        rows.append(measure(batch, args.chunk, args))
    for batch in ([] if args.no_memory else args.batches):
        print(f"unchunked batch {batch:>6,} ...", flush=True)
        row = measure(batch, 0, args)
        rows.append(row)
        if row.get("oom"):
            break  # larger batches need more still: stop escalating
    rows.sort(key=lambda r: (r["chunk"] == 0, r["batch"]))

    chunked = {r["batch"]: r for r in rows if r["chunk"] and not r.get("oom")}
    plain = {r["batch"]: r for r in rows if not r["chunk"]}
    lo, hi = min(args.batches), max(args.batches)
    result = {
        "feature_dim": FEATURE_DIM, "chunk_size": args.chunk, "block_size": args.block, "threads": args.threads,
        "text_tower": "lora (MiniLM-L6, recipe defaults)", "rows": rows,
        f"peak_rss_ratio_{hi}_vs_{lo}": (chunked[hi]["peak_rss"] / chunked[lo]["peak_rss"]
                                          if hi in chunked and lo in chunked else None),
        "unchunked_out_of_memory_at": next((r["batch"] for r in rows if not r["chunk"] and r.get("oom")), None),
        "load_average": load_start,
    }
    # Step time: the same batch unchunked, chunked with length buckets (what training does), and
    # chunked without them (the bare cost of the extra forward pass).
    timed = args.timing_batch
    configs = [("unchunked", 0, True), ("chunked", args.chunk, True), ("chunked_no_buckets", args.chunk, False)]
    timing_rows: list[dict] = []
    for round_ in range(args.timing_rounds):
        for name, chunk, buckets in (configs if round_ % 2 == 0 else configs[::-1]):
            print(f"timing {name} at batch {timed:,} (round {round_ + 1}) ...", flush=True)
            timing_rows.append(measure(timed, chunk, args, steps=args.timing_steps + 1, buckets=buckets)
                               | {"config": name, "round": round_ + 1})
    result["timing_rows"] = timing_rows
    if timing_rows and not any(r.get("oom") for r in timing_rows):
        result["step_time_batch"] = timed
        for name, _, _ in configs:
            mine = [r for r in timing_rows if r["config"] == name]
            result[f"step_s_{name}"] = min(r["step_s"] for r in mine)
            result[f"step_cpu_s_{name}"] = min(r["step_cpu_s"] for r in mine)
        for suffix, key in (("", "step_s"), ("_cpu", "step_cpu_s")):
            result[f"step{suffix}_overhead" if suffix else "step_time_overhead"] = (
                result[f"{key}_chunked"] / result[f"{key}_unchunked"])
            result[f"step{suffix}_overhead_no_buckets" if suffix else "step_time_overhead_no_buckets"] = (
                result[f"{key}_chunked_no_buckets"] / result[f"{key}_unchunked"])
    result["load_average_end"] = os.getloadavg()
    result["wall_s"] = time.perf_counter() - started
    tmp = out / "memory.json.tmp"
    tmp.write_text(json.dumps(result, indent=2))
    os.replace(tmp, out / "memory.json")
    plot(rows, out / "memory.png", args.chunk)

    print()
    print(table(rows))
    key = f"peak_rss_ratio_{hi}_vs_{lo}"
    if result[key] is not None:
        print(f"\n{key} = {result[key]:.3f}  (target <= 1.5)")
    if "step_time_overhead" in result:
        for label, key, over in (("wall", "step_s", "step_time_overhead"), ("CPU", "step_cpu_s", "step_cpu_overhead")):
            print(f"{label} time per step at batch {timed:,} (chunk_size {args.chunk}): unchunked "
                  f"{result[key + '_unchunked']:.2f}s, chunked {result[key + '_chunked']:.2f}s -> overhead "
                  f"{result[over]:.2f}x (target <= 1.35); chunked without length buckets "
                  f"{result[key + '_chunked_no_buckets']:.2f}s -> {result[over + '_no_buckets']:.2f}x")
    print(f"load average {result['load_average'][0]:.1f} at the start, {result['load_average_end'][0]:.1f} "
          f"at the end, on {os.cpu_count()} cores (other work on the machine slows every figure above)")
    if result["unchunked_out_of_memory_at"]:
        print(f"without chunking: out of memory at batch {result['unchunked_out_of_memory_at']:,}")
    print(f"\nwrote {out / 'memory.json'} and {out / 'memory.png'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
