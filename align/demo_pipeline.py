"""``align demo``: the whole path on the procedurally drawn tile catalogue.

Draw the catalogue (some glaze x pattern pairs held out of training entirely) -> pack it ->
train the demo recipe -> evaluate on held-in validation pairs and on the held-out pairs -> print a
summary (recall with its 95% bootstrap interval) and where the run's report is. The drawn images and
shards are reused when already there; the run is trained afresh.
"""
from __future__ import annotations

import json
import shutil
import time
from pathlib import Path

from rich.console import Console
from rich.table import Table

from . import artifacts as A
from .data.demo import HELDOUT_PAIRS, write_catalogue
from .data.pack import pack_source
from .evaluate import evaluate_run
from .recipe import load_recipe
from .report import read_details
from .training import train
from .text.vocab import shards_vocab_report

DEFAULT_RECIPE = Path(__file__).resolve().parent.parent / "recipes" / "demo-cpu.toml"
CATALOGUE_SEED = 0
PER_PAIR = 18  # 90 held-in pairs x 18 = 1,620 images, plus the held-out pairs


def _packed(folder: Path) -> bool:
    return (folder / A.MANIFEST).is_file()


def prepare_demo_data(data_dir: Path, console: Console) -> tuple[Path, Path]:
    """Draw and pack the catalogue once; later demos reuse it (it is seeded, so it would be identical)."""
    drawn, shards, heldout = data_dir / "drawn", data_dir / "shards", data_dir / "heldout-shards"
    if not (_packed(shards) and _packed(heldout)):
        console.rule("drawing the tile catalogue")
        write_catalogue(drawn, per_pair=PER_PAIR, seed=CATALOGUE_SEED, console=console)
        console.rule("packing")
        pack_source(drawn / "catalogue", shards, val_fraction=0.15, console=console)
        pack_source(drawn / "heldout", heldout, val_fraction=1.0, console=console)
    return shards, heldout


def run_demo(out: Path, data_dir: Path | None = None, recipe_path: str | None = None,
             overrides: list[str] | None = None, console: Console | None = None) -> dict:
    console = console or Console(stderr=True)
    started = time.perf_counter()
    data_dir = data_dir or out.parent / f"{out.name}-data"
    shards, heldout = prepare_demo_data(data_dir, console)

    recipe = load_recipe(recipe_path or DEFAULT_RECIPE, [f"data.shards={json.dumps(str(shards))}", *(overrides or [])])
    # how the text tokenizer reads the catalogue's trade words (cheap: tokenizers only, no model)
    vocab = shards_vocab_report(shards, text_model=recipe.text.model, cap=recipe.text.new_tokens_cap,
                                scratch_vocab_size=recipe.text.scratch.vocabulary_size)
    if out.exists():  # the demo always trains afresh into its own folder
        shutil.rmtree(out)
    console.rule("training")
    summary = train(recipe, out, console=console)
    console.rule("evaluating")
    held_in = evaluate_run(out, console=console)
    held_out = evaluate_run(out, shards=heldout, tag="heldout", console=console)
    wall = time.perf_counter() - started
    details = read_details(out)

    def with_interval(tag: str, key: str) -> str:
        cell = details.get(tag, {}).get("recall", {}).get(key)
        return f"{cell['value']:.3f} [{cell['low']:.3f}, {cell['high']:.3f}]" if cell else "—"

    table = Table(title="align demo: tile catalogue", show_header=True)
    table.add_column("measure")
    table.add_column("value", justify="right")
    rows = [
        ("training pairs / steps", f"{summary['train_pairs']} / {summary['steps']}"),
        ("training speed", f"{summary['pairs_per_s']:.0f} pairs/s"),
        ("held-in val: text→image R@1 [95%]", with_interval("", "text_to_image_recall@1")),
        ("held-in val: text→image R@5 [95%]", with_interval("", "text_to_image_recall@5")),
        ("held-in val: image→text R@1 [95%]", with_interval("", "image_to_text_recall@1")),
        (f"held-out pairs ({len(HELDOUT_PAIRS)} never trained on): text→image R@1 [95%]",
         with_interval("heldout", "text_to_image_recall@1")),
    ]
    for field in ("glaze", "pattern"):
        zs, probe = held_in.get(f"zero_shot_accuracy/{field}"), held_in.get(f"linear_probe_accuracy/{field}")
        if zs is not None:
            rows.append((f"zero-shot {field} (probe ceiling)", f"{zs:.3f} ({probe:.3f})" if probe else f"{zs:.3f}"))
        hz = held_out.get(f"heldout/zero_shot_accuracy/{field}")
        if hz is not None:
            rows.append((f"held-out pairs: zero-shot {field}", f"{hz:.3f}"))
    rows.append(("wall time", f"{wall:.0f} s"))
    for name, value in rows:
        table.add_row(name, value)
    Console().print(table)
    Console().print(f"vocabulary: {vocab['headline']}"
                    + (f" (this run extends its tokenizer: text.new_tokens = {recipe.text.new_tokens!r})"
                       if recipe.text.new_tokens else "; `align vocab` has the terms, text.new_tokens = \"auto\" adds them"))
    console.print(f"run folder: {out}  (metrics: {out / A.METRICS})")
    console.print(f"report: {out / A.REPORT}  (open it in a browser; `align report {out}` rebuilds it)")
    return {"held_in": held_in, "held_out": held_out, "wall_s": wall, "train": summary, "vocab": vocab}
