"""Evaluation at scale: blocked recall over a run equals one block, the probe's bounded stratified
sample, and recall's memory staying flat however large the gallery.

References: scikit-learn's stratified split (class counts), the feature cache's own float32 reader
(``FeatureSet.embeddings``), the exact one-block evaluation (byte-equal metrics), and the process's
anonymous memory in /proc/self/status.
"""
from __future__ import annotations

import io
import json
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from rich.console import Console
from sklearn.model_selection import train_test_split

from align import artifacts as A
from align.evaluate import evaluate_run, unit_rows
from align.features import split_features
from align.metrics import stratified_sample
from align.run import RunDir, shards_dir

ROOT = Path(__file__).resolve().parents[1]


# ---------------------------------------------------------------------------------------------
# the probe's sample


def _uneven_labels(rng: np.random.Generator) -> np.ndarray:
    counts = {"chevron": 520, "terrazzo": 290, "pinstripe": 130, "herringbone": 41, "basketweave": 12,
              "fish_scale": 5, "hexagon": 2}
    return rng.permutation(np.repeat(list(counts), list(counts.values())))


def test_the_stratified_sample_keeps_each_class_share_and_repeats():
    labels = _uneven_labels(np.random.default_rng(0))                 # 1,000 rows, 7 classes
    picked = stratified_sample(labels, 100, seed=4)
    assert picked.size == 100 and np.unique(picked).size == 100 and (np.diff(picked) > 0).all()
    classes, counts = np.unique(labels, return_counts=True)
    got = dict(zip(*np.unique(labels[picked], return_counts=True)))
    # reference: scikit-learn's stratified split of the same size (its allocation is within one row
    # of each share too, ties drawn at random), and the share itself
    sk_rows, _ = train_test_split(np.arange(labels.size), train_size=100, stratify=labels, random_state=0)
    sk = dict(zip(*np.unique(labels[sk_rows], return_counts=True)))
    for name, count in zip(classes, counts):
        share = 100 * count / labels.size
        assert got[name] >= 1 and abs(got[name] - share) <= 1, (name, got[name], share)
        assert abs(got[name] - sk.get(name, 0)) <= 1   # scikit-learn may leave a rare class out
    np.testing.assert_array_equal(stratified_sample(labels, 100, seed=4), picked)   # seeded: repeatable
    assert not np.array_equal(stratified_sample(labels, 100, seed=5), picked)
    np.testing.assert_array_equal(stratified_sample(labels, 1000, seed=4), np.arange(1000))  # under the bound: all
    np.testing.assert_array_equal(stratified_sample(labels, 0, seed=4), np.arange(1000))     # 0 = every row
    with pytest.raises(ValueError, match="0 \\(every row\\) or positive"):
        stratified_sample(labels, -1, seed=0)


def test_a_sample_smaller_than_the_class_count_still_has_its_size():
    # 7 classes, 5 rows: not every class fits, the bound holds (common practice: the bound wins)
    labels = _uneven_labels(np.random.default_rng(1))
    assert stratified_sample(labels, 5, seed=0).size == 5


# ---------------------------------------------------------------------------------------------
# a run evaluated in blocks


def _evaluated_copy(source: Path, dest: Path, **eval_fields) -> tuple[dict, dict, str]:
    shutil.copytree(source, dest)
    run = RunDir(dest)
    recipe = run.recipe()
    for name, value in eval_fields.items():
        setattr(recipe.eval, name, value)
    run.write_recipe(recipe)
    out = io.StringIO()
    evaluate_run(dest, console=Console(file=out, width=140), report=False)
    return (json.loads((dest / A.METRICS).read_text()), json.loads((dest / A.EVALUATION_DETAILS).read_text())[""],
            out.getvalue())


@pytest.fixture(scope="module")
def one_block(tiny_lora_run, tmp_path_factory):
    return _evaluated_copy(tiny_lora_run.run, tmp_path_factory.mktemp("eval-one-block") / "run")


def test_a_run_evaluated_in_small_blocks_writes_the_same_metrics(tiny_lora_run, one_block, tmp_path):
    metrics, details, _ = one_block
    assert metrics["eval_pairs"] > 7 * 3                               # several blocks on each side at 7 rows
    blocked, blocked_details, _ = _evaluated_copy(tiny_lora_run.run, tmp_path / "run", block_rows=7)
    # reference: the same evaluation with every side in one block; byte-equal numbers
    assert blocked == metrics
    for part in ("recall", "fields", "examples"):
        assert blocked_details[part] == details[part]
    assert blocked_details["retrieval"] == {"method": "exact", "block_rows": 7}


def test_faiss_recall_and_a_bounded_probe_are_reported(tiny_lora_run, one_block, tmp_path):
    metrics, details, _ = one_block
    faiss, faiss_details, printed = _evaluated_copy(tiny_lora_run.run, tmp_path / "run", recall_method="faiss",
                                                    probe_rows=30, block_rows=16)
    recall_keys = [k for k in metrics if "_recall@" in k]
    assert recall_keys and {k: faiss[k] for k in recall_keys} == {k: metrics[k] for k in recall_keys}
    assert faiss["zero_shot_accuracy/digit"] == metrics["zero_shot_accuracy/digit"]
    assert faiss_details["retrieval"]["method"] == "faiss" and faiss_details["retrieval"]["ranks_at_most"] == 10
    # the probe fit on 30 of the training rows, stratified over the ten digits; all rows by default
    recipe = RunDir(tiny_lora_run.run).recipe()
    train_rows = len(split_features(recipe.vision, shards_dir(recipe), recipe.data.train_split,
                                    Console(file=io.StringIO())).features.keys)
    assert faiss["linear_probe_rows/digit"] == 30 and metrics["linear_probe_rows/digit"] == train_rows > 30
    assert "probe rows" in printed and " 30 " in printed


def test_gathered_unit_rows_equal_the_cache_reader(tiny_lora_run):
    recipe = RunDir(tiny_lora_run.run).recipe()
    feats = split_features(recipe.vision, shards_dir(recipe), recipe.data.eval_split, Console(file=io.StringIO())).features
    # reference: FeatureSet.embeddings, the whole view normalised at once; blocks of 5, bit for bit
    np.testing.assert_array_equal(unit_rows(feats, np.arange(len(feats.keys)), 5), feats.embeddings.numpy())
    picked = np.array([3, 0, 11, 7])
    np.testing.assert_array_equal(unit_rows(feats, picked, 3), feats.embeddings.numpy()[picked])


# ---------------------------------------------------------------------------------------------
# memory


def test_recall_over_a_large_gallery_holds_bounded_anonymous_memory():
    # 1,000 captions against 200,000 images: one (1000, 200000) float32 score matrix would be 800 MB
    # (plus its masked copy); in 4096-row blocks the scores never exceed (4096, 1000) = 16 MB
    script = textwrap.dedent("""
        import json, threading, time
        import numpy as np
        from align.metrics import retrieval_ranks

        def anon():
            for line in open("/proc/self/status"):
                if line.startswith("RssAnon:"):
                    return int(line.split()[1]) * 1024

        rng = np.random.default_rng(0)
        image = rng.standard_normal((200_000, 64), dtype=np.float32)
        image /= np.linalg.norm(image, axis=1, keepdims=True)
        pairs = rng.integers(0, 200_000, 1_000)
        text = image[pairs] + 0.5 * rng.standard_normal((1_000, 64), dtype=np.float32)
        text /= np.linalg.norm(text, axis=1, keepdims=True)
        before, peak, done = anon(), [0], threading.Event()

        def watch():
            while not done.is_set():
                peak[0] = max(peak[0], anon())
                time.sleep(0.001)

        watcher = threading.Thread(target=watch)
        watcher.start()
        ranks = retrieval_ranks(text, image, pairs, query_block=4096)
        done.set()
        watcher.join()
        peak[0] = max(peak[0], anon())
        print(json.dumps({"grown": peak[0] - before, "scored": int((ranks["text_to_image"] >= 0).sum())}))
    """)
    env = dict(os.environ, PYTHONPATH=str(ROOT), OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    out = subprocess.run([sys.executable, "-c", script], env=env, cwd=ROOT, capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == 0, out.stderr[-3000:]
    measured = json.loads(out.stdout.strip().splitlines()[-1])
    assert measured["scored"] == 1_000
    print(f"anonymous memory grown by {measured['grown'] / 2**20:.1f} MiB over a 200,000-image gallery")
    # a few blocks of scores and their temporaries; the unblocked matrix alone is 763 MiB
    assert measured["grown"] < 300 * 2**20, measured
