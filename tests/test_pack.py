"""align pack: folder / CSV / JSONL sources into webdataset shards, bad samples reported, not fatal.

Outside references: scikit-image's bundled sample photos as the images, webdataset's own reader
(``webdataset.WebDataset``) and Python's ``tarfile`` to read what was written, ``hashlib`` for the split
rule the pack format defines (val iff int(sha256(key)[:8], 16) / 2**32 < val_fraction).
"""
from __future__ import annotations

import hashlib
import io
import json
import re
import tarfile
from pathlib import Path

import numpy as np
import pytest
import skimage.data
import webdataset
from PIL import Image
from rich.console import Console

from align.artifacts import FAILED_PACK_REJECTED, MANIFEST, REJECTED
from align.data.pack import pack_source
from align.errors import DataError
from align.labels import canonical_labels, label_group


def quiet() -> Console:
    return Console(file=io.StringIO(), width=160)


def small(array: np.ndarray, side: int = 48) -> Image.Image:
    """scikit-image sample photo, shrunk so each test packs in well under a second."""
    image = Image.fromarray(array)
    image.thumbnail((side, side))
    return image


def write_sample(folder: Path, name: str, image: Image.Image | bytes, caption: str | bytes | None,
                 labels: dict | None = None, **save) -> Path:
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    if isinstance(image, bytes):
        path.write_bytes(image)
    else:
        image.save(path, **save)
    stem = path.with_suffix("")
    if caption is not None:
        Path(f"{stem}.txt").write_bytes(caption if isinstance(caption, bytes) else caption.encode("utf-8"))
    if labels is not None:
        Path(f"{stem}.json").write_text(json.dumps(labels), encoding="utf-8")
    return path


GOOD_KEYS = {"chelsea", "coffee", "people_astronaut", "rocket", "camera", "a_b"}
EXPECTED_REJECTS = {
    "broken": "unreadable_image", "blank": "empty_caption", "latin": "not_utf8", "nocaption": "missing_caption",
    "nested": "bad_labels", "long": "caption_too_long",
}


@pytest.fixture
def photo_folder(tmp_path: Path) -> Path:
    src = tmp_path / "photos"
    write_sample(src, "chelsea.jpg", small(skimage.data.chelsea()), "  a tabby cat on a rug\n", {"animal": "cat"})
    write_sample(src, "coffee.png", small(skimage.data.coffee()), "a cup of coffee", {"drink": "coffee", "cups": 1})
    write_sample(src, "people/astronaut.jpg", small(skimage.data.astronaut()), "an astronaut in a white suit")
    write_sample(src, "rocket.webp", small(skimage.data.rocket()), "a rocket on the launch pad", lossless=True)
    write_sample(src, "camera.bmp", small(skimage.data.camera()), "a man with a camera on a tripod")
    # the same key twice: "a.b" and "a_b" both become key a_b (webdataset keys carry no dots)
    write_sample(src, "a.b.png", small(skimage.data.coffee(), 40), "first of two")
    write_sample(src, "a_b.png", small(skimage.data.chelsea(), 40), "second of two")
    # damaged or unusable samples
    jpeg = io.BytesIO()
    Image.fromarray(skimage.data.chelsea()).save(jpeg, format="JPEG")
    write_sample(src, "broken.jpg", jpeg.getvalue()[: len(jpeg.getvalue()) // 2], "a truncated photo")
    write_sample(src, "blank.png", small(skimage.data.coffee()), "   \n")
    write_sample(src, "latin.png", small(skimage.data.coffee()), b"\xff\xfe bad")
    write_sample(src, "nocaption.png", small(skimage.data.coffee()), None)
    write_sample(src, "nested.png", small(skimage.data.coffee()), "labels nested", {"a": {"b": 1}})
    write_sample(src, "long.png", small(skimage.data.coffee()), "x" * 1200)  # over the default 1000
    return src


def read_with_webdataset(out: Path, manifest: dict, split: str) -> list[dict]:
    urls = [str(out / name) for name in manifest["splits"][split]["shards"]]
    if not urls:
        return []
    return list(webdataset.WebDataset(urls, shardshuffle=False, empty_check=False))


def test_folder_pack_keeps_good_samples_and_reports_each_reject(photo_folder: Path, tmp_path: Path):
    out = tmp_path / "shards"
    console = quiet()
    manifest = pack_source(photo_folder, out, val_fraction=0.3, shard_size=2, max_caption_chars=200,
                           console=console)

    samples = read_with_webdataset(out, manifest, "train") + read_with_webdataset(out, manifest, "val")
    by_key = {s["__key__"]: s for s in samples}
    assert set(by_key) == GOOD_KEYS
    for sample in samples:  # every sample is one image, its caption and its labels object
        assert ("jpg" in sample) != ("png" in sample)
        assert isinstance(json.loads(sample["json"]), dict)
    assert by_key["chelsea"]["txt"].decode() == "a tabby cat on a rug"  # stripped
    # JPEG and PNG bytes are stored untouched
    assert by_key["chelsea"]["jpg"] == (photo_folder / "chelsea.jpg").read_bytes()
    assert by_key["coffee"]["png"] == (photo_folder / "coffee.png").read_bytes()
    # labels become strings; no labels file gives {}
    assert json.loads(by_key["coffee"]["json"]) == {"drink": "coffee", "cups": "1"}
    assert json.loads(by_key["rocket"]["json"]) == {}
    # the stored text is the canonical one (keys sorted, no spaces): the content hashes are taken over it
    assert by_key["coffee"]["json"].decode() == canonical_labels({"drink": "coffee", "cups": "1"}) \
        == '{"cups":"1","drink":"coffee"}'
    assert by_key["rocket"]["json"].decode() == "{}" and label_group({}) is None  # no labels: in no group
    assert label_group({"drink": "coffee", "cups": "1"}) == by_key["coffee"]["json"].decode()
    # the first of the two same-key files (in sorted order "a.b.png" < "a_b.png") is the one kept
    assert by_key["a_b"]["txt"].decode() == "first of two"
    # webp and bmp are re-encoded as PNG without changing a pixel (lossless webp, bmp)
    for key, name in (("rocket", "rocket.webp"), ("camera", "camera.bmp")):
        assert "png" in by_key[key]
        stored = np.asarray(Image.open(io.BytesIO(by_key[key]["png"])))
        assert np.array_equal(stored, np.asarray(Image.open(photo_folder / name)))

    rejects = [json.loads(line) for line in (out / REJECTED).read_text().splitlines()]
    reasons = {r["key"]: r["reason"] for r in rejects if r["reason"] != "duplicate_key"}
    assert reasons == EXPECTED_REJECTS
    duplicates = [r for r in rejects if r["reason"] == "duplicate_key"]
    assert len(duplicates) == 1 and duplicates[0]["source"].endswith("a_b.png")
    assert all(set(r) == {"source", "key", "reason", "detail"} for r in rejects)

    counts = manifest["counts"]
    assert counts["seen"] == 13 and counts["packed"] == len(GOOD_KEYS) and counts["rejected"] == len(rejects)
    assert counts["seen"] == counts["packed"] + counts["rejected"]
    assert sum(counts["rejected_by_reason"].values()) == counts["rejected"]
    assert counts["rejected_by_reason"]["duplicate_key"] == 1
    assert sum(manifest["splits"][s]["samples"] for s in ("train", "val")) == counts["packed"]
    assert manifest["label_fields"] == ["animal", "cups", "drink"]
    assert json.loads((out / MANIFEST).read_text()) == manifest
    # shard_size=2: no shard holds more than two samples (three members each); checked with tarfile
    for split in ("train", "val"):
        info = manifest["splits"][split]
        assert len(info["shards"]) == -(-info["samples"] // 2)
        for name in info["shards"]:
            with tarfile.open(out / name) as tar:
                assert len(tar.getnames()) <= 6
    summary = console.file.getvalue()
    assert "unreadable_image" in summary and str(out / REJECTED) in summary


def test_split_follows_the_key_hash_rule(photo_folder: Path, tmp_path: Path):
    fraction = 0.5
    manifest = pack_source(photo_folder, tmp_path / "s", val_fraction=fraction, console=quiet())
    for split in ("train", "val"):
        for sample in read_with_webdataset(tmp_path / "s", manifest, split):
            key = sample["__key__"]
            # the rule from the pack format, recomputed here with hashlib
            in_val = int(hashlib.sha256(key.encode()).hexdigest()[:8], 16) / 2**32 < fraction
            assert (split == "val") == in_val, key


def test_val_fraction_extremes(photo_folder: Path, tmp_path: Path):
    everything_val = pack_source(photo_folder, tmp_path / "all_val", val_fraction=1.0, console=quiet())
    assert everything_val["splits"]["train"] == {"samples": 0, "shards": [],
                                                 "content_hash": hashlib.sha256().hexdigest()}
    assert everything_val["splits"]["val"]["samples"] == len(GOOD_KEYS)
    no_val = pack_source(photo_folder, tmp_path / "no_val", val_fraction=0.0, console=quiet())
    assert no_val["splits"]["val"]["samples"] == 0 and no_val["splits"]["train"]["samples"] == len(GOOD_KEYS)


def test_packing_is_deterministic_and_hashes_follow_content(photo_folder: Path, tmp_path: Path):
    first = pack_source(photo_folder, tmp_path / "one", val_fraction=0.3, console=quiet())
    second = pack_source(photo_folder, tmp_path / "two", val_fraction=0.3, console=quiet())
    assert first["content_hash"] == second["content_hash"]
    assert first["splits"] == second["splits"]
    for name in first["splits"]["train"]["shards"] + first["splits"]["val"]["shards"]:
        assert (tmp_path / "one" / name).read_bytes() == (tmp_path / "two" / name).read_bytes()
    # the whole-set hash does not depend on how the set is split; the per-split hashes do
    resplit = pack_source(photo_folder, tmp_path / "three", val_fraction=0.8, console=quiet())
    assert resplit["content_hash"] == first["content_hash"]
    assert resplit["splits"]["val"]["content_hash"] != first["splits"]["val"]["content_hash"]
    # one changed caption changes it
    (photo_folder / "coffee.txt").write_text("a cup of black coffee")
    changed = pack_source(photo_folder, tmp_path / "four", val_fraction=0.3, console=quiet())
    assert changed["content_hash"] != first["content_hash"]


def test_repacking_into_the_same_folder_leaves_no_stale_shards(photo_folder: Path, tmp_path: Path):
    out = tmp_path / "s"
    pack_source(photo_folder, out, val_fraction=0.0, shard_size=1, console=quiet())
    assert len(list(out.glob("train-*.tar"))) == len(GOOD_KEYS)
    (out / "features").mkdir()  # the default feature cache: keyed by content hash, kept across repacks
    (out / "features" / "entry").write_text("cached")
    manifest = pack_source(photo_folder, out, val_fraction=0.0, shard_size=100, console=quiet())
    assert sorted(p.name for p in out.glob("*.tar")) == manifest["splits"]["train"]["shards"] == ["train-000000.tar"]
    assert not list(out.glob(".*"))  # no staging folder or temporary files left behind
    assert (out / "features" / "entry").read_text() == "cached"


def test_csv_source_with_label_columns(tmp_path: Path):
    src = tmp_path / "table"
    images = src / "img"
    images.mkdir(parents=True)
    small(skimage.data.chelsea()).save(images / "cat.jpg")
    small(skimage.data.coffee()).save(images / "cup.png")
    outside = tmp_path / "elsewhere" / "astronaut.png"
    outside.parent.mkdir()
    small(skimage.data.astronaut()).save(outside)
    rows = [
        "image,caption,colour,room",
        "img/cat.jpg,a grey tabby cat,grey,living room",
        f"{outside},an astronaut portrait,white,",
        "img/cup.png,\"coffee, black\",brown,kitchen",
        "img/missing.jpg,nothing here,red,hall",
        "img/cup.png,,brown,kitchen",
    ]
    (src / "pairs.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    # the astronaut lies outside the table's folder: packed only when its folder is allowed
    manifest = pack_source(src / "pairs.csv", tmp_path / "out", val_fraction=0.0, console=quiet(),
                           image_roots=[outside.parent])

    samples = {s["__key__"]: s for s in read_with_webdataset(tmp_path / "out", manifest, "train")}
    # the key rule of the pack format: the path as written, minus extension and leading "/", with
    # every character outside [A-Za-z0-9_-] replaced by "_"
    outside_key = re.sub(r"[^A-Za-z0-9_-]", "_", str(outside.with_suffix("")).lstrip("/"))
    assert set(samples) == {"img_cat", "img_cup", outside_key}
    assert samples["img_cup"]["txt"].decode() == "coffee, black"
    assert json.loads(samples["img_cat"]["json"]) == {"colour": "grey", "room": "living room"}
    assert json.loads(samples[outside_key]["json"]) == {"colour": "white"}  # empty cell: no label
    assert samples["img_cat"]["jpg"] == (images / "cat.jpg").read_bytes()
    rejects = [json.loads(line) for line in (tmp_path / "out" / REJECTED).read_text().splitlines()]
    assert sorted(r["reason"] for r in rejects) == ["duplicate_key", "missing_image"]
    assert manifest["label_fields"] == ["colour", "room"]
    assert manifest["counts"]["seen"] == 5


def test_jsonl_source(tmp_path: Path):
    src = tmp_path / "j"
    src.mkdir()
    small(skimage.data.chelsea()).save(src / "cat.jpg")
    small(skimage.data.rocket()).save(src / "rocket.png")
    lines = [
        json.dumps({"image": "cat.jpg", "caption": "a cat", "legs": 4, "pet": True}),
        json.dumps({"image": "rocket.png", "caption": "a rocket", "stage": None}),
        "{not json",
        json.dumps({"image": "rocket.png"}),
        json.dumps({"image": "cat.jpg", "caption": "again", "tags": ["a", "b"]}),
    ]
    (src / "pairs.jsonl").write_bytes(("\n".join(lines) + "\n").encode() + b'{"image": "x.jpg", "caption": "\xff"}\n')
    manifest = pack_source(src / "pairs.jsonl", tmp_path / "out", val_fraction=0.0, console=quiet())
    samples = {s["__key__"]: s for s in read_with_webdataset(tmp_path / "out", manifest, "train")}
    assert set(samples) == {"cat", "rocket"}
    assert json.loads(samples["cat"]["json"]) == {"legs": "4", "pet": "true"}
    assert json.loads(samples["rocket"]["json"]) == {}
    rejects = [json.loads(line) for line in (tmp_path / "out" / REJECTED).read_text().splitlines()]
    # line 4 (rocket, no caption) and line 5 (cat again) reuse keys already packed from lines 1-2
    assert sorted(r["reason"] for r in rejects) == ["bad_row", "duplicate_key", "duplicate_key", "not_utf8"]
    assert any(r["source"].endswith(":3") for r in rejects)  # the line number is reported


def test_jsonl_row_level_problems_when_keys_are_free(tmp_path: Path):
    src = tmp_path / "j"
    src.mkdir()
    small(skimage.data.chelsea()).save(src / "cat.jpg")
    lines = [json.dumps({"image": "cat.jpg"}), json.dumps({"image": "cat.jpg", "caption": "c", "tags": [1]}),
             json.dumps({"image": "cat.jpg", "caption": 7}), json.dumps({"caption": "no image"}),
             json.dumps({"image": "cat.jpg", "caption": "finally fine"})]
    (src / "p.jsonl").write_text("\n".join(lines) + "\n")
    manifest = pack_source(src / "p.jsonl", tmp_path / "out", val_fraction=0.0, console=quiet())
    assert manifest["counts"]["packed"] == 1
    rejects = [json.loads(line) for line in (tmp_path / "out" / REJECTED).read_text().splitlines()]
    assert sorted(r["reason"] for r in rejects) == ["bad_labels", "bad_row", "missing_caption", "missing_image"]


def test_nothing_usable_is_an_error_with_the_report_written(tmp_path: Path):
    src = tmp_path / "bad"
    write_sample(src, "one.png", small(skimage.data.coffee()), "")
    write_sample(src, "two.jpg", b"not a jpeg at all", "a caption")
    with pytest.raises(DataError, match="nothing usable .* 2 samples seen, all rejected") as failed:
        pack_source(src, tmp_path / "out", console=quiet())
    report = tmp_path / "out" / FAILED_PACK_REJECTED
    assert str(report) in failed.value.message and "empty_caption x1" in failed.value.hint
    assert len(report.read_text().splitlines()) == 2
    assert not (tmp_path / "out" / MANIFEST).exists() and not (tmp_path / "out" / REJECTED).exists()
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [FAILED_PACK_REJECTED]  # no half pack


def test_source_mistakes_raise_data_errors_with_hints(tmp_path: Path):
    with pytest.raises(DataError, match="does not exist") as missing:
        pack_source(tmp_path / "nowhere", tmp_path / "out", console=quiet())
    assert missing.value.hint
    (tmp_path / "notes.txt").write_text("hello")
    with pytest.raises(DataError, match="folders, .csv and .jsonl"):
        pack_source(tmp_path / "notes.txt", tmp_path / "out", console=quiet())
    (tmp_path / "empty").mkdir()
    with pytest.raises(DataError, match="no images found"):
        pack_source(tmp_path / "empty", tmp_path / "out", console=quiet())
    (tmp_path / "cols.csv").write_text("path,text\na.jpg,x\n")
    with pytest.raises(DataError, match=r"needs 'image' \(or, with stored vectors, 'key'\) and 'caption'"):
        pack_source(tmp_path / "cols.csv", tmp_path / "out", console=quiet())
    with pytest.raises(DataError, match="val_fraction"):
        pack_source(tmp_path / "cols.csv", tmp_path / "out", val_fraction=1.5, console=quiet())
