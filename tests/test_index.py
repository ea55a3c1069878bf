"""align index / query on the demo gallery, exact search backends, and adopting stored embeddings.

References outside align: the top-k is checked against a full stable numpy argsort written here and
against faiss' IndexFlatIP; the demo check reads the ground truth from the labels pack wrote (filtered
queries too: mask, then a stable argsort); the "other tower" embeddings come from timm directly. A small demo-like run (LoRA on the offline
MiniLM, 96 px tiles, 60 steps) is trained once for the module.
"""
from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch

from align import artifacts as A
from align.cli import main as cli_main
from align.data.demo import GLAZES, HELDOUT_PAIRS, PATTERNS, caption_for, write_catalogue
from align.data.pack import pack_source
from align.data.shards import load_table
from align.errors import FingerprintMismatch
from align.index import build_index, faiss_flat_index, load_index, top_k_faiss, top_k_numpy
from align.recipe import load_recipe
from align.training import train

DEMO_RECIPE = Path(__file__).resolve().parent.parent / "recipes" / "demo-cpu.toml"
# a quick trial of exactly this set-up (4 tiles per pair, 96 px, 60 steps of 64) ranked the right
# glaze x pattern first for 0.92 of held-in captions; the issue asks for at least 0.80
DEMO_OVERRIDES = ["vision.image_size=96", "train.steps=60", "train.batch_size=64", "train.warmup_steps=10",
                  "train.checkpoint_every=0", "text.max_length=32"]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo-gallery")
    write_catalogue(root / "drawn", per_pair=4, size=96, seed=0, workers=1)
    pack_source(root / "drawn" / "catalogue", root / "shards", val_fraction=0.15)
    recipe = load_recipe(DEMO_RECIPE, [f"data.shards={json.dumps(str(root / 'shards'))}", *DEMO_OVERRIDES])
    train(recipe, root / "run")
    assert cli_main(["export", str(root / "run"), "--out", str(root / "export")]) == 0
    assert cli_main(["index", str(root / "export"), str(root / "shards"), "--out", str(root / "index")]) == 0
    return root


def _labels(shards) -> dict[str, tuple[str, str]]:
    out = {}
    for split in ("train", "val"):
        table = load_table(shards, split)
        out.update({k: (lab["glaze"], lab["pattern"]) for k, lab in zip(table.keys, table.labels)})
    return out


@pytest.mark.slow
def test_query_ranks_the_captioned_glaze_and_pattern_first(demo, capsys):
    held_in = [(g, p) for g in GLAZES for p in PATTERNS if (g, p) not in set(HELDOUT_PAIRS)]
    rng = np.random.default_rng(2024)  # fresh captions from the catalogue's own templates
    captions = [caption_for(g, p, rng) for g, p in held_in]
    capsys.readouterr()
    assert cli_main(["query", str(demo / "index"), *captions, "-k", "3", "--json"]) == 0
    answer = json.loads(capsys.readouterr().out)
    labels = _labels(demo / "shards")
    assert answer["gallery_size"] == len(labels)
    assert [q["text"] for q in answer["queries"]] == captions
    top1 = [labels[q["results"][0]["key"]] == pair for q, pair in zip(answer["queries"], held_in)]
    rate = float(np.mean(top1))
    print(f"demo gallery: top-1 is the captioned glaze x pattern for {rate:.3f} of {len(held_in)} captions")
    assert rate >= 0.80
    scores = [[r["score"] for r in q["results"]] for q in answer["queries"]]
    assert all(s == sorted(s, reverse=True) and len(s) == 3 for s in scores)


@pytest.mark.slow
def test_second_index_of_a_cached_gallery_runs_no_tower_pass(demo, tmp_path):
    info = json.loads((demo / "index" / A.INDEX_INFO).read_text())
    again = build_index(demo / "export", demo / "shards", tmp_path / "again")
    assert again["tower_forward_passes"] == 0  # every split came from the feature cache
    assert again["count"] == info["count"]
    a, b = np.load(demo / "index" / A.INDEX_EMBEDDINGS), np.load(tmp_path / "again" / A.INDEX_EMBEDDINGS)
    assert np.array_equal(a, b)


def _reference_top_k(gallery: np.ndarray, queries: np.ndarray, k: int):
    """Independent numpy: score everything, stable full sort (ties by row)."""
    scores = queries.astype(np.float64) @ gallery.astype(np.float64).T
    rows = np.argsort(-scores, axis=1, kind="stable")[:, :k]
    return np.take_along_axis(scores, rows, axis=1), rows


def test_numpy_and_faiss_return_the_same_top_k():
    rng = np.random.default_rng(0)
    gallery = rng.standard_normal((5000, 64)).astype(np.float32)
    gallery /= np.linalg.norm(gallery, axis=1, keepdims=True)
    queries = rng.standard_normal((25, 64)).astype(np.float32)
    queries /= np.linalg.norm(queries, axis=1, keepdims=True)
    ref_scores, ref_rows = _reference_top_k(gallery, queries, 10)
    np_scores, np_rows = top_k_numpy(gallery, queries, 10)
    fa_scores, fa_rows = top_k_faiss(faiss_flat_index(gallery), queries, 10)
    assert np.array_equal(np_rows, ref_rows) and np.array_equal(fa_rows, ref_rows)
    assert np.allclose(np_scores, ref_scores, atol=1e-5) and np.allclose(fa_scores, ref_scores, atol=1e-5)
    # k larger than the gallery returns the whole gallery, ranked
    small_scores, small_rows = top_k_numpy(gallery[:7], queries[:2], 10)
    assert small_rows.shape == (2, 7) and np.array_equal(small_rows, _reference_top_k(gallery[:7], queries[:2], 7)[1])


@pytest.mark.slow
def test_index_search_backends_agree_and_auto_switches(demo):
    index = load_index(demo / "index")
    rng = np.random.default_rng(1)
    queries = np.asarray(index.embeddings[rng.choice(len(index), 5, replace=False)]) + \
        0.05 * rng.standard_normal((5, index.embeddings.shape[1])).astype(np.float32)
    by_numpy, used_numpy = index.search(queries, k=5, backend="auto")
    by_faiss, used_faiss = index.search(queries, k=5, backend="auto", faiss_above=1)
    assert (used_numpy, used_faiss) == ("numpy", "faiss")
    assert [[r["key"] for r in q] for q in by_numpy] == [[r["key"] for r in q] for q in by_faiss]


@pytest.fixture(scope="module")
def folder_gallery(demo, tmp_path_factory):
    """40 demo tiles as a plain folder (keys are relative paths), indexed with the CLI."""
    root = tmp_path_factory.mktemp("folder-gallery")
    files = sorted((demo / "drawn" / "catalogue").glob("*.png"))[::12][:40]
    (root / "images" / "sub").mkdir(parents=True)
    for i, f in enumerate(files):
        shutil.copy(f, root / "images" / ("sub" if i % 2 else "") / f.name)
    (root / "images" / "broken.png").write_bytes(b"not a png")  # skipped, counted, reported
    assert cli_main(["index", str(demo / "export"), str(root / "images"), "--out", str(root / "index")]) == 0
    return root


@pytest.mark.slow
def test_folder_index_skips_broken_images(folder_gallery):
    info = json.loads((folder_gallery / "index" / A.INDEX_INFO).read_text())
    assert info["count"] == 40 and info["skipped"] == ["broken.png"] and info["source_kind"] == "folder"
    keys = (folder_gallery / "index" / A.INDEX_KEYS).read_text().splitlines()
    assert sum(k.startswith("sub/") for k in keys) == 20


def _adopt(demo, folder_gallery, out, embeddings, keys, capsys):
    np.save(out / "emb.npy", embeddings)
    (out / "keys.txt").write_text("".join(k + "\n" for k in keys))
    code = cli_main(["index", str(demo / "export"), str(folder_gallery / "images"), "--out", str(out / "index"),
                     "--embeddings", str(out / "emb.npy"), "--keys", str(out / "keys.txt")])
    return code, " ".join(capsys.readouterr().err.split())  # rich wraps long messages


@pytest.mark.slow
def test_adopting_the_towers_own_embeddings(demo, folder_gallery, tmp_path, capsys):
    own = load_index(folder_gallery / "index")
    raw = np.asarray(own.embeddings) * 3.0  # unnormalised, as a team may have stored pooled features
    keys = [k.rsplit(".", 1)[0] for k in own.keys]  # keys without the extension are matched too
    code, err = _adopt(demo, folder_gallery, tmp_path, raw, keys, capsys)
    assert code == 0, err
    adopted = load_index(tmp_path / "index")
    assert adopted.info["built"] == "adopted" and adopted.keys == keys
    assert np.allclose(adopted.embeddings, own.embeddings, atol=1e-6)


@pytest.mark.slow
def test_adopting_the_wrong_width_is_refused(demo, folder_gallery, tmp_path, capsys):
    own = load_index(folder_gallery / "index")
    code, err = _adopt(demo, folder_gallery, tmp_path, np.ones((len(own), 512), np.float32), own.keys, capsys)
    assert code == 2 and "512-wide" in err and "1280" in err
    assert not (tmp_path / "index").exists()


@pytest.mark.slow
def test_adopting_another_towers_embeddings_is_refused(demo, folder_gallery, tmp_path, capsys):
    import timm
    import timm.data
    from PIL import Image

    own = load_index(folder_gallery / "index")
    side = json.loads((demo / "export" / A.IMAGE_SIDE).read_text())
    torch.manual_seed(0)
    other = timm.create_model(side["model"], pretrained=False, num_classes=0).eval()  # same width, other weights
    transform = timm.data.create_transform(**side["preprocessing"], is_training=False)
    pixels = torch.stack([transform(Image.open(folder_gallery / "images" / k).convert("RGB")) for k in own.keys])
    with torch.no_grad():
        theirs = other(pixels).numpy()  # (40, 1280)
    code, err = _adopt(demo, folder_gallery, tmp_path, theirs, own.keys, capsys)
    assert code == 2 and "not this export's image tower's output" in err, err
    # the right embeddings under shuffled keys are refused the same way
    order = np.random.default_rng(0).permutation(len(own))
    code, err = _adopt(demo, folder_gallery, tmp_path, np.asarray(own.embeddings)[order], own.keys, capsys)
    assert code == 2 and "out of order" in err


@pytest.mark.slow
def test_query_refuses_an_index_of_another_tower(demo, tmp_path, capsys):
    copy = tmp_path / "index"
    shutil.copytree(demo / "index", copy)
    info = json.loads((copy / A.INDEX_INFO).read_text())
    info["image_fingerprint"]["weights_sha256"] = "0" * 64
    (copy / A.INDEX_INFO).write_text(json.dumps(info))
    assert cli_main(["query", str(copy), "a cobalt herringbone tile"]) == 2
    assert "another image tower" in " ".join(capsys.readouterr().err.split())
    with pytest.raises(FingerprintMismatch):
        from align.index import GallerySearch
        GallerySearch(copy)


@pytest.mark.slow
def test_filtered_query_on_the_demo_gallery(demo, capsys):
    from align.api import load

    labels = _labels(demo / "shards")
    index = load_index(demo / "index")
    glazes = list(GLAZES)
    glaze, patterns = glazes[0], list(PATTERNS[:2])
    keep = np.array([labels[k][0] == glaze and labels[k][1] in patterns for k in index.keys])
    text = caption_for(glazes[1], patterns[0], np.random.default_rng(5))  # another glaze: the filter decides
    query = load(demo / "export", image_tower=False).embed_text([text])  # (1, D)
    rows = np.flatnonzero(keep)
    scores = query.astype(np.float64) @ np.asarray(index.embeddings)[rows].astype(np.float64).T  # (1, M)
    expected = [index.keys[r] for r in rows[np.argsort(-scores[0], kind="stable")[:10]]]
    capsys.readouterr()
    where = ["--where", f"glaze={glaze}", "--where", f"pattern={patterns[0]}", "--where", f"pattern={patterns[1]}"]
    assert cli_main(["query", str(demo / "index"), text, "-k", "10", "--json", *where]) == 0
    answer = json.loads(capsys.readouterr().out)
    assert answer["filter"]["matching"] == int(keep.sum()) > 0
    assert [r["key"] for r in answer["queries"][0]["results"]] == expected and len(expected) == min(10, keep.sum())
    assert all(labels[r["key"]][0] == glaze for r in answer["queries"][0]["results"])


def test_bench_index_quick_mode_reports_its_figures(tmp_path):
    """tools/bench_index.py runs from a clean folder in its quick mode; its figures are finite and positive
    (latency targets are not asserted: they depend on the machine and its load)."""
    repo = Path(__file__).resolve().parent.parent
    done = subprocess.run([sys.executable, str(repo / "tools" / "bench_index.py"), "--quick", "--json", "--threads", "1",
                           "--out", str(tmp_path)], env=dict(os.environ, PYTHONPATH=str(repo)),
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    result = json.loads(done.stdout.strip().splitlines()[-1])
    for figures in result["latency"].values():
        assert all(math.isfinite(v) and v > 0 for v in figures.values())
    assert set(result["latency"]) == {"exact numpy", "exact faiss flat", "approximate"}
    assert 0.9 <= result["recall_at_10"] <= 1 and result["build"]["build_seconds"] > 0
    assert json.loads((tmp_path / "index_bench.json").read_text()) == result
    assert (tmp_path / "index_bench.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG spec, 5.2)
