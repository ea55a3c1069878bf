"""Reading packed shards: one canonical order for text and images, exact bytes.

Outside references: scikit-image's bundled sample photos as the images (their numpy arrays are the
ground truth for lossless PNG round trips) and Python's ``tarfile`` for the member order on disk.
"""
from __future__ import annotations

import io
import json
import tarfile
from pathlib import Path

import numpy as np
import pytest
import skimage.data
from PIL import Image
from rich.console import Console

from align.data.pack import pack_source
from align.data.shards import iter_image_bytes, iter_images, load_table, read_manifest
from align.errors import DataError

PHOTOS = ("chelsea", "coffee", "astronaut", "rocket", "camera", "coins", "moon", "page", "clock",
          "hubble_deep_field", "immunohistochemistry")


def quiet() -> Console:
    return Console(file=io.StringIO(), width=160)


@pytest.fixture(scope="module")
def packed(tmp_path_factory) -> tuple[Path, Path, dict[str, np.ndarray]]:
    """Eleven sample photos (odd ones JPEG, even ones PNG), five-ish shards of two."""
    root = tmp_path_factory.mktemp("shards")
    src = root / "src"
    src.mkdir()
    arrays = {}
    for i, name in enumerate(PHOTOS):
        image = Image.fromarray(getattr(skimage.data, name)()).convert("RGB")
        image.thumbnail((40, 40))
        arrays[name] = np.asarray(image)
        image.save(src / f"{name}.{'jpg' if i % 2 else 'png'}")
        (src / f"{name}.txt").write_text(f"the {name} photo")
        (src / f"{name}.json").write_text(json.dumps({"name": name, "index": i}))
    pack_source(src, root / "out", val_fraction=0.0, shard_size=2, console=quiet())
    return src, root / "out", arrays


def tar_order(out: Path, shards: list[str]) -> list[str]:
    """Keys in on-disk order, read with tarfile: member names are KEY.EXT."""
    keys = []
    for name in shards:
        with tarfile.open(out / name) as tar:
            for member in tar.getnames():
                key = member.split(".", 1)[0]
                if not keys or keys[-1] != key:
                    keys.append(key)
    return keys


def test_table_and_images_share_the_canonical_order(packed):
    src, out, arrays = packed
    manifest = read_manifest(out)
    table = load_table(out, "train")
    assert table.keys == tar_order(out, manifest["splits"]["train"]["shards"])
    assert table.keys == sorted(PHOTOS)  # packing sorts by key
    assert table.content_hash == manifest["splits"]["train"]["content_hash"]
    assert [p.name for p in table.shards] == manifest["splits"]["train"]["shards"]
    assert table.captions == [f"the {k} photo" for k in table.keys]
    assert table.labels == [{"name": k, "index": str(PHOTOS.index(k))} for k in table.keys]

    skipped: list[str] = []
    images = list(iter_images(out, "train", skipped=skipped))
    assert [k for k, _ in images] == table.keys and skipped == []
    for key, image in images:
        assert image.mode == "RGB" and image.size == arrays[key].shape[1::-1]
        if PHOTOS.index(key) % 2 == 0:  # PNG is lossless: pixels equal scikit-image's array
            assert np.array_equal(np.asarray(image), arrays[key])
    assert [k for k, _, _ in iter_image_bytes(out, "train")] == table.keys


def test_packed_bytes_equal_the_source_files(packed):
    src, out, _ = packed
    for key, data, ext in iter_image_bytes(out, "train"):
        assert ext == ("jpg" if PHOTOS.index(key) % 2 else "png")
        assert data == (src / f"{key}.{ext}").read_bytes()


def test_an_image_that_fails_to_decode_is_skipped_and_reported(packed, tmp_path: Path):
    _, out, _ = packed
    damaged = tmp_path / "damaged"
    damaged.mkdir()
    manifest = read_manifest(out)
    for name in manifest["splits"]["train"]["shards"]:
        with tarfile.open(out / name) as tar_in, tarfile.open(damaged / name, "w") as tar_out:
            for member in tar_in.getmembers():
                data = tar_in.extractfile(member).read()
                if member.name == "chelsea.png":
                    data = data[: len(data) // 3]  # cut the PNG short after packing
                member.size = len(data)
                tar_out.addfile(member, io.BytesIO(data))
    (damaged / "manifest.json").write_text(json.dumps(manifest))

    skipped: list[str] = []
    keys = [k for k, _ in iter_images(damaged, "train", skipped=skipped)]
    assert skipped == ["chelsea"]
    assert keys == [k for k in load_table(damaged, "train").keys if k != "chelsea"]


def test_mistakes_name_the_fix(packed, tmp_path: Path):
    _, out, _ = packed
    with pytest.raises(DataError) as missing:
        read_manifest(tmp_path)
    assert "align pack SOURCE --out DIR" in missing.value.hint
    with pytest.raises(DataError, match="split 'val'.*empty") as empty:
        load_table(out, "val")
    assert "--val-fraction" in empty.value.hint
    with pytest.raises(DataError, match="empty"):
        iter_images(out, "val")  # checked at the call, not at the first image
    with pytest.raises(DataError, match="unknown split"):
        load_table(out, "test")
