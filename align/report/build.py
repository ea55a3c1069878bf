"""Writing a run's report: gather the run folder's records, draw the plots, write the page.

Reads only what the run folder already holds (the resolved recipe, the training log, the
checkpoints' progress records, ``metrics.json`` and ``evaluation.json``) plus thumbnails from the
evaluation shards, so ``align report`` rebuilds the page in seconds without loading a model.
"""
from __future__ import annotations

import json
import time
from pathlib import Path

from rich.console import Console

from .. import artifacts as A
from ..errors import AlignError
from ..fileio import write_bytes_atomic, write_text_atomic
from ..run import RunDir, best_logged_step
from . import page as P
from . import plots
from .details import read_details
from .thumbnails import thumbnails


def _evaluation_sets(details: dict) -> list[tuple[str, dict]]:
    """(tag, details): the default evaluation first, then tagged ones by name."""
    return sorted(details.items(), key=lambda item: (item[0] != "", item[0]))


def _header(run: RunDir, recipe, records: list[dict], metrics: dict, default: dict) -> str:
    trained = records[-1]["step"] if records else 0
    try:
        choice = run.default_checkpoint().reason
    except AlignError:
        choice = "no checkpoint yet"
    rows = [("run folder", str(run.path.resolve())), ("recipe", f"{recipe.name}: text {recipe.text.kind}, "
            f"image tower {recipe.vision.model}, loss {recipe.loss.kind}"),
            ("trained", f"{trained} of {recipe.train.steps} steps, batch {recipe.train.batch_size}"),
            ("checkpoint used by evaluate / export", choice)]
    if default:
        rows.append(("evaluated", f"{default['checkpoint']} on {default['split']} of {default['shards']} "
                                  f"({default['pairs']} pairs)"))
    if "temperature" in metrics:
        rows.append(("temperature", P.number(metrics["temperature"], 4)))
    return (f"<h1>{P.esc(run.path.name)}: run report</h1><p class='muted'>written "
            f"{time.strftime('%Y-%m-%d %H:%M')} by align</p>" + P.facts_table(rows))


def _validation_section(recipe, records: list[dict], drawn: dict) -> str:
    cfg = recipe.train
    if not plots.validation_keys(records):
        return ("<section id='validation'><h2>Validation during training</h2><p class='muted'>none logged "
                f"(train.eval_every = {cfg.eval_every}; set it, e.g. 50, to see when recall stops improving)."
                "</p></section>")
    key = f"val/{cfg.keep_best or 'mean_recall'}"
    logged = [r for r in records if key in r]
    best = best_logged_step(records, key)
    drawn[A.PLOT_VALIDATION] = plots.validation_curves(records, best, key)
    summary = (f"best {key}: {P.number(best[1])} at step {best[0]}; the last validation, step {logged[-1]['step']}: "
               f"{P.number(logged[-1][key])}" if best else "")
    subset = f"{cfg.eval_samples} pairs (at most) of {recipe.data.eval_split}, drawn with seed {cfg.seed}"
    return (f"<section id='validation'><h2>Validation during training</h2><p>{P.esc(summary)}</p>"
            + P.plot(drawn[A.PLOT_VALIDATION], "validation recall against step", "validation-curves")
            + f"<p class='note'>every {cfg.eval_every} steps on a fixed subset: {P.esc(subset)}; "
              "images from the frozen-feature cache.</p></section>")


def _retrieval_section(sets: list[tuple[str, dict]], drawn: dict) -> str:
    parts = ["<section id='retrieval'><h2>Retrieval, with 95% bootstrap intervals</h2><div class='side'><div>"]
    for tag, d in sets:
        boot = d["bootstrap"]
        parts.append(f"<h3>{P.esc(tag or d['split'])}: {d['pairs']} pairs ({P.esc(d['checkpoint'])})</h3>"
                     + P.recall_table(d["recall"])
                     + f"<p class='note'>{P.esc(boot['method'])}: {boot['resamples']} resamples, seed {boot['seed']}, "
                       f"{boot['level']:.0%} percentile interval.</p>")
    parts.append("<p class='note'>A hit is the caption's own image or any image with the same labels.</p></div>")
    if sets:
        tag, d = sets[0]
        drawn[A.PLOT_RECALL] = plots.recall_intervals(d["recall"], d["bootstrap"]["level"])
        parts.append(P.plot(drawn[A.PLOT_RECALL], "recall at K with intervals", "recall-plot"))
    return "".join(parts) + "</div></section>"


def _fields_section(fields: dict[str, dict], drawn: dict) -> str:
    if not fields:
        return "<section id='fields'><h2>Label fields</h2><p class='muted'>the split has no label fields.</p></section>"
    drawn[A.PLOT_FIELDS] = plots.field_accuracy(fields)
    parts = ["<section id='fields'><h2>Zero-shot per label field, beside the linear-probe ceiling</h2><div class='side'>",
             P.fields_table(fields), P.plot(drawn[A.PLOT_FIELDS], "zero-shot and linear probe per field", "fields-plot"),
             "</div><div class='fields'>"]
    for name, detail in fields.items():
        file_name = A.PLOT_CONFUSION.format(field=name.replace("/", "_"))
        drawn[file_name] = plots.confusion(name, detail)
        parts.append(f"<div class='field'><h3>{P.esc(name)}</h3>"
                     + (P.plot(drawn[file_name], f"confusion matrix of {name}", f"confusion-{name}")
                        if drawn[file_name] else "") + P.per_class_table(detail) + "</div>")
    return "".join(parts) + "</div></section>"


def _gallery_section(default: dict, thumbs: dict[str, str]) -> str:
    examples = default.get("examples", {})
    sample = "".join(P.example_row(e, thumbs, show_own=False) for e in examples.get("sample", []))
    hardest = "".join(P.example_row(e, thumbs, show_own=True) for e in examples.get("hardest", []))
    return ("<section id='gallery'><h2>Retrieval gallery</h2><p class='note'>a fixed, seeded sample of captions "
            "and their top 5 images (text → image); green = hit, red = miss; the score is the cosine similarity."
            f"</p>{sample or '<p class=muted>no evaluation yet.</p>'}</section>"
            "<section id='hardest'><h2>Hardest misses</h2><p class='note'>the captions whose first hit ranks lowest; "
            f"the dashed picture is the caption's own image.</p>{hardest or '<p class=muted>none: every caption found a hit first.</p>'}"
            "</section>")


def write_report(run_dir: str | Path, console: Console | None = None) -> Path:
    """Write ``report.html`` and ``plots/*.png`` into the run folder; returns the report's path."""
    run = RunDir(run_dir)
    recipe = run.recipe()
    records = [r for r in run.log_records() if "loss" in r]
    metrics_path = run.path / A.METRICS
    metrics = json.loads(metrics_path.read_text(encoding="utf-8")) if metrics_path.is_file() else {}
    details = read_details(run.path)
    sets = _evaluation_sets(details)
    default = details.get("", sets[0][1] if sets else {})
    drawn: dict[str, bytes | None] = {A.PLOT_TRAINING: plots.training_curves(records)}
    wanted = {item["key"] for group in default.get("examples", {}).values() for example in group
              for item in [example, *example["top"]]}
    thumbs = thumbnails(default["shards"], default["split"], wanted) if default else {}
    sections = [_header(run, recipe, records, metrics, default),
                "<section id='training'><h2>Training</h2>"
                + P.plot(drawn[A.PLOT_TRAINING], "loss, temperature and learning rate against step", "training-curves")
                + "</section>",
                _validation_section(recipe, records, drawn),
                _retrieval_section(sets, drawn),
                _fields_section(default.get("fields", {}), drawn),
                _gallery_section(default, thumbs),
                f"<section id='recipe'><h2>Recipe</h2><details><summary>{P.esc(run.recipe_path.name)}</summary>"
                f"<pre>{P.esc(run.recipe_path.read_text(encoding='utf-8'))}</pre></details></section>"]
    for name, png in drawn.items():
        if png is not None:
            write_bytes_atomic(run.path / A.PLOTS / name, png)
    out = run.path / A.REPORT
    write_text_atomic(out, P.document(f"{run.path.name}: run report", sections))
    if console is not None:
        console.print(f"report: {out}")
    return out
