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
    from .data.vectors import VectorSource
    vectors = (VectorSource(Path(args.vectors), args.vector_model or "", Path(args.vector_keys) if args.vector_keys
                            else None, args.key_column, args.vector_column, args.vector_dim) if args.vectors else None)
    pack_source(args.source, args.out, val_fraction=args.val_fraction, shard_size=args.shard_size,
                max_caption_chars=args.max_caption_chars, image_roots=args.image_root, console=console,
                vectors=vectors, workers=args.workers)
    return 0


def cmd_train(args) -> int:
    from .service.launch import rank_on_step
    from .training import train
    on_step = rank_on_step()  # None unless started by align serve's launcher (dies with it, stops on request)
    recipe = _recipe(args)
    run_dir = Path(args.run_dir or Path("runs") / recipe.name)
    summary = train(recipe, run_dir, resume=args.resume, console=console, on_step=on_step)
    if os.environ.get("RANK", "0") == "0":  # under torchrun / accelerate launch, one summary, not one per process
        console.print(f"[green]trained[/green] {summary['steps']} steps in {summary['elapsed_s']:.0f}s "
                      f"({summary['pairs_per_s'] or 0:.0f} pairs/s); run folder: {run_dir}")
    return 0


def cmd_evaluate(args) -> int:
    from .evaluate import evaluate_run
    evaluate_run(args.run_dir, shards=args.shards, tag=args.tag, console=console)
    console.print(f"metrics written to {Path(args.run_dir) / 'metrics.json'}")
    return 0


def cmd_report(args) -> int:
    from .report import write_report
    write_report(args.run_dir, console=console)
    return 0


def cmd_compare(args) -> int:
    from .compare import compare_runs
    compare_runs(args.run_dirs, args.out, metric=args.metric, console=console)
    return 0


def cmd_features(args) -> int:
    from .features import build_recipe_features
    recipe = _recipe(args)
    for feats in build_recipe_features(recipe, console=console, processes=args.processes):
        how = (f"built, {feats.build.images_per_s:.0f} img/s" if feats.build else "already cached")
        console.print(f"{feats.fingerprint['split']}: {len(feats)} images x {feats.views} view(s) "
                      f"({how}) in {feats.path}")
    from .training.data import prepare_tables  # the captions and ids, so training starts without the shards
    for table in prepare_tables(recipe, console):
        console.print(f"training table: {len(table)} rows ({'built' if table.built else 'already built'}) "
                      f"in {table.path}")
    return 0


def cmd_demo(args) -> int:
    from .demo_pipeline import run_demo
    run_demo(Path(args.out), data_dir=Path(args.data_dir) if args.data_dir else None,
             recipe_path=args.recipe, overrides=args.set, console=console)
    return 0


def cmd_vocab(args) -> int:
    import json

    from .text.vocab import report_tables, shards_vocab_report
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
                keys=args.keys, sample=args.check_sample, fmt=args.format, ann=args.ann, console=console)
    return 0


def cmd_query(args) -> int:
    import json

    from .index import parse_where, query_index
    if sum((args.faiss, args.exact, args.backend != "auto")) > 1:
        raise AlignError("--backend, --faiss and --exact each choose the backend", "give one of them")
    backend = "faiss" if args.faiss else "exact" if args.exact else args.backend
    answer = query_index(args.index, args.text, k=args.k, backend=backend, export_dir=args.export,
                         where=parse_where(args.where))
    if args.html:
        from .index.query_page import write_query_html
        write_query_html(args.index, answer, args.html, console=console)
    if args.json:
        print(json.dumps(answer, ensure_ascii=False, allow_nan=False))  # strict JSON: no bare NaN, ever
        return 0
    from rich.table import Table
    for item in answer["queries"]:
        table = Table(title=item["text"], show_header=True)
        table.add_column("rank", justify="right")
        table.add_column("key")
        table.add_column("score", justify="right")
        for hit in item["results"]:
            table.add_row(str(hit["rank"]), hit["key"], "n/a" if hit["score"] is None else f"{hit['score']:.4f}")
        Console().print(table)
    return 0


def cmd_serve(args) -> int:
    from .service.app import serve
    from .service.home import Settings, default_home
    serve(Settings(home=args.home or default_home(), host=args.host, port=args.port, workers=args.workers,
                   data_roots=args.data_root, max_body_bytes=args.max_body_bytes))
    return 0


def cmd_jobs(args) -> int:
    import json

    from .service import client as C
    service = C.ServiceClient(args.url, C.find_token(args.token_file, args.home))
    out = Console()
    out = out if out.is_terminal else Console(width=160)  # piped: keep a table's rows on one line each
    if args.jobs_command == "submit":
        if (args.recipe is None) == (args.named is None):
            raise AlignError("give a recipe file or --named NAME, one of them",
                             "e.g. align jobs submit recipes/lora-cpu.toml --data DIR")
        if args.recipe and not Path(args.recipe).is_file():
            raise AlignError(f"no recipe at {args.recipe}", "pass a local TOML file, or --named NAME for one in HOME/recipes/")
        job = service.submit(recipe_toml=Path(args.recipe).read_text(encoding="utf-8") if args.recipe else None,
                             recipe_name=args.named, overrides=args.set, data=C.data_argument(args.data),
                             name=args.name, export=args.export, export_onnx=args.onnx,
                             index=C.data_argument(args.index), processes=args.processes)
        console.print(f"queued job {job['id']} ({job['name']}); follow it with: align jobs show {job['id']}")
        if args.wait:
            job = service.wait(job["id"], console)
            C.print_job(job, out)
            return 0 if job["state"] == "finished" else 1
    elif args.jobs_command == "list":
        jobs = service.jobs(args.state)
        print(json.dumps(jobs, indent=2)) if args.json else out.print(C.jobs_table(jobs))
    elif args.jobs_command == "show":
        job = service.job(args.id)
        print(json.dumps(job, indent=2)) if args.json else C.print_job(job, out)
    elif args.jobs_command == "cancel":
        job = service.cancel(args.id)
        console.print(f"job {job['id']}: {job['state']}" + (" (stops at its next logged step)"
                                                            if job["state"] == "running" else ""))
    return 0


def _add_recipe_args(p: argparse.ArgumentParser, required: bool = True) -> None:
    if required:
        p.add_argument("recipe", help="recipe TOML file, e.g. recipes/lora-cpu.toml")
    p.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                   help="override a recipe value (repeatable), e.g. --set train.steps=50")


def _add_pack_command(sub) -> None:
    """The packing command."""
    p = sub.add_parser("pack", help="validate image-caption pairs and write webdataset shards")
    p.add_argument("source", help="a folder (image + same-stem .txt [+ .json labels]) or a .csv/.jsonl file")
    p.add_argument("--out", required=True, help="output folder for shards, manifest.json and rejected.jsonl")
    p.add_argument("--val-fraction", type=float, default=0.1, help="share of samples in the val split (by key hash)")
    p.add_argument("--shard-size", type=int, default=1000, help="samples per tar shard")
    p.add_argument("--max-caption-chars", type=int, default=1000, help="longer captions are rejected")
    p.add_argument("--workers", type=int, default=1, help="processes that check and encode samples (the output "
                                                          "is the same for any number; an interrupted pack "
                                                          "resumes from its finished shards)")
    p.add_argument("--image-root", action="append", default=[], metavar="DIR",
                   help="a folder whose images a CSV/JSONL may name besides its own folder (repeatable); "
                        "without it, rows naming images elsewhere are refused")
    v = p.add_argument_group("stored vectors (the embeddings you already hold become the training targets)")
    v.add_argument("--vectors", metavar="FILE", help="an .npy (N x D) array with --vector-keys, or a .parquet file")
    v.add_argument("--vector-keys", metavar="FILE", help="for an .npy: one key (sample key or image path) per row")
    v.add_argument("--key-column", default="key", help="for a .parquet: the key column (default: key)")
    v.add_argument("--vector-column", default="vector", help="for a .parquet: the vector column (default: vector)")
    v.add_argument("--vector-model", metavar="ID", help="the id of the model that made the vectors (recorded)")
    v.add_argument("--vector-dim", type=int, default=0, help="the width every vector must have "
                                                              "(default: the most common width in the file)")
    p.set_defaults(func=cmd_pack)


def _add_run_commands(sub) -> None:
    """Training and reading a run."""
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

    p = sub.add_parser("report", help="rebuild a run's report.html and plots from its folder (no model is loaded)")
    p.add_argument("run_dir", help="a folder written by align train (evaluated for the full report)")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("compare", help="runs side by side: differing recipe fields, metrics with intervals, a plot")
    p.add_argument("run_dirs", nargs="+", metavar="RUN", help="two or more run folders; the first is the baseline")
    p.add_argument("--out", default="compare", help="folder for compare.md, compare.json and compare.png")
    p.add_argument("--metric", default="mean_recall", help="validation metric drawn and ranked (without val/)")
    p.set_defaults(func=cmd_compare)


def _add_data_commands(sub) -> None:
    """Features, vocabulary and the demo."""
    p = sub.add_parser("features", help="cache the frozen image features a recipe needs, ahead of training")
    _add_recipe_args(p)
    p.add_argument("--processes", type=int, default=1, metavar="N",
                   help="embed with N local processes of one thread each (under torchrun every rank builds its share)")
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


def _add_handoff_commands(sub) -> None:
    """Hand-off to retrieval."""
    p = sub.add_parser("export", help="adapter, merged encoder, ONNX, image-side contract and card of a run")
    p.add_argument("run_dir", help="a folder written by align train")
    p.add_argument("--out", required=True, help="export folder (replaced only once the new export is complete)")
    p.add_argument("--checkpoint", help="a checkpoint folder of the run (default: the best validation step's "
                   "under train.keep_best, else the newest)")
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
    p.add_argument("--format", choices=("both", "npy", "parquet"), default="both",
                   help="embeddings.npy + keys.txt and gallery.parquet (both), or only one of them")
    p.add_argument("--ann", choices=("auto", "yes", "no"), default="auto",
                   help="build the on-disk approximate index: auto (from 50,000 images of a 1280-wide tower), yes, no")
    p.set_defaults(func=cmd_index)

    p = sub.add_parser("query", help="search a gallery index with text")
    p.add_argument("index", help="a folder written by align index")
    p.add_argument("text", nargs="+", help="one or more query texts")
    p.add_argument("-k", type=int, default=10, help="results per query")
    p.add_argument("--json", action="store_true", help="print the results as one JSON object")
    p.add_argument("--backend", choices=("auto", "exact", "numpy", "faiss", "ann"), default="auto",
                   help="numpy or faiss IndexFlatIP (exact), ann (the index's approximate one), exact (numpy or "
                        "faiss by size), auto (ann when the index has one, else exact)")
    p.add_argument("--faiss", action="store_true", help="same as --backend faiss")
    p.add_argument("--exact", action="store_true", help="same as --backend exact: never the approximate index")
    p.add_argument("--where", action="append", default=[], metavar="FIELD=VALUE",
                   help="only samples whose label FIELD is VALUE (repeatable: fields AND, values of one field OR)")
    p.add_argument("--export", help="the export to embed queries with (default: the one the index was built with)")
    p.add_argument("--html", metavar="OUT", help="also write the results as one self-contained HTML file "
                                                 "(thumbnails, keys, labels, scores; opens offline)")
    p.set_defaults(func=cmd_query)


def _add_service_commands(sub) -> None:
    """The service and its client."""
    p = sub.add_parser("serve", help="the training service: an HTTP job queue, search endpoints and a status page")
    p.add_argument("--host", default="127.0.0.1", help="address to bind (beyond loopback every call needs the token)")
    p.add_argument("--port", type=int, default=8765, help="port to listen on")
    p.add_argument("--home", default=None, help="service home: jobs.db, token, runs/, exports/, recipes/, data/ "
                   "(default $ALIGN_HOME or ~/.align)")
    p.add_argument("--data-root", action="append", default=[], metavar="DIR",
                   help="a folder jobs may read data from (repeatable; HOME/data always counts)")
    p.add_argument("--workers", type=int, default=1, help="jobs run at the same time (one worker process each)")
    p.add_argument("--max-body-bytes", type=int, default=1 << 20, help="largest request body accepted")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("jobs", help="submit, list, show or cancel jobs of a running align serve")
    jobs = p.add_subparsers(dest="jobs_command", required=True, metavar="ACTION")
    for name, text in (("submit", "queue a training job"), ("list", "the job list"), ("show", "one job in detail"),
                       ("cancel", "cancel a queued or running job")):
        q = jobs.add_parser(name, help=text)
        q.add_argument("--url", default=None, help="the service (default $ALIGN_URL or http://127.0.0.1:8765)")
        q.add_argument("--home", default=None, help="the service home, to read its token (default $ALIGN_HOME or ~/.align)")
        q.add_argument("--token-file", default=None, help="read the token from this file (or set ALIGN_TOKEN)")
        if name == "submit":
            q.add_argument("recipe", nargs="?", help="a local recipe TOML file (its text is sent)")
            q.add_argument("--named", help="instead: a recipe file in the service's HOME/recipes/")
            q.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE", help="override (repeatable)")
            q.add_argument("--data", help="packed data folder inside one of the service's data roots")
            q.add_argument("--name", help="job name (default: the recipe's name)")
            q.add_argument("--export", help="after training, export to HOME/exports/NAME (served by /exports/NAME)")
            q.add_argument("--onnx", action="store_true", help="the export includes the ONNX text encoder")
            q.add_argument("--index", help="with --export: index this gallery folder for /exports/NAME/search")
            q.add_argument("--processes", type=int, default=None, metavar="N",
                           help="train in N processes (torchrun), each on a GPU of its own or a share of the cores")
            q.add_argument("--wait", action="store_true", help="follow the job until it ends")
        elif name == "list":
            q.add_argument("--state", choices=("queued", "running", "finished", "failed", "cancelled"))
            q.add_argument("--json", action="store_true", help="print the jobs as JSON")
        else:
            q.add_argument("id", type=int, help="job id")
            if name == "show":
                q.add_argument("--json", action="store_true", help="print the job as JSON")
    p.set_defaults(func=cmd_jobs)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="align", description="Train a text tower into a frozen image tower's "
                                     "embedding space, evaluate it and hand it to retrieval.")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    _add_pack_command(sub)
    _add_run_commands(sub)
    _add_data_commands(sub)
    _add_handoff_commands(sub)
    _add_service_commands(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    from .offline import use_offline_defaults
    use_offline_defaults()  # models load from local paths only
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
