"""Hand-off in the formats retrieval stacks load, each read by that format's own library.

References outside align: sentence-transformers' own ``SentenceTransformer`` loader reads the export's
sentence-embedding folder (module types, dense layer and tokenizer inspected through the library's
objects); pyarrow alone reads the Parquet gallery; filtered search is checked against a numpy
reference written here (mask, then a stable argsort of float64 scores) and faiss' own IDSelector;
recall@10 of the approximate index is measured against that reference; the README's hand-off
snippets are run as written against a real export and compared with align's own answers.

Tiny towers (tests/recipes.py) on the session's 300 small digits; one run per kind and vocabulary,
trained when a test first asks for it and shared by the module.
"""
from __future__ import annotations

import hashlib
import json
import re
import shutil
import time
from pathlib import Path

import numpy as np
import pytest
import torch

from align import artifacts as A
from align.api import load
from align.cli import main as cli_main
from align.data.shards import iter_images, load_table
from align.errors import AlignError
from align.index import (GalleryIndex, LabelTable, build_approximate, faiss_flat_index, load_index, query_answer,
                         recall_at_k, top_k_faiss, top_k_numpy)
from align.training import train
from recipes import tiny_recipe

README = Path(__file__).resolve().parent.parent / "README.md"
KINDS = [("lora", False), ("lora", True), ("full", False), ("full", True), ("scratch", False), ("scratch", True)]
NEW_TERMS = ["handwritten", "scanned"]  # words of the digit captions, added as whole tokens
README_QUERY = "a cobalt herringbone tile"  # the text the README's snippets embed


@pytest.fixture(scope="module")
def exports(tiny_lora_run, small_digits_shards, tmp_path_factory):
    """export(kind, vocab): a trained and exported tiny run. The plain LoRA one is the session's shared
    run (with ONNX, 64 px images); the others are trained here, exported without ONNX (not read here)."""
    root = tmp_path_factory.mktemp("handoff")
    made: dict = {("lora", False): tiny_lora_run.export}

    def export(kind: str, vocab: bool) -> Path:
        if (kind, vocab) not in made:
            name = f"{kind}-vocab" if vocab else kind
            changes = {"text__new_tokens": NEW_TERMS} if vocab else {}
            train(tiny_recipe(small_digits_shards, kind, name=name, **changes), root / f"run-{name}")
            assert cli_main(["export", str(root / f"run-{name}"), "--out", str(root / f"export-{name}"),
                             "--no-onnx"]) == 0
            made[kind, vocab] = root / f"export-{name}"
        return made[kind, vocab]
    return export


@pytest.fixture(scope="module")
def gallery(exports, small_digits_shards, tmp_path_factory):
    """The small digits indexed for the LoRA export, every form written and the approximate index forced."""
    out = tmp_path_factory.mktemp("handoff-index") / "index"
    assert cli_main(["index", str(exports("lora", False)), str(small_digits_shards), "--out", str(out),
                     "--ann", "yes"]) == 0
    return out


def _labels_by_key(shards) -> dict[str, tuple[str, dict]]:
    out = {}
    for split in ("train", "val"):
        table = load_table(shards, split)
        out.update(zip(table.keys, zip(table.captions, table.labels)))
    return out


# ---------------------------------------------------------------------------------------------
# the sentence-embedding folder


@pytest.mark.parametrize("kind,vocab", KINDS, ids=[f"{k}{'-vocab' if v else ''}" for k, v in KINDS])
def test_sentence_transformers_loads_the_export(exports, small_digits_shards, kind, vocab):
    from sentence_transformers import SentenceTransformer

    export = exports(kind, vocab)
    captions = load_table(small_digits_shards, "val").captions  # the run's own captions
    model = SentenceTransformer(str(export / A.EXPORT_TEXT_ENCODER), device="cpu", local_files_only=True)
    assert [type(m).__name__ for m in model] == ["Transformer", "Pooling", "Dense", "Normalize"]
    dense = model[2]
    assert dense.linear.bias is None and isinstance(dense.activation_function, torch.nn.Identity)
    if vocab:  # the extended tokenizer came along: each added term is one token
        assert all(model.tokenizer.tokenize(term) == [term] for term in NEW_TERMS)
    theirs = model.encode(captions, convert_to_numpy=True, show_progress_bar=False)  # (N, D)
    ours = load(export, image_tower=False).embed_text(captions)
    assert theirs.shape == ours.shape == (len(captions), 1280)
    assert float(np.abs(theirs - ours).max()) <= 1e-5
    info = json.loads((export / A.EXPORT_INFO).read_text())
    assert info["parts"]["sentence_model"] == A.EXPORT_TEXT_ENCODER
    assert info["checks"]["sentence_model_max_abs_diff"] <= 1e-4  # the export ran the same check


# ---------------------------------------------------------------------------------------------
# Parquet


def test_parquet_gallery_reads_back_with_pyarrow_alone(gallery, exports, small_digits_shards):
    import pyarrow.parquet as pq

    table = pq.read_table(gallery / A.INDEX_PARQUET)
    keys = table.column("key").to_pylist()
    vector = table.column("vector").combine_chunks()
    vectors = vector.flatten().to_numpy().reshape(len(keys), vector.type.list_size)  # (N, D)
    assert str(vector.type.value_type) == "float"  # float32
    assert keys == (gallery / A.INDEX_KEYS).read_text().splitlines()
    stored = np.load(gallery / A.INDEX_EMBEDDINGS)
    assert vectors.dtype == np.float32 and vectors.tobytes() == stored.tobytes()  # bit for bit
    meta = table.schema.metadata
    info = json.loads((gallery / A.INDEX_INFO).read_text())
    assert json.loads(meta[b"align.image_fingerprint"]) == info["image_fingerprint"]
    side = json.loads((exports("lora", False) / A.IMAGE_SIDE).read_text())
    assert json.loads(meta[b"align.image_fingerprint"])["weights_sha256"] == side["weights_sha256"]
    export = json.loads(meta[b"align.export"])
    assert export["export_json_sha256"] == hashlib.sha256(
        (exports("lora", False) / A.EXPORT_INFO).read_bytes()).hexdigest()
    truth = _labels_by_key(small_digits_shards)
    assert table.column("caption").to_pylist() == [truth[k][0] for k in keys]
    assert table.column("digit").to_pylist() == [truth[k][1]["digit"] for k in keys]


def test_parquet_only_index_answers_as_the_full_one(gallery, exports, small_digits_shards, tmp_path, capsys):
    out = tmp_path / "parquet-only"
    assert cli_main(["index", str(exports("lora", False)), str(small_digits_shards), "--out", str(out),
                     "--format", "parquet", "--ann", "no"]) == 0
    assert not (out / A.INDEX_EMBEDDINGS).exists() and not (out / A.INDEX_KEYS).exists()
    capsys.readouterr()
    answers = []
    for index in (gallery, out):
        assert cli_main(["query", str(index), "a handwritten seven", "-k", "5", "--exact", "--json"]) == 0
        answers.append(json.loads(capsys.readouterr().out)["queries"])
    assert answers[0] == answers[1]


# ---------------------------------------------------------------------------------------------
# filters


def _reference_filtered(gallery: np.ndarray, queries: np.ndarray, keep: np.ndarray, k: int) -> np.ndarray:
    """Mask, then a stable argsort of float64 scores (ties by row): the rows a filtered search must give."""
    rows = np.flatnonzero(keep)
    scores = queries.astype(np.float64) @ gallery[rows].astype(np.float64).T  # (Q, M)
    return rows[np.argsort(-scores, axis=1, kind="stable")[:, :k]]


def _random_gallery(rows: int, dim: int, seed: int):
    rng = np.random.default_rng(seed)
    gallery = rng.standard_normal((rows, dim)).astype(np.float32)
    gallery /= np.linalg.norm(gallery, axis=1, keepdims=True)
    glazes, patterns = ["cobalt", "ochre", "sage", "white", "black"], ["chevron", "herringbone", "hex", "plain"]
    labels = [{"glaze": glazes[rng.integers(5)], **({"pattern": patterns[rng.integers(4)]} if rng.random() < 0.8 else {})}
              for _ in range(rows)]
    return rng, gallery, labels


def test_exact_filtered_search_equals_numpy_reference():
    rng, gallery, labels = _random_gallery(3000, 32, seed=3)
    queries = rng.standard_normal((12, 32)).astype(np.float32)
    queries /= np.linalg.norm(queries, axis=1, keepdims=True)
    where = {"glaze": ["cobalt"], "pattern": ["chevron", "herringbone"]}
    keep = np.array([lab["glaze"] == "cobalt" and lab.get("pattern") in ("chevron", "herringbone") for lab in labels])
    table = LabelTable.from_rows(labels)
    assert np.array_equal(table.mask(where), keep)
    expected = _reference_filtered(gallery, queries, keep, 10)
    assert np.array_equal(top_k_numpy(gallery, queries, 10, keep)[1], expected)
    assert np.array_equal(top_k_faiss(faiss_flat_index(gallery), queries, 10, keep)[1], expected)
    keys = [f"tile-{i:05d}" for i in range(len(gallery))]
    index = GalleryIndex(Path("in-memory"), {"count": len(keys)}, keys, gallery, table)
    for backend in ("numpy", "faiss"):
        answer = query_answer(index, ["q"] * len(queries), queries, 10, backend, time.perf_counter(), {},
                              where={"glaze": "cobalt", "pattern": ["chevron", "herringbone"]})
        assert answer["filter"]["matching"] == int(keep.sum())
        assert [[keys.index(r["key"]) for r in q["results"]] for q in answer["queries"]] == expected.tolist()
    # fewer matching rows than k: all of them, ranked; none matching: empty results
    few = np.zeros(len(gallery), bool)
    few[[5, 77, 1200]] = True
    assert np.array_equal(top_k_numpy(gallery, queries, 10, few)[1], _reference_filtered(gallery, queries, few, 10))
    answer = query_answer(index, ["q"], queries[:1], 5, "numpy", time.perf_counter(), {}, where={"glaze": "mauve"})
    assert answer["filter"]["matching"] == 0 and answer["queries"][0]["results"] == []
    with pytest.raises(AlignError, match="no label field 'size'"):
        query_answer(index, ["q"], queries[:1], 5, "numpy", time.perf_counter(), {}, where={"size": "large"})


# ---------------------------------------------------------------------------------------------
# the approximate index


def test_approximate_index_recall_on_100k_seeded_vectors():
    """Isotropic Gaussian rows are the hardest case for an inverted file (no clusters to exploit); 64
    dimensions keep the build, the tuning and the numpy reference within a few seconds on 2 cores."""
    rng, gallery, labels = _random_gallery(100_000, 64, seed=11)
    queries = rng.standard_normal((600, 64)).astype(np.float32)
    queries /= np.linalg.norm(queries, axis=1, keepdims=True)
    index, report = build_approximate(gallery, queries[:200], queries[200:400])
    assert report["recall_at_10"] >= 0.95 and report["nprobe"] <= report["nlist"]
    fresh = queries[400:]  # neither tuned on nor reported: measured here against the numpy reference
    scores, rows = index.search(gallery, fresh, 10)
    truth = _reference_filtered(gallery, fresh, np.ones(len(gallery), bool), 10)
    recall = recall_at_k(rows, truth)
    print(f"approximate index, 100k x 64: nprobe {report['nprobe']} of {report['nlist']}, recall@10 {recall:.3f}, "
          f"built in {report['build_seconds']}s")
    assert recall >= 0.95
    exact = np.take_along_axis(fresh @ gallery.T, rows, axis=1)
    assert np.allclose(scores, exact, atol=1e-5)  # the scores returned are exact inner products
    # a filter keeps only matching rows, at the same recall
    keep = np.array([lab["glaze"] == "ochre" for lab in labels])
    _, filtered = index.search(gallery, fresh, 10, allowed=keep)
    assert keep[filtered].all()
    assert recall_at_k(filtered, _reference_filtered(gallery, fresh, keep, 10)) >= 0.95


def test_query_reads_the_approximate_index_from_disk(gallery, monkeypatch, capsys):
    import align.index.ann as ann

    info = json.loads((gallery / A.INDEX_INFO).read_text())
    report = info["approximate"]
    assert (gallery / A.INDEX_ANN).is_file() and report["recall_at_10"] >= 0.95
    assert report["build_seconds"] >= 0 and report["held_queries"] > 0

    def never(*_a, **_k):
        raise AssertionError("a query must load the saved index, not build one")

    monkeypatch.setattr(ann, "build_ivf", never)
    capsys.readouterr()
    answers = {}
    for flag in ("--backend=ann", "--exact"):
        assert cli_main(["query", str(gallery), "a handwritten seven", "-k", "5", "--json", flag]) == 0
        answers[flag] = json.loads(capsys.readouterr().out)
    assert answers["--backend=ann"]["backend"] == "ann" and answers["--exact"]["backend"] == "numpy"
    exact = {r["key"]: r["score"] for r in answers["--exact"]["queries"][0]["results"]}
    found = answers["--backend=ann"]["queries"][0]["results"]
    shared = [r for r in found if r["key"] in exact]
    assert len(found) == 5 and len(shared) >= 4  # recall@5 of one query, allowed one miss
    assert all(abs(r["score"] - exact[r["key"]]) <= 1e-6 for r in shared)  # re-scored: exact inner products


def test_filtered_query_on_a_real_index(gallery, exports, small_digits_shards, capsys):
    truth = _labels_by_key(small_digits_shards)
    index = load_index(gallery)
    text = "the digit seven written by hand"
    query = load(exports("lora", False), image_tower=False).embed_text([text])  # (1, D)
    keep = np.array([truth[k][1]["digit"] in ("seven", "one") for k in index.keys])
    expected = [index.keys[r] for r in _reference_filtered(np.asarray(index.embeddings), query, keep, 8)[0]]
    capsys.readouterr()
    for backend in ("numpy", "faiss", "ann"):
        assert cli_main(["query", str(gallery), text, "-k", "8", "--json", "--backend", backend,
                         "--where", "digit=seven", "--where", "digit=one"]) == 0
        answer = json.loads(capsys.readouterr().out)
        assert answer["filter"] == {"where": {"digit": ["seven", "one"]}, "matching": int(keep.sum())}
        assert [r["key"] for r in answer["queries"][0]["results"]] == expected, backend


def test_service_search_body_filters(gallery, exports, tmp_path):
    from align.service.app import SearchRequest
    from align.service.home import Home
    from align.service.search import ExportCache

    home = Home(tmp_path / "home")
    shutil.copytree(exports("lora", False), home.exports / "digits")
    shutil.copytree(gallery, home.indexes / "digits")
    body = SearchRequest(texts=["a handwritten four"], k=6, where={"digit": "four"})
    answer = ExportCache(home).search("digits", body.texts, body.k, body.backend, body.where)
    keys = [r["key"] for r in answer["queries"][0]["results"]]
    digits = {k: lab["digit"] for k, (_, lab) in _labels_by_key(json.loads(
        (gallery / A.INDEX_INFO).read_text())["source"]).items()}
    assert len(keys) == 6 and {digits[k] for k in keys} == {"four"}
    assert answer["filter"]["where"] == {"digit": ["four"]}


# ---------------------------------------------------------------------------------------------
# the README


def _handoff_snippets() -> list[str]:
    section = README.read_text(encoding="utf-8").split("## Hand-off to retrieval", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```python\n(.*?)```", section, flags=re.S)


def test_readme_handoff_snippets_run(exports, gallery, small_digits_shards, tmp_path, monkeypatch, capsys):
    """Every python block of the README's hand-off section, run in order as written (one namespace, as a
    reader pastes them), in a folder where exports/mine and gallery/ are a real export and index."""
    export = exports("lora", False)
    (tmp_path / "exports").mkdir()
    (tmp_path / "exports" / "mine").symlink_to(export)
    (tmp_path / "gallery").symlink_to(gallery)
    _, image = next(iter_images(small_digits_shards, "val"))
    image.save(tmp_path / "tile.png")
    monkeypatch.chdir(tmp_path)
    snippets = _handoff_snippets()
    assert len(snippets) >= 7
    namespace: dict = {}
    for code in snippets:
        exec(compile(code, str(README), "exec"), namespace)  # noqa: S102 - the README's own code

    model = load(export)
    ours = model.embed_text([README_QUERY])  # (1, D)
    for name, tolerance in (("text", 1e-5), ("text_st", 1e-5), ("text_adapter", 1e-4), ("text_onnx", 1e-4)):
        value = np.asarray(namespace[name])
        assert value.shape == ours.shape and float(np.abs(value - ours).max()) <= tolerance, name
    image_ours = model.embed_images([tmp_path / "tile.png"])
    assert float(np.abs(namespace["image_embedding"].numpy() - image_ours).max()) <= 1e-5
    index = load_index(gallery)
    assert namespace["keys"] == index.keys and np.array_equal(namespace["vectors"], index.embeddings)
    assert namespace["fingerprint"] == index.info["image_fingerprint"]
    capsys.readouterr()
    assert cli_main(["query", str(gallery), README_QUERY, "-k", "10", "--backend", "ann", "--json"]) == 0
    answer = json.loads(capsys.readouterr().out)
    assert namespace["nearest"] == [r["key"] for r in answer["queries"][0]["results"]]
