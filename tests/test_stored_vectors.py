"""Stored vectors as the training targets: packed beside the shards as a feature-cache entry, used
with zero tower passes, bit for bit the same training as from the images, bad rows rejected and
counted, and vectors made another way refused by the consistency check."""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from rich.console import Console
from safetensors.torch import load_file

import align
from align import artifacts as A
from align.data.pack import pack_source
from align.data.vectors import VectorSource
from align.errors import AlignError, DataError
from align.evaluate import evaluate_run
from align.export import export_run
from align.index import build_index, query_index
from align.features import build_recipe_features, image_features, load_stored_features, split_features
from align.training import prepare_training_data, train
from align.vision import load_image_tower, shared_image_tower
from recipes import tiny_recipe

SIZE = 64  # at 32 px this tower pools the digits to almost nothing; 64 keeps every vector a direction
QUIET = Console(quiet=True)


def _write_table(path: Path, rows: list[dict]) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, list(rows[0]))
        writer.writeheader()
        writer.writerows(rows)
    return path


@pytest.fixture(scope="module")
def digits(small_digits_shards, tmp_path_factory):
    """The small digits as two tables (with images; captions and keys only) and, packed from the
    first, the tower's own features at SIZE px saved as stored vectors (.npy + keys)."""
    src = Path(small_digits_shards).parent / "src"  # conftest wrote the folder the shards came from
    root = tmp_path_factory.mktemp("stored")
    rows = []
    for image in sorted(src.glob("*.png")):
        label = json.loads(image.with_suffix(".json").read_text())["digit"]
        rows.append({"key": image.stem, "image": str(image), "caption": image.with_suffix(".txt").read_text(),
                     "digit": label})
    with_images = _write_table(root / "with_images.csv", rows)  # keyed like the captions table
    captions = _write_table(root / "captions.csv", [{"key": Path(r["image"]).stem, "caption": r["caption"],
                                                     "digit": r["digit"]} for r in rows])
    packed = root / "images"
    pack_source(with_images, packed, val_fraction=0.2, image_roots=[src], console=QUIET)
    cfg = tiny_recipe(packed, vision__image_size=SIZE).vision
    tower = load_image_tower(cfg)
    keys, vectors = [], []
    for split in ("train", "val"):
        feats = image_features(tower, packed, split, cfg, QUIET)
        keys += feats.keys
        vectors.append(np.asarray(feats.array[:, 0], dtype=np.float32))  # the cached rows, as a team would store them
    np.save(root / "vectors.npy", np.concatenate(vectors))
    (root / "keys.txt").write_text("".join(f"{k}.png\n" for k in keys))  # keys as image names: suffix dropped
    return {"root": root, "src": src, "with_images": with_images, "captions": captions, "packed_images": packed,
            "npy": VectorSource(root / "vectors.npy", "effnet-lite0@64px", keys=root / "keys.txt")}


def _entries(packed: Path) -> list[dict]:
    root = packed / A.FEATURE_ROOT
    # cache entries only: the training tables sit beside them in the same folder
    return ([json.loads((e / A.FINGERPRINT).read_text()) for e in sorted(root.iterdir()) if (e / A.FINGERPRINT).is_file()]
            if root.is_dir() else [])


@pytest.mark.slow
def test_training_from_stored_vectors_equals_training_from_images(digits, tmp_path):
    stored = tmp_path / "stored"
    manifest = pack_source(digits["captions"], stored, val_fraction=0.2, vectors=digits["npy"], console=QUIET)
    assert manifest["counts"]["rejected"] == 0 and manifest["vectors"]["model"] == "effnet-lite0@64px"
    assert all(not name.endswith((".png", ".jpg")) for name in _tar_names(stored))  # captions and vectors only

    from_images = tiny_recipe(digits["packed_images"], vision__image_size=SIZE, train__steps=4)
    from_vectors = tiny_recipe(stored, vision__source="stored", train__steps=4)
    train(from_images, tmp_path / "run-images", console=QUIET)
    train(from_vectors, tmp_path / "run-vectors", console=QUIET)
    weights = [load_file(str(sorted((tmp_path / run / A.CHECKPOINTS).iterdir())[-1] / A.TRAINABLE_WEIGHTS))
               for run in ("run-images", "run-vectors")]
    assert weights[0].keys() == weights[1].keys()
    assert all(weights[0][k].equal(weights[1][k]) for k in weights[0])  # bit for bit

    # zero tower passes: the stored folder holds only the packed entries, no tower cache was built
    evaluate_run(tmp_path / "run-vectors", console=QUIET, report=False)
    assert [e["tower"]["source"] for e in _entries(stored)] == ["stored", "stored"]

    info = export_run(tmp_path / "run-vectors", tmp_path / "export", onnx=False, console=QUIET)
    side = json.loads((tmp_path / "export" / A.IMAGE_SIDE).read_text())
    assert side["source"] == "stored" and side["model"] == "effnet-lite0@64px" and side["feature_dim"] == 1280
    assert side["stored_vectors"]["content_sha256"] == manifest["vectors"]["splits"]["train"]["content_sha256"]
    assert info["image_fingerprint"]["source"] == "stored"
    model = align.load(tmp_path / "export")  # text only: there is no tower to check
    assert model.embed_text(["a handwritten seven"]).shape == (1, 1280)
    with pytest.raises(AlignError, match="stored vectors"):
        model.embed_images([digits["src"] / "digit-0000.png"])

    # a gallery of stored vectors: indexed and searched with zero tower passes
    index = build_index(tmp_path / "export", stored, tmp_path / "index", fmt="npy", ann="no", console=QUIET)
    assert index["count"] == manifest["counts"]["packed"] and index["tower_forward_passes"] == 0
    assert index["image_fingerprint"]["source"] == "stored"
    answer = query_index(tmp_path / "index", ["a handwritten seven"], k=3)
    assert [r["rank"] for r in answer["queries"][0]["results"]] == [1, 2, 3]


def _tar_names(folder: Path) -> list[str]:
    import tarfile

    names = []
    for shard in folder.glob("*.tar"):
        with tarfile.open(shard) as tar:
            names += tar.getnames()
    return names


def test_bad_vectors_are_rejected_and_counted(digits, tmp_path):
    npy = np.load(digits["npy"].path)
    keys = [line[:-4] for line in digits["npy"].keys.read_text().splitlines()]
    vectors = [list(map(float, row)) for row in npy[:40]]
    table_keys = keys[:40]
    vectors[0] = vectors[0][:100]  # wrong width
    vectors[1][5] = float("nan")
    vectors[2][7] = float("inf")
    vectors += [vectors[3], [1.0] * 1280]  # key 3 twice; and a key no row has
    vector_keys = table_keys + [table_keys[3], "not-in-the-table"]
    del vectors[4], vector_keys[4]  # row 4 of the table gets no vector
    parquet = tmp_path / "vectors.parquet"
    pq.write_table(pa.table({"id": vector_keys, "embedding": vectors}), parquet)
    table = _write_table(tmp_path / "rows.csv", [r for r in _rows(digits["captions"]) if r["key"] in table_keys])

    source = VectorSource(parquet, "effnet-lite0@64px", key_column="id", vector_column="embedding")
    manifest = pack_source(table, tmp_path / "packed", val_fraction=0.2, vectors=source, console=QUIET)
    assert manifest["counts"]["rejected_by_reason"] == {
        "vector_wrong_width": 1, "vector_not_finite": 2, "duplicate_vector_key": 1, "missing_vector": 1,
        "unmatched_vector": 1}
    assert manifest["counts"]["packed"] == 35 and manifest["vectors"]["dim"] == 1280
    rejected = [json.loads(line) for line in (tmp_path / "packed" / A.REJECTED).read_text().splitlines()]
    assert len(rejected) == 6 and {r["key"] for r in rejected} >= {table_keys[0], table_keys[3], "not-in-the-table"}
    entries = {s: load_stored_features(tmp_path / "packed", s) for s in manifest["vectors"]["splits"]}
    assert sum(len(e.keys) for e in entries.values()) == 35  # exactly the good rows, nothing else
    assert not {table_keys[i] for i in range(5)} & {k for e in entries.values() for k in e.keys}
    leftovers = [p.name for p in (tmp_path / "packed").rglob("*") if "partial" in p.name or p.name.endswith(".tmp")]
    assert leftovers == []

    # nothing half-written: a pack whose every vector is bad leaves the folder as it was
    before = {p.relative_to(tmp_path): p.read_bytes() for p in (tmp_path / "packed").rglob("*") if p.is_file()}
    pq.write_table(pa.table({"id": table_keys, "embedding": [[float("nan")] * 1280] * 40}), parquet)
    with pytest.raises(DataError, match="all rejected"):
        pack_source(table, tmp_path / "packed", val_fraction=0.2, vectors=source, console=QUIET)
    after = {p.relative_to(tmp_path): p.read_bytes() for p in (tmp_path / "packed").rglob("*") if p.is_file()}
    assert {k: v for k, v in after.items() if k.name != A.FAILED_PACK_REJECTED} == before


def _rows(table: Path) -> list[dict]:
    with open(table, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_npy_vectors_need_their_keys(digits, tmp_path):
    short = tmp_path / "short.txt"
    short.write_text("digit-0000\n")
    for source, words in ((VectorSource(digits["npy"].path, "m"), "--vector-keys"),
                          (VectorSource(digits["npy"].path, "m", keys=short), "1 lines but"),
                          (VectorSource(digits["npy"].path, "", keys=digits["npy"].keys), "--vector-model")):
        with pytest.raises(DataError, match=words):
            pack_source(digits["captions"], tmp_path / "never", vectors=source, console=QUIET)
    assert not (tmp_path / "never" / A.MANIFEST).exists()


def test_the_tower_check_refuses_vectors_made_at_another_resolution(digits, tmp_path):
    packed = tmp_path / "packed"
    pack_source(digits["with_images"], packed, val_fraction=0.2, image_roots=[digits["src"]], vectors=digits["npy"],
                console=QUIET)
    same = tiny_recipe(packed, vision__image_size=SIZE, vision__stored_vectors=True)
    data = prepare_training_data(same, QUIET)
    check = data.tower_fingerprint["stored_vectors"]["check"]
    assert check["rows"] == 64 and check["min_cosine"] >= 0.999  # float16 storage moves it by ~1e-7
    tower = shared_image_tower(same.vision)
    passes = tower.forward_passes
    again = split_features(same.vision, packed, "train", QUIET)
    assert again.tower is tower and tower.forward_passes == passes  # the kept report: no tower pass again

    other = tiny_recipe(packed, vision__image_size=96, vision__stored_vectors=True)
    with pytest.raises(AlignError, match="resolution") as refused:
        build_recipe_features(other, QUIET)
    message = str(refused.value)
    assert "below 0.999" in message and "crop" in message and "mean/std" in message and "pooling" in message


def test_vector_entries_written_in_blocks_equal_one_block(digits, tmp_path, monkeypatch):
    """Rows are converted and hashed a block at a time (memory flat at millions of rows); the entry's
    bytes, fingerprint and hash do not depend on the block size (byte equality with one block)."""
    import align.data.vectors as vectors_module

    whole = tmp_path / "whole"
    pack_source(digits["captions"], whole, val_fraction=0.2, vectors=digits["npy"], console=QUIET)
    monkeypatch.setattr(vectors_module, "ROWS_PER_BLOCK", 7)  # many blocks, a partial last one
    blocked = tmp_path / "blocked"
    pack_source(digits["captions"], blocked, val_fraction=0.2, vectors=digits["npy"], console=QUIET)
    files = sorted(p.relative_to(whole) for p in (whole / A.FEATURE_ROOT).rglob("*") if p.is_file())
    assert len(files) == 8  # two splits x (fingerprint, keys, skipped, rows)
    for name in files:
        assert (blocked / name).read_bytes() == (whole / name).read_bytes(), name
    assert not list(blocked.rglob("*.partial"))
