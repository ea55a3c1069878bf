"""``align compare``: runs side by side, in one table and one plot.

The table lists the recipe fields that differ between the runs, then each run's metrics: recall@K
both ways with the 95% bootstrap intervals evaluate stored, zero-shot per label field, and the best
validation step. Each run after the first is read against the first: a difference whose two
intervals overlap is labelled "inside the intervals" (the data cannot tell the runs apart at that
level), otherwise "beyond the intervals". The plot draws validation recall against step per run.
"""
from __future__ import annotations

import json
from pathlib import Path

from rich.console import Console
from rich.table import Table

from . import artifacts as A
from .errors import AlignError
from .fileio import write_bytes_atomic, write_json_atomic, write_text_atomic
from .report import read_details
from .report.plots import runs_validation
from .run import RunDir, best_logged_step, recipe_changes


def _names(runs: list[RunDir]) -> list[str]:
    """Each run's folder name, made unique by its parent where two share one."""
    names = [r.path.name for r in runs]
    return [f"{r.path.parent.name}/{n}" if names.count(n) > 1 else n for r, n in zip(runs, names)]


def _recipe_rows(runs: list[RunDir]) -> list[dict]:
    recipes = [r.recipe() for r in runs]
    changed: dict[str, list] = {}
    for i, recipe in enumerate(recipes[1:], start=1):
        for field, (first, other) in recipe_changes(recipes[0], recipe).items():
            changed.setdefault(field, [first] * len(recipes))[i] = other
    return [{"row": field, "kind": "recipe", "values": [json.dumps(v) for v in values]}
            for field, values in sorted(changed.items()) if field != "data.shards" or len(set(map(str, values))) > 1]


def _against_first(first: dict | None, other: dict | None) -> str:
    if not first or not other:
        return ""
    delta = other["value"] - first["value"]
    overlap = other["low"] <= first["high"] and first["low"] <= other["high"]
    return f"{delta:+.3f}, {'inside' if overlap else 'beyond'} the intervals"


def _metric_rows(runs: list[RunDir], metric: str) -> list[dict]:
    details = [read_details(r.path).get("", {}) for r in runs]
    metrics = [json.loads((r.path / A.METRICS).read_text(encoding="utf-8")) if (r.path / A.METRICS).is_file() else {}
               for r in runs]
    rows = []
    keys = sorted({k for d in details for k in d.get("recall", {})},
                  key=lambda k: (not k.startswith("text"), int(k.split("@")[1])))
    for key in keys:
        cells = [d.get("recall", {}).get(key) for d in details]
        rows.append({"row": key, "kind": "metric",
                     "values": [f"{c['value']:.3f} [{c['low']:.3f}, {c['high']:.3f}]" if c else "—" for c in cells],
                     "against_first": [""] + [_against_first(cells[0], c) for c in cells[1:]], "intervals": cells})
    for key in sorted({k for m in metrics for k in m if k.startswith(("zero_shot_accuracy/", "linear_probe_accuracy/"))}):
        rows.append({"row": key, "kind": "metric", "values": [f"{m[key]:.3f}" if key in m else "—" for m in metrics]})
    bests = [best_logged_step(r.log_records(), f"val/{metric}") for r in runs]
    rows.append({"row": f"best val/{metric}", "kind": "validation",
                 "values": [f"{b[1]:.3f} at step {b[0]}" if b else "—" for b in bests]})
    rows.append({"row": "evaluated", "kind": "evaluation",
                 "values": [f"{d['checkpoint']}, {d['pairs']} pairs of {d['split']}" if d else "not evaluated"
                            for d in details]})
    return rows


def _markdown(names: list[str], rows: list[dict], plot: str | None) -> str:
    lines = ["| | " + " | ".join(names) + " |", "|---" * (len(names) + 1) + "|"]
    for row in rows:
        cells = [v + (f" ({a})" if a else "") for v, a in zip(row["values"], row.get("against_first", [""] * len(names)))]
        lines.append(f"| {row['row']} | " + " | ".join(c.replace("|", "\\|") for c in cells) + " |")
    notes = ["", "Intervals: 95% percentile bootstrap over the evaluation queries (see each run's report). "
             "Each run after the first is read against the first: overlapping intervals = inside the intervals."]
    return "\n".join(lines + notes + (["", f"![validation recall per run]({plot})"] if plot else [])) + "\n"


def compare_runs(run_dirs: list[str | Path], out: str | Path, metric: str = "mean_recall",
                 console: Console | None = None) -> dict:
    """Write compare.md, compare.json and compare.png into ``out``; print the table; return the rows."""
    console = console or Console(stderr=True)
    if len(run_dirs) < 2:
        raise AlignError("compare needs at least two run folders", "align compare RUN_A RUN_B [RUN_C ...]")
    runs = [RunDir(p) for p in run_dirs]
    names = _names(runs)
    rows = _recipe_rows(runs) + _metric_rows(runs, metric)
    out = Path(out)
    png = runs_validation({n: r.log_records() for n, r in zip(names, runs)}, f"val/{metric}")
    if png is not None:
        write_bytes_atomic(out / A.COMPARE_PLOT, png)
    write_text_atomic(out / A.COMPARE_TABLE, _markdown(names, rows, A.COMPARE_PLOT if png else None))
    write_json_atomic(out / A.COMPARE_JSON, {"runs": [str(r.path.resolve()) for r in runs], "names": names,
                                            "rows": rows, "metric": metric})
    table = Table(title=f"runs side by side (against {names[0]})")
    table.add_column("")
    for name in names:
        table.add_column(name, justify="right")
    for row in rows:
        against = row.get("against_first", [""] * len(names))
        table.add_row(row["row"], *[v + (f"\n({a})" if a else "") for v, a in zip(row["values"], against)])
    Console().print(table)
    console.print(f"written: {out / A.COMPARE_TABLE}, {out / A.COMPARE_JSON}"
                  + (f", {out / A.COMPARE_PLOT}" if png else f" (no plot: no run logged val/{metric})"))
    return {"names": names, "rows": rows, "out": str(out)}
