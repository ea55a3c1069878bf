"""The ``align`` command. Thin: parse arguments, call one function, print the result.

Each subcommand is a small ``cmd_*`` function registered in ``build_parser``; the work lives in the
modules. A user's mistake (``AlignError``) prints its message and hint and exits 2, never a traceback.
"""
from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from rich.console import Console

from .errors import AlignError

console = Console(stderr=True)


def _recipe(args):
    from .recipe import load_recipe
    return load_recipe(args.recipe, args.set)


def cmd_pack(args) -> int:
    from .data.pack import pack_source
    pack_source(args.source, args.out, val_fraction=args.val_fraction, shard_size=args.shard_size,
                max_caption_chars=args.max_caption_chars, console=console)
    return 0


def cmd_train(args) -> int:
    from .train import train
    recipe = _recipe(args)
    run_dir = Path(args.run_dir or Path("runs") / recipe.name)
    summary = train(recipe, run_dir, resume=args.resume, console=console)
    console.print(f"[green]trained[/green] {summary['steps']} steps in {summary['elapsed_s']:.0f}s "
                  f"({summary['pairs_per_s'] or 0:.0f} pairs/s); run folder: {run_dir}")
    return 0


def cmd_evaluate(args) -> int:
    from .evaluate import evaluate_run
    evaluate_run(args.run_dir, shards=args.shards, tag=args.tag, console=console)
    console.print(f"metrics written to {Path(args.run_dir) / 'metrics.json'}")
    return 0


def cmd_features(args) -> int:
    from .features import build_recipe_features
    for feats in build_recipe_features(_recipe(args), console=console):
        how = (f"built, {feats.build.images_per_s:.0f} img/s" if feats.build else "already cached")
        console.print(f"{feats.fingerprint['split']}: {len(feats.keys)} images x {feats.views} view(s) "
                      f"({how}) in {feats.path}")
    return 0


def cmd_demo(args) -> int:
    from .demo_pipeline import run_demo
    run_demo(Path(args.out), data_dir=Path(args.data_dir) if args.data_dir else None,
             recipe_path=args.recipe, overrides=args.set, console=console)
    return 0


def cmd_vocab(args) -> int:
    import json

    from .vocab import report_tables, shards_vocab_report
    report = shards_vocab_report(args.shards, split=args.split, text_model=args.text_model or "", cap=args.cap,
                                 scratch_vocab_size=args.scratch_vocab_size, top=args.top)
    if args.json:
        print(json.dumps(report, indent=2))
    else:
        out = Console()
        for table in report_tables(report, top=args.top):
            out.print(table)
        out.print(report["headline"])
    return 0


def cmd_export(args) -> int:
    from .export import export_run
    export_run(args.run_dir, args.out, checkpoint=args.checkpoint, onnx=not args.no_onnx, console=console)
    return 0


def cmd_index(args) -> int:
    from .index import build_index
    build_index(args.export_dir, args.source, args.out, weights=args.weights, embeddings=args.embeddings,
                keys=args.keys, sample=args.check_sample, console=console)
    return 0


def cmd_query(args) -> int:
    import json

    from .index import query_index
    backend = "faiss" if args.faiss else args.backend
    answer = query_index(args.index, args.text, k=args.k, backend=backend, export_dir=args.export)
    if args.json:
        print(json.dumps(answer, ensure_ascii=False))
        return 0
    from rich.table import Table
    for item in answer["queries"]:
        table = Table(title=item["text"], show_header=True)
        table.add_column("rank", justify="right")
        table.add_column("key")
        table.add_column("score", justify="right")
        for hit in item["results"]:
            table.add_row(str(hit["rank"]), hit["key"], f"{hit['score']:.4f}")
        Console().print(table)
    return 0


def _add_recipe_args(p: argparse.ArgumentParser, required: bool = True) -> None:
    if required:
        p.add_argument("recipe", help="recipe TOML file, e.g. recipes/lora-cpu.toml")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a recipe value (repeatable), e.g. --set train.steps=50")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="align", description="Train a text tower into a frozen image tower's "
                                     "embedding space, evaluate it and hand it to retrieval.")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("pack", help="validate image-caption pairs and write webdataset shards")
    p.add_argument("source", help="a folder (image + same-stem .txt [+ .json labels]) or a .csv/.jsonl file")
    p.add_argument("--out", required=True, help="output folder for shards, manifest.json and rejected.jsonl")
    p.add_argument("--val-fraction", type=float, default=0.1, help="share of samples in the val split (by key hash)")
    p.add_argument("--shard-size", type=int, default=1000, help="samples per tar shard")
    p.add_argument("--max-caption-chars", type=int, default=1000, help="longer captions are rejected")
    p.set_defaults(func=cmd_pack)

    p = sub.add_parser("train", help="train the text tower of a recipe")
    _add_recipe_args(p)
    p.add_argument("--run-dir", help="run folder (default runs/<recipe name>)")
    p.add_argument("--resume", action="store_true", help="continue from the newest checkpoint in --run-dir")
    p.set_defaults(func=cmd_train)

    p = sub.add_parser("evaluate", help="recall both ways, zero-shot and linear probe; writes metrics.json")
    p.add_argument("run_dir", help="a folder written by align train")
    p.add_argument("--shards", help="evaluate on another packed folder (its val split)")
    p.add_argument("--tag", help="prefix for the metric keys of this evaluation set, e.g. heldout")
    p.set_defaults(func=cmd_evaluate)

    p = sub.add_parser("features", help="cache the frozen image features a recipe needs, ahead of training")
    _add_recipe_args(p)
    p.set_defaults(func=cmd_features)

    p = sub.add_parser("vocab", help="how the text tokenizer splits the captions' words; terms worth adding")
    p.add_argument("shards", help="a folder written by align pack")
    p.add_argument("--text-model", help="local transformers model directory (default: the offline MiniLM-L6)")
    p.add_argument("--split", default="train", help="split whose captions are read")
    p.add_argument("--cap", type=int, default=64, help="terms new_tokens = \"auto\" would add at most")
    p.add_argument("--scratch-vocab-size", type=int, default=2000, help="size of the caption-trained WordPiece")
    p.add_argument("--top", type=int, default=20, help="fragmented terms listed")
    p.add_argument("--json", action="store_true", help="print the report as JSON on stdout")
    p.set_defaults(func=cmd_vocab)

    p = sub.add_parser("demo", help="draw the tile catalogue, pack, train, evaluate, summarise")
    p.add_argument("--out", default="runs/demo", help="run folder of the demo")
    p.add_argument("--data-dir", help="where the drawn catalogue and its shards go (default <out>-data)")
    p.add_argument("--recipe", default=None, help="recipe (default recipes/demo-cpu.toml)")
    _add_recipe_args(p, required=False)
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("export", help="adapter, merged encoder, ONNX, image-side contract and card of a run")
    p.add_argument("run_dir", help="a folder written by align train")
    p.add_argument("--out", required=True, help="export folder (replaced only once the new export is complete)")
    p.add_argument("--checkpoint", help="a checkpoint folder of the run (default: the newest)")
    p.add_argument("--no-onnx", action="store_true", help="skip text_encoder.onnx")
    p.set_defaults(func=cmd_export)

    p = sub.add_parser("index", help="embed a gallery with the frozen tower (or adopt stored embeddings) for search")
    p.add_argument("export_dir", help="a folder written by align export")
    p.add_argument("source", help="a folder of images, or a folder written by align pack")
    p.add_argument("--out", required=True, help="index folder")
    p.add_argument("--weights", help="the frozen tower's weights file (default: as recorded in image_side.json)")
    p.add_argument("--embeddings", help="adopt these stored image embeddings (.npy, N x D) instead of embedding")
    p.add_argument("--keys", help="with --embeddings: one key per row (packed sample key or path in SOURCE)")
    p.add_argument("--check-sample", type=int, default=8, help="images re-embedded to check adopted embeddings")
    p.set_defaults(func=cmd_index)

    p = sub.add_parser("query", help="search a gallery index with text")
    p.add_argument("index", help="a folder written by align index")
    p.add_argument("text", nargs="+", help="one or more query texts")
    p.add_argument("-k", type=int, default=10, help="results per query")
    p.add_argument("--json", action="store_true", help="print the results as one JSON object")
    p.add_argument("--backend", choices=("auto", "numpy", "faiss"), default="auto",
                   help="exact inner-product search: numpy, faiss IndexFlatIP, or auto (faiss for large galleries)")
    p.add_argument("--faiss", action="store_true", help="same as --backend faiss")
    p.add_argument("--export", help="the export to embed queries with (default: the one the index was built with)")
    p.set_defaults(func=cmd_query)
    return parser


def main(argv: list[str] | None = None) -> int:
    os.environ.setdefault("HF_HUB_OFFLINE", "1")  # models load from local paths only
    os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
    os.environ.setdefault("TOKENIZERS_PARALLELISM", "false")
    args = build_parser().parse_args(argv)
    try:
        return args.func(args)
    except AlignError as exc:
        console.print(f"[red]error:[/red] {exc.message}")
        if exc.hint:
            console.print(f"  [bold]hint:[/bold] {exc.hint}")
        return 2
    except KeyboardInterrupt:
        console.print("[yellow]interrupted[/yellow]; a finished checkpoint can be resumed with --resume")
        return 130


if __name__ == "__main__":
    sys.exit(main())
