"""The run report, validation during training, the best checkpoint and runs side by side.

- bootstrap intervals of recall@K against a direct numpy computation and scipy.stats.bootstrap;
- the zero-shot confusion matrix against scikit-learn's confusion_matrix and recall_score;
- a run validating every 3 steps, cut and resumed, against the uninterrupted run (weights, log);
- the best-checkpoint choice (best logged metric, ties to the earlier step, never pruned);
- the report in headless Chromium (no console error, no request leaving the file), ``align report``
  and ``align compare`` through the CLI.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import torch

from align import artifacts as A
from align.checkpoint import latest_checkpoint, list_checkpoints, load_weights
from align.cli import main as cli_main
from align.errors import RecipeError
from align.evaluate import evaluate_run
from align.metrics import bootstrap_recall_intervals, confusion_matrix, per_class_recall
from align.run import RunDir, best_logged_step
from align.training import train
from recipes import tiny_recipe
from service_harness import REPO, Browser, chromium

SCREENSHOT = REPO / "tests" / "artifacts" / "report.png"
TIMING = ("pairs_per_s", "elapsed_s")  # wall-clock fields: the only ones two equal runs may differ in


# --------------------------------------------------------------------------------------------
# pure parts


def _direct_bootstrap(ranks: np.ndarray, k: int, resamples: int, seed: int) -> tuple[float, float]:
    """The textbook percentile bootstrap, written out with numpy's seeded resampling."""
    valid = ranks[ranks >= 0]
    rng = np.random.default_rng(seed)
    draws = rng.integers(0, valid.size, (resamples, valid.size))
    recalls = (valid[draws] < k).mean(axis=1)
    low, high = np.quantile(recalls, [0.025, 0.975])
    return float(low), float(high)


def test_bootstrap_intervals_match_numpy_and_scipy_and_contain_the_estimate():
    from scipy import stats

    ranks = np.random.default_rng(11).integers(-1, 25, 203)  # -1: queries without a hit, left out
    valid = ranks[ranks >= 0]
    intervals = bootstrap_recall_intervals(ranks, [1, 5, 10], resamples=700, seed=5)
    for k, (low, high) in intervals.items():
        # reference 1: the same resampling written out (numpy, same seed and number of resamples)
        assert (low, high) == pytest.approx(_direct_bootstrap(ranks, k, 700, 5), abs=1e-12)
        # reference 2: scipy.stats.bootstrap, percentile method, the same generator
        scipy_ci = stats.bootstrap(((valid < k).astype(float),), np.mean, n_resamples=700, method="percentile",
                                   rng=np.random.default_rng(5), vectorized=True).confidence_interval
        assert (low, high) == pytest.approx((scipy_ci.low, scipy_ci.high), abs=1e-12)
        point = float((valid < k).mean())
        assert low <= point <= high and low < high
    # every query hits first: no resample can score anything but 1
    assert bootstrap_recall_intervals(np.zeros(40, dtype=int), [1, 5], resamples=200, seed=0) == {
        1: (1.0, 1.0), 5: (1.0, 1.0)}


def test_confusion_matrix_and_per_class_recall_equal_scikit_learn():
    from sklearn.metrics import confusion_matrix as sk_confusion
    from sklearn.metrics import recall_score

    rng = np.random.default_rng(3)
    true = rng.integers(0, 6, 400)
    predicted = np.where(rng.random(400) < 0.6, true, rng.integers(0, 7, 400))  # class 6 only ever predicted
    ours = confusion_matrix(true, predicted, 7)
    assert np.array_equal(ours, sk_confusion(true, predicted, labels=list(range(7))))
    recall = per_class_recall(ours)
    reference = recall_score(true, predicted, labels=list(range(6)), average=None)
    assert np.allclose(recall[:6], reference) and np.isnan(recall[6])  # no true row of class 6: no recall


def test_best_logged_step_takes_the_highest_value_and_the_earlier_of_a_tie():
    records = [{"step": 2, "loss": 1.0}, {"step": 3, "val/mean_recall": 0.5}, {"step": 6, "val/mean_recall": 0.7},
               {"step": 9, "val/mean_recall": 0.7}, {"step": 12, "val/mean_recall": 0.6}]
    assert best_logged_step(records, "val/mean_recall") == (6, 0.7)
    assert best_logged_step(records, "val/mean_recall", steps={3, 9, 12}) == (9, 0.7)
    assert best_logged_step(records, "val/text_to_image_recall@1") is None


def test_recipe_refuses_a_keep_best_it_cannot_honour():
    with pytest.raises(RecipeError, match="train.keep_best") as caught:
        tiny_recipe(None, "lora", train__eval_every=5, train__keep_best="recall@1")
    assert "text_to_image_recall@1" in caught.value.hint
    with pytest.raises(RecipeError, match="train.eval_every is 0"):
        tiny_recipe(None, "lora", train__keep_best="mean_recall")
    with pytest.raises(RecipeError, match="train.eval_samples"):
        tiny_recipe(None, "lora", train__eval_every=5, train__eval_samples=1)


def test_the_choice_on_a_run_folder_with_a_tie_and_pruning(tmp_path):
    # a run folder as train leaves it: the resolved recipe, the log, checkpoints with progress records
    run = RunDir(tmp_path / "run")
    run.write_recipe(tiny_recipe(None, "lora", train__eval_every=3, train__keep_best="mean_recall"))
    values = {3: 0.5, 6: 0.7, 9: 0.7, 12: 0.6}
    run.metrics_log.write_text("".join(json.dumps({"step": s, "loss": 1.0, "val/mean_recall": v}) + "\n"
                                       for s, v in values.items()) + json.dumps({"step": 2, "val/mean_recall": 0.9})
                               + "\n")  # the best value, but step 2 has no checkpoint: it cannot be chosen
    for step in values:
        folder = run.path / A.CHECKPOINTS / f"{A.CHECKPOINT_PREFIX}{step:06d}"
        folder.mkdir(parents=True)
        (folder / A.PROGRESS).write_text(json.dumps({"step": step}))
    choice = run.default_checkpoint()
    assert choice.path.name == "step-000006" and choice.best == (6, 0.7)
    assert "val/mean_recall" in choice.reason and "step 12" in choice.reason
    run.prune_checkpoints(1)  # the newest and the best survive
    assert [p.name for p in run.checkpoints()] == ["step-000006", "step-000012"]


# --------------------------------------------------------------------------------------------
# a run validating during training


def _validating_recipe(shards, **changes):
    # LoRA dropout draws from the RNG every step: an exact match proves validation leaves the stream alone
    return tiny_recipe(shards, "lora", name="validating", vision__image_size=64, text__lora_rank=4,
                       text__lora_alpha=8.0, text__lora_dropout=0.1, train__steps=12, train__lr=5e-3,
                       train__warmup_steps=2, train__log_every=2, train__eval_every=3, train__eval_samples=40,
                       train__keep_best="mean_recall", train__checkpoint_every=6, train__keep_checkpoints=1,
                       train__threads=0, **changes)


def _log(run_dir: Path) -> list[dict]:
    return [json.loads(line) for line in (run_dir / A.METRICS_LOG).read_text().splitlines()]


@pytest.fixture(scope="module")
def validated_runs(small_digits_shards, tmp_path_factory):
    """One run trained straight through and one cut at step 6 and resumed; the first is evaluated."""
    root = tmp_path_factory.mktemp("validating")
    recipe = _validating_recipe(small_digits_shards)
    train(recipe, root / "whole")
    summary = train(recipe, root / "cut", on_step=lambda record: record["step"] < 6)
    assert summary["stopped_early"] and latest_checkpoint(root / "cut").name == "step-000006"
    train(recipe, root / "cut", resume=True)
    evaluate_run(root / "whole")
    return root / "whole", root / "cut"


def test_a_resumed_run_with_validation_equals_the_uninterrupted_one(validated_runs):
    whole, cut = validated_runs
    a, b = load_weights(latest_checkpoint(whole)), load_weights(latest_checkpoint(cut))
    assert a.keys() == b.keys()
    different = [k for k in a if not torch.equal(a[k], b[k])]
    assert not different, f"{len(different)} tensors differ, e.g. {different[0]}"  # bit for bit (CPU, same seed)

    log_whole, log_cut = _log(whole), _log(cut)
    # a line per logged step (every 2) and per validation (every 3), validations carry val/ keys
    assert [r["step"] for r in log_whole] == [2, 3, 4, 6, 8, 9, 10, 12]
    assert [r["step"] for r in log_whole if "val/mean_recall" in r] == [3, 6, 9, 12]
    strip = lambda r: {k: v for k, v in r.items() if k not in TIMING}  # noqa: E731
    assert [strip(r) for r in log_whole] == [strip(r) for r in log_cut]  # losses and recalls, exactly
    for record in log_whole:
        for key in (k for k in record if k.startswith("val/")):
            assert 0.0 <= record[key] <= 1.0


def test_the_best_checkpoint_is_the_best_logged_step_and_evaluate_uses_it(validated_runs):
    whole, cut = validated_runs
    log = _log(whole)
    logged = [(r["val/mean_recall"], -r["step"]) for r in log if "val/mean_recall" in r]
    best_step = -max(logged)[1]  # the highest recall; among equals, the earliest step
    for run_dir in (whole, cut):
        run = RunDir(run_dir)
        assert run.default_checkpoint().path.name == f"step-{best_step:06d}"
        # keep_checkpoints = 1 keeps the newest; the best is kept beside it
        names = [p.name for p in list_checkpoints(run_dir)]
        assert names == sorted({f"step-{best_step:06d}", "step-000012"})
    metrics = json.loads((whole / A.METRICS).read_text())
    assert metrics["checkpoint"] == f"step-{best_step:06d}"
    assert "best by val/mean_recall" in metrics["checkpoint_choice"]


# --------------------------------------------------------------------------------------------
# the report and the comparison


@pytest.mark.skipif(chromium() is None, reason="needs Debian's chromium package (.ci/run installs it)")
def test_the_report_opens_offline_in_chromium_with_curves_fields_and_gallery(validated_runs, tmp_path):
    whole, _ = validated_runs
    report = whole / A.REPORT
    assert report.is_file()
    for name in (A.PLOT_TRAINING, A.PLOT_VALIDATION, A.PLOT_RECALL, A.PLOT_FIELDS,
                 A.PLOT_CONFUSION.format(field="digit")):
        assert (whole / A.PLOTS / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", name
    browser = Browser(tmp_path / "chromium", width=1280, height=2400)
    try:
        browser.call("Runtime.enable")
        browser.call("Log.enable")
        browser.goto(report.resolve().as_uri())
        browser.wait_for("[...document.images].every(i => i.complete)", 30, "every image decoded")
        page = browser.evaluate("""(() => {
            const shown = id => { const i = document.getElementById(id); return !!i && i.naturalWidth > 0; };
            const rows = [...document.querySelectorAll('.gallery-row')];
            return {training: shown('training-curves'), validation: shown('validation-curves'),
                    recall: shown('recall-plot'), confusion: shown('confusion-digit'),
                    fields: [...document.querySelectorAll('#fields-table tbody tr')].map(r => r.cells[0].textContent),
                    gallery: rows.length,
                    thumbs: rows.length ? [...rows[0].querySelectorAll('figure img')].filter(i => i.naturalWidth > 0).length : 0,
                    marks: document.querySelectorAll('#gallery figure.hit, #gallery figure.miss').length,
                    intervals: document.querySelectorAll('table.recall td.num').length,
                    scripts: document.scripts.length}; })()""")
        assert page["training"] and page["validation"] and page["recall"] and page["confusion"], page
        assert page["fields"] == ["digit"], page
        assert page["gallery"] >= 1 and page["thumbs"] == 5 and page["marks"] >= 5, page
        assert page["intervals"] >= 6 and page["scripts"] == 0, page
        SCREENSHOT.parent.mkdir(parents=True, exist_ok=True)
        browser.screenshot(SCREENSHOT)
        sent, errors = browser.drain()
        urls = [request["url"] for request in sent]
    finally:
        browser.close()
    assert not errors, errors
    assert urls and all(u.startswith(("file://", "data:")) for u in urls), [u[:80] for u in urls]
    image = SCREENSHOT.read_bytes()
    assert image[:8] == b"\x89PNG\r\n\x1a\n" and len(image) > 20_000


def test_align_report_rebuilds_the_page_without_a_model(validated_runs, tmp_path):
    whole, _ = validated_runs
    copy = tmp_path / "run"
    shutil.copytree(whole, copy)
    (copy / A.REPORT).unlink()
    shutil.rmtree(copy / A.PLOTS)
    assert cli_main(["report", str(copy)]) == 0
    text = (copy / A.REPORT).read_text()
    assert "gallery-row" in text and "http://" not in text and "https://" not in text
    assert (copy / A.PLOTS / A.PLOT_TRAINING).is_file()


def test_align_compare_tables_differences_with_intervals(validated_runs, tiny_lora_run, tmp_path):
    whole, _ = validated_runs
    out = tmp_path / "compare"
    assert cli_main(["compare", str(whole), str(tiny_lora_run.run), "--out", str(out)]) == 0
    table = (out / A.COMPARE_TABLE).read_text()
    data = json.loads((out / A.COMPARE_JSON).read_text())
    fields = {row["row"] for row in data["rows"] if row["kind"] == "recipe"}
    assert {"train.eval_every", "train.keep_best", "text.lora_dropout"} <= fields
    recall_rows = [row for row in data["rows"] if "intervals" in row]
    assert {row["row"] for row in recall_rows} >= {"text_to_image_recall@1", "image_to_text_recall@1"}
    for row in recall_rows:
        first, other = row["intervals"]
        overlap = other["low"] <= first["high"] and first["low"] <= other["high"]
        label = "inside the intervals" if overlap else "beyond the intervals"
        assert label in row["against_first"][1] and label in table
    assert (out / A.COMPARE_PLOT).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
