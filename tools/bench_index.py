"""Gallery search at scale: the approximate index's build time, query latency exact vs approximate, recall@10.

    python tools/bench_index.py                   # 1M x 1280 (a 1280-wide tower's gallery of a million images)
    python tools/bench_index.py --quick           # 20k x 64: proves the bench runs (seconds)
    make bench                                    # runs this after tools/bench.py and tools/bench_memory.py

The gallery is seeded synthetic unit vectors. ``--data clustered`` (default) draws each row around
one of ``rows / 500`` random centres (cosine to its centre about 0.78) and each query around a centre
too, shifted by one fixed offset shared by all queries, as text queries sit apart from the images they
match; ``--data isotropic`` draws structureless Gaussian rows, the worst case for an inverted file.
The approximate index is built exactly as ``align index`` builds it (``align.index.build_approximate``:
IVF-SQ8 with 2·sqrt(N) lists, nprobe tuned to recall@10 0.97 on 200 queries, recall reported on 200
others). Then ``--queries`` single-text queries (batch 1, as a search box sends them) are timed one by
one after a warm-up, exact (numpy over the float32 rows, what ``align query --exact`` runs below
100,000 rows; faiss ``IndexFlatIP`` above, timed too unless ``--no-flat``) and approximate, in
alternating order so load from other work hits both alike; recall@10 of the approximate answers is
measured against the exact ones on those same queries.

Prints a table; writes ``index_bench.json`` (every figure) and ``index_bench.png`` under ``--out``;
``--json`` ends stdout with the JSON object on one line. Run it on a quiet machine: exact search at 1M
reads 5 GB per query and its latency is memory bandwidth.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from align.index import build_approximate, faiss_flat_index, recall_at_k, top_k_faiss, top_k_numpy  # noqa: E402

PROBE = 200  # tuning and held queries of the build, as align index uses


def _unit(x: np.ndarray) -> np.ndarray:
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def gallery_and_queries(rows: int, dim: int, queries: int, data: str, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """(rows, dim) float32 unit gallery and (queries, dim) unit queries, seeded; filled in slices."""
    rng = np.random.default_rng(seed)
    gallery = np.empty((rows, dim), np.float32)
    if data == "isotropic":
        for start in range(0, rows, 65536):
            block = rng.standard_normal((min(65536, rows - start), dim), dtype=np.float32)
            gallery[start:start + len(block)] = _unit(block)
        return gallery, _unit(rng.standard_normal((queries, dim), dtype=np.float32))
    centres = _unit(rng.standard_normal((max(16, rows // 500), dim), dtype=np.float32))
    for start in range(0, rows, 65536):
        count = min(65536, rows - start)
        noise = _unit(rng.standard_normal((count, dim), dtype=np.float32))
        gallery[start:start + count] = _unit(centres[rng.integers(len(centres), size=count)] + 0.8 * noise)
    offset = _unit(rng.standard_normal((1, dim), dtype=np.float32))
    noise = _unit(rng.standard_normal((queries, dim), dtype=np.float32))
    return gallery, _unit(centres[rng.integers(len(centres), size=queries)] + noise + 0.8 * offset).astype(np.float32)


def _percentiles(seconds: list[float]) -> dict:
    ms = 1000 * np.asarray(seconds)
    return {"p50_ms": round(float(np.percentile(ms, 50)), 3), "p95_ms": round(float(np.percentile(ms, 95)), 3)}


def time_queries(searches: dict, queries: np.ndarray, k: int = 10) -> tuple[dict, dict]:
    """Each search (name -> f(query (1, D), k) -> (scores, rows)) timed per query, in alternating order."""
    names = list(searches)
    for name in names:  # warm-up: page in the rows, start thread pools
        searches[name](queries[:1], k)
    seconds = {name: [] for name in names}
    rows = {name: [] for name in names}
    for i in range(len(queries)):
        order = names if i % 2 == 0 else names[::-1]
        for name in order:
            started = time.perf_counter()
            _, found = searches[name](queries[i:i + 1], k)
            seconds[name].append(time.perf_counter() - started)
            rows[name].append(found[0])
    return {name: _percentiles(s) for name, s in seconds.items()}, {name: np.stack(r) for name, r in rows.items()}


def run(args) -> dict:
    started = time.perf_counter()
    gallery, queries = gallery_and_queries(args.rows, args.dim, 2 * PROBE + args.queries, args.data, args.seed)
    made = time.perf_counter() - started
    index, report = build_approximate(gallery, queries[:PROBE], queries[PROBE:2 * PROBE])
    timed = queries[2 * PROBE:]
    searches = {"exact numpy": lambda q, k: top_k_numpy(gallery, q, k),
                "approximate": lambda q, k: index.search(gallery, q, k)}
    if not args.no_flat:
        flat = faiss_flat_index(gallery)
        searches["exact faiss flat"] = lambda q, k: top_k_faiss(flat, q, k)
    latency, found = time_queries(searches, timed)
    return {"rows": args.rows, "dim": args.dim, "data": args.data, "threads": args.threads,
            "generate_seconds": round(made, 1), "build": report,
            "latency": latency, "timed_queries": len(timed),
            "recall_at_10": round(recall_at_k(found["approximate"], found["exact numpy"]), 4),
            "speedup_p50": round(latency["exact numpy"]["p50_ms"] / latency["approximate"]["p50_ms"], 2)}


def print_table(result: dict) -> None:
    build = result["build"]
    print(f"\ngallery {result['rows']:,} x {result['dim']} ({result['data']}), {result['threads']} thread(s)")
    print(f"approximate index: built in {build['build_seconds']} s, nprobe tuned in {build['tune_seconds']} s "
          f"({build['nprobe']} of {build['nlist']} lists); recall@10 on its held queries {build['recall_at_10']}")
    print(f"{'search':<20}{'p50 ms':>10}{'p95 ms':>10}")
    for name, figures in result["latency"].items():
        print(f"{name:<20}{figures['p50_ms']:>10.2f}{figures['p95_ms']:>10.2f}")
    print(f"recall@10 of the approximate answers vs exact on the {result['timed_queries']} timed queries: "
          f"{result['recall_at_10']}; p50 speed-up {result['speedup_p50']}x")


def plot(result: dict, path: Path) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    names = list(result["latency"])
    fig, ax = plt.subplots(figsize=(6, 3.2))
    x = np.arange(len(names))
    ax.bar(x - 0.2, [result["latency"][n]["p50_ms"] for n in names], 0.4, label="p50")
    ax.bar(x + 0.2, [result["latency"][n]["p95_ms"] for n in names], 0.4, label="p95")
    ax.set_xticks(x, names)
    ax.set_ylabel("ms per query (batch 1)")
    ax.set_title(f"{result['rows']:,} x {result['dim']}: recall@10 {result['recall_at_10']}")
    ax.legend()
    fig.tight_layout()
    fig.savefig(path, dpi=120)
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--dim", type=int, default=1280, help="the tower's width (EfficientNet-Lite0: 1280)")
    parser.add_argument("--queries", type=int, default=200, help="single queries timed per search")
    parser.add_argument("--data", choices=("clustered", "isotropic"), default="clustered")
    parser.add_argument("--no-flat", action="store_true", help="skip faiss IndexFlatIP (it copies the gallery)")
    parser.add_argument("--threads", type=int, default=os.cpu_count() or 1, help="BLAS and faiss threads")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--quick", action="store_true", help="20,000 x 64 and 50 queries: proves the bench runs")
    parser.add_argument("--out", default="bench_out/index")
    parser.add_argument("--json", action="store_true", help="end stdout with the result as one JSON line")
    args = parser.parse_args(argv)
    if args.quick:
        args.rows, args.dim, args.queries = 20_000, 64, 50
    import faiss
    from threadpoolctl import threadpool_limits

    faiss.omp_set_num_threads(args.threads)
    with threadpool_limits(limits=args.threads):
        result = run(args)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "index_bench.json").write_text(json.dumps(result, indent=2) + "\n")
    plot(result, out / "index_bench.png")
    print_table(result)
    print(f"wrote {out / 'index_bench.json'} and {out / 'index_bench.png'}")
    if args.json:
        print(json.dumps(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())
