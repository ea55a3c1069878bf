"""The memory-mapped training table: every rank opens the same files, each step reads only its rows.

The reference throughout is the in-memory table align held before, rebuilt here the way it was
built: the float16 cache rows -> float32 -> L2-normalised over the whole table, captions and labels
from ``load_table``, ids from ``align.loss.positive_ids``, rows lined up by key. Training from the
mapped table must equal training from that one bit for bit (weights and every logged loss), in one
process and in two (a real gloo group started by torchrun, ``tests/distributed_worker.py``).
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from rich.console import Console

from align import artifacts as A
from align.checkpoint import latest_checkpoint, load_weights
from align.data.feature_entry import write_entry
from align.data.pack import pack_source
from align.data.shards import load_table
from align.features import load_feature_cache
from align.features.table import open_table, split_table, write_table
from align.loss import positive_ids
from align.offline import offline_env
from align.recipe import recipe_from_toml
from align.training import StepBatches, TrainingData, prepare_training_data, train
from align.training.data import view_batch
from recipes import tiny_toml

ROOT = Path(__file__).resolve().parent.parent
QUIET = Console(stderr=True, quiet=True)


class InMemoryTable:
    """The training table as align held it in every process before it was memory-mapped.

    Built as ``prepare_training_data`` built it; offers what ``train`` reads of a ``TrainingData``
    (rows by index straight from the in-memory tensors, as the old ``StepBatches`` indexed them)."""

    def __init__(self, shards: Path, split: str, feats, positives: str, tower_fingerprint: dict):
        table = load_table(shards, split)
        keep = set(feats.keys)
        rows = [i for i, k in enumerate(table.keys) if k in keep]  # images that failed to decode drop out
        self.keys = [table.keys[i] for i in rows]
        self.captions = [table.captions[i] for i in rows]
        labels = [table.labels[i] for i in rows]
        self.caption_ids, self.label_ids = positive_ids(self.captions, labels, positives)
        where = {k: i for i, k in enumerate(feats.keys)}
        index = torch.tensor([where[k] for k in self.keys], dtype=torch.long)
        whole = F.normalize(torch.from_numpy(np.asarray(feats.array[:, 0], dtype=np.float32)), dim=-1)  # (M, D)
        self.image_features = whole[index]  # (N, D)
        self.image_views = torch.from_numpy(np.array(feats.array))[index]  # (N, K, D) float16
        self.feature_dim, self.views = whole.shape[1], feats.views
        self.tower_fingerprint, self.validation, self.image_tower = tower_fingerprint, None, None

    def __len__(self) -> int:
        return len(self.captions)

    def ids(self, rows):
        return self.caption_ids[rows], (self.label_ids[rows] if self.label_ids is not None else None)

    def image_rows(self, rows):
        return self.image_features[rows]

    def stored_views(self, rows, views):
        return self.image_views[rows, views]


def in_memory(shards: Path, recipe, data: TrainingData) -> InMemoryTable:
    return InMemoryTable(shards, recipe.data.train_split, data.features, recipe.loss.positives, data.tower_fingerprint)


# ---------------------------------------------------------------------------------------------
# hand-made entries and tables (no tower)


def hand_made_entry(folder: Path, keys: list[str], rows: np.ndarray) -> Path:
    """A feature entry in the cache's own layout (align.data.feature_entry), rows (N, K, D) float16."""
    fingerprint = {"format_version": 1, "tower": {"source": "test", "feature_dim": rows.shape[2]},
                   "split": "train", "views": rows.shape[1]}
    write_entry(folder, fingerprint, keys, rows, [])
    return folder


def hand_made_data(root: Path, n: int = 12, dim: int = 4, views: int = 1, positives: str = "caption",
                   seed: int = 0) -> TrainingData:
    """n rows of random float16 features and captions 'caption i', as files: the table's real layout."""
    rng = np.random.default_rng(seed)
    entry = hand_made_entry(root / "entry", [f"k{i}" for i in range(n)],
                            rng.standard_normal((n, views, dim)).astype(np.float16))
    write_table(root / "table", ((f"caption {i}", {"digit": str(i % 3)}, i) for i in range(n)), {"test": True})
    return TrainingData(table=open_table(root / "table"), features=load_feature_cache(entry), positives=positives,
                        tower_fingerprint={})


def test_per_row_normalisation_equals_normalising_the_whole_table(tmp_path):
    # the in-memory table normalised all N rows at once; a step now normalises only its B rows.
    # Reference: the old whole-table computation; every row's numbers must be the same bits.
    rng = np.random.default_rng(1)
    rows = (rng.standard_normal((3000, 1, 384)) * rng.uniform(0.05, 4.0, (3000, 1, 1))).astype(np.float16)
    feats = load_feature_cache(hand_made_entry(tmp_path / "e", [f"k{i}" for i in range(3000)], rows))
    whole = F.normalize(torch.from_numpy(np.asarray(rows[:, 0], dtype=np.float32)), dim=-1)  # (N, D)
    for threads in (1, 2):
        before = torch.get_num_threads()
        torch.set_num_threads(threads)
        try:
            for size in (1, 7, 64, 1000):
                picked = rng.integers(0, 3000, size)
                assert torch.equal(feats.unit_rows(picked), whole[torch.from_numpy(picked)])
        finally:
            torch.set_num_threads(before)
    assert torch.equal(feats.embeddings, whole)


@pytest.mark.parametrize("views", [1, 3])
@pytest.mark.parametrize("positives", ["pair", "caption", "caption+labels"])
def test_steps_see_the_in_memory_tables_rows(tmp_path, views, positives):
    data = hand_made_data(tmp_path, n=40, dim=16, views=views, positives=positives)
    # the old table, built by hand: every row normalised at once, ids from align.loss.positive_ids
    old_features = F.normalize(torch.from_numpy(np.asarray(data.features.array[:, 0], dtype=np.float32)), dim=-1)
    old_views = torch.from_numpy(np.array(data.features.array))  # (N, K, D) float16
    captions = [f"caption {i}" for i in range(40)]
    caption_ids, label_ids = positive_ids(captions, [{"digit": str(i % 3)} for i in range(40)], positives)
    assert list(data.captions) == captions and data.captions[-1] == captions[-1]
    assert data.captions[3:6] == captions[3:6] and data.keys == [f"k{i}" for i in range(40)]
    batches = StepBatches(data, batch_size=16, seed=3, world=1, rank=0, device=torch.device("cpu"))
    for step in range(6):  # 96 positions over 40 rows: batches straddle epochs
        batch = batches.sampler.batch(step)
        got = batches(step)
        if views == 1:
            expected = old_features[batch]
        else:  # the old view_batch over the whole (N, K, D) table
            expected = view_batch(old_views, batch, batches.views.views_for(step, batch))
        assert torch.equal(got.image_features, expected)
        assert got.captions == [captions[i] for i in batch.tolist()]
        assert torch.equal(got.caption_ids, caption_ids[batch])
        assert (got.label_ids is None) == (label_ids is None)
        if label_ids is not None:
            assert torch.equal(got.label_ids, label_ids[batch])


def _one_process_recipe(shards: Path, **changes):
    toml = tiny_toml("lora", name="table", train__steps=3, train__warmup_steps=0, train__lr=1e-3,
                     train__log_every=1, **changes)
    return recipe_from_toml(toml, [f"data.shards={json.dumps(str(shards))}"])


def _losses(run: Path) -> list[float]:
    return [json.loads(line)["loss"] for line in (run / A.METRICS_LOG).read_text().splitlines()]


def _same_weights(a: dict, b: dict) -> bool:
    return a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)


def test_training_from_the_mapped_table_equals_the_in_memory_table(small_digits_shards, tmp_path):
    recipe = _one_process_recipe(small_digits_shards)
    data = prepare_training_data(recipe, QUIET)
    reference = in_memory(small_digits_shards, recipe, data)
    assert data.keys == reference.keys and list(data.captions) == reference.captions
    train(recipe, tmp_path / "mapped", console=QUIET, data=data)
    train(recipe, tmp_path / "in-memory", console=QUIET, data=reference)
    mapped, old = (load_weights(latest_checkpoint(tmp_path / r)) for r in ("mapped", "in-memory"))
    assert _same_weights(mapped, old)  # byte-equality with the in-memory path
    assert _losses(tmp_path / "mapped") == _losses(tmp_path / "in-memory") and len(_losses(tmp_path / "mapped")) == 3


@pytest.mark.slow
def test_two_processes_on_the_mapped_table_equal_one_on_the_in_memory_table(small_digits_shards, tmp_path):
    # whole-slice steps of a two-process run equal one process holding the batch in chunks of the
    # slices (tests/test_distributed.py); here the two ranks each open the mapped table by path
    world, batch = 2, 16
    toml = tiny_toml("lora", name="table-two", text__lora_dropout=0.1, train__steps=2, train__batch_size=batch,
                     train__chunk_size=0, train__length_buckets=False, train__lr=1e-3, train__warmup_steps=0)
    spec = {"shards": str(small_digits_shards), "out": str(tmp_path / "two"),
            "runs": [{"name": "two", "toml": toml, "cut_at": None}]}
    (tmp_path / "two").mkdir()
    (tmp_path / "spec.json").write_text(json.dumps(spec))
    env = offline_env(dict(os.environ, PYTHONPATH=str(ROOT), OMP_NUM_THREADS="1"))
    proc = subprocess.run([sys.executable, "-m", "torch.distributed.run", "--standalone", f"--nproc_per_node={world}",
                           str(ROOT / "tests" / "distributed_worker.py"), str(tmp_path / "spec.json")], env=env,
                          cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-6000:]
    reports = [json.loads((tmp_path / "two" / f"rank{r}.json").read_text()) for r in range(world)]
    assert reports[0]["features_sha256"] == reports[1]["features_sha256"] and reports[0]["keys"] == reports[1]["keys"]

    one = recipe_from_toml(toml.replace("chunk_size = 0", f"chunk_size = {batch // world}"),
                           [f"data.shards={json.dumps(str(small_digits_shards))}"])
    assert one.train.chunk_size == batch // world
    data = prepare_training_data(one, QUIET)
    reference = in_memory(small_digits_shards, one, data)
    assert reference.keys == reports[0]["keys"]
    threads = torch.get_num_threads()
    train(one, tmp_path / "one", console=QUIET, data=reference)
    torch.set_num_threads(threads)
    two = load_weights(latest_checkpoint(tmp_path / "two" / "two"))
    assert _same_weights(two, load_weights(latest_checkpoint(tmp_path / "one")))
    assert _losses(tmp_path / "two" / "two") == _losses(tmp_path / "one")


# ---------------------------------------------------------------------------------------------
# building the table


def _pack(root: Path, captions: dict[str, str]) -> Path:
    src = root / "src"
    src.mkdir(parents=True)
    for stem, caption in captions.items():
        _png(src / f"{stem}.png", stem)
        (src / f"{stem}.txt").write_text(caption)
        (src / f"{stem}.json").write_text(json.dumps({"shape": stem[:1]}))
    pack_source(src, root / "shards", val_fraction=0.0, console=QUIET)
    return root / "shards"


def _png(path: Path, stem: str) -> None:
    from PIL import Image

    shade = sum(map(ord, stem)) % 256
    Image.new("RGB", (8, 8), (shade, 255 - shade, 128)).save(path)


def _entry_for(shards: Path, root: Path, keys: list[str]) -> object:
    rng = np.random.default_rng(len(keys))
    return load_feature_cache(hand_made_entry(root, keys, rng.standard_normal((len(keys), 1, 8)).astype(np.float16)))


def test_table_rows_follow_the_feature_rows_in_any_order_and_a_repack_rebuilds_it(tmp_path):
    captions = {f"s{i:02d}": f"a {'red' if i % 2 else 'blue'} square number {i % 4}" for i in range(10)}
    shards = _pack(tmp_path / "a", captions)
    old = load_table(shards, "train")
    # images that failed to decode drop out (k03, k07), and an entry may list its keys in its own order
    kept = [k for k in old.keys if k not in (old.keys[3], old.keys[7])]
    for name, order in (("canonical", kept), ("reversed", kept[::-1])):
        feats = _entry_for(shards, tmp_path / "entries" / name, order)
        table = split_table(feats, shards, "train", tmp_path / "cache", QUIET)
        assert table.built and len(table) == 8
        # the old table: the split's rows in canonical order whose key has a feature row, found by key
        rows = [i for i, k in enumerate(old.keys) if k in set(order)]
        assert list(table.captions) == [old.captions[i] for i in rows]
        assert table.feature_rows.tolist() == [order.index(old.keys[i]) for i in rows]
        caption_ids, label_ids = positive_ids(list(table.captions), [old.labels[i] for i in rows], "caption+labels")
        assert table.caption_ids.tolist() == caption_ids.tolist() and table.label_ids.tolist() == label_ids.tolist()
        again = split_table(feats, shards, "train", tmp_path / "cache", QUIET)
        assert not again.built and again.path == table.path  # found complete: opened, not rebuilt

    # a damaged table (a column cut short) is rebuilt
    expected, path = table.caption_ids.tolist(), table.path
    del table, again  # their memory maps read the file about to be cut
    (path / A.TABLE_CAPTION_IDS).write_bytes(b"\0" * 8)
    rebuilt = split_table(feats, shards, "train", tmp_path / "cache", QUIET)
    assert rebuilt.built and rebuilt.path == path and rebuilt.caption_ids.tolist() == expected

    # a repack with other captions has another content hash: another table, with the new captions
    changed = dict(captions, s05="a green circle")
    repacked = _pack(tmp_path / "b", changed)
    feats = _entry_for(repacked, tmp_path / "entries" / "repacked", load_table(repacked, "train").keys)
    table_b = split_table(feats, repacked, "train", tmp_path / "cache", QUIET)
    assert table_b.built and table_b.path != path and "a green circle" in list(table_b.captions)
    tables = tmp_path / "cache" / A.TABLES
    assert not list(tables.glob(".*.partial")) and not list(tables.glob(".*.old"))  # no half-written folder left


def test_align_features_builds_the_table_training_opens(small_digits_shards, tmp_path, capsys):
    from align.cli import main

    recipe_file = tmp_path / "recipe.toml"
    recipe_file.write_text(tiny_toml("lora", name="prepared"))
    assert main(["features", str(recipe_file), "--set", f"data.shards={json.dumps(str(small_digits_shards))}"]) == 0
    said = "".join(capsys.readouterr().err.split())  # rich wraps long paths anywhere
    assert "trainingtable:" in said
    recipe = recipe_from_toml(recipe_file.read_text(), [f"data.shards={json.dumps(str(small_digits_shards))}"])
    data = prepare_training_data(recipe, QUIET)
    assert not data.table.built and data.table.path.name in said  # the prepared one, opened as it is


def test_a_process_opening_a_large_table_holds_little_anonymous_memory(tmp_path):
    # 200k rows of 256-d stored vectors: the in-memory table held them as float32 (200 MB) plus
    # 200k caption strings and label dicts per process; mapped, a few steps read only their rows
    n, dim = 200_000, 256
    entry = tmp_path / "entry"
    entry.mkdir()
    (entry / A.FINGERPRINT).write_text(json.dumps({"format_version": 1, "views": 1, "split": "train",
                                                   "tower": {"source": "stored", "feature_dim": dim}}))
    (entry / A.FEATURE_KEYS).write_text("".join(f"t{i:08d}\n" for i in range(n)))
    (entry / A.FEATURE_SKIPPED).write_text("")
    rows = np.memmap(entry / A.FEATURES, dtype=np.float16, mode="w+", shape=(n, 1, dim))
    rng = np.random.default_rng(0)
    for start in range(0, n, 50_000):
        rows[start:start + 50_000] = rng.standard_normal((50_000, 1, dim)).astype(np.float16)
    rows.flush()
    del rows
    write_table(tmp_path / "table", ((f"a glazed tile number {i}", {"glaze": str(i % 7)}, i) for i in range(n)), {})
    script = textwrap.dedent(f"""
        import json, torch
        from align.features import load_feature_cache
        from align.features.table import open_table
        from align.training import StepBatches, TrainingData

        def anon():
            for line in open("/proc/self/status"):
                if line.startswith("RssAnon:"):
                    return int(line.split()[1]) * 1024

        torch.set_num_threads(1)
        before = anon()
        data = TrainingData(table=open_table({str(tmp_path / "table")!r}), features=load_feature_cache({str(entry)!r}),
                            positives="caption+labels", tower_fingerprint={{}})
        batches = StepBatches(data, batch_size=256, seed=0, world=1, rank=0, device=torch.device("cpu"))
        seen = sum(len(batches(step).captions) for step in range(20))
        print(json.dumps({{"rows": len(data), "seen": seen, "grown": anon() - before}}))
    """)
    out = subprocess.run([sys.executable, "-c", script], env=dict(os.environ, PYTHONPATH=str(ROOT)), cwd=ROOT,
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr[-3000:]
    measured = json.loads(out.stdout.strip().splitlines()[-1])
    assert measured["rows"] == n and measured["seen"] == 20 * 256
    # the float32 table alone would be n * dim * 4 = 205 MB; the sampler's permutations of n rows
    # (2 x 1.6 MB) and the step's rows are what may grow
    print(f"anonymous memory grown by {measured['grown'] / 2**20:.1f} MiB for {n} rows")
    assert measured["grown"] < 24 * 2**20, measured
