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
