"""align pack in worker processes, from a sorted listing on disk, and resumed after a kill.

Outside reference throughout: byte-equality with the one-process path (every file of the output
folder, compared with ``bytes ==``), plus Python's ``tarfile`` for the shards' framing. Images are
scikit-image's bundled sample photos.
"""
from __future__ import annotations

import io
import json
import os
import subprocess
import sys
import tarfile
from pathlib import Path

import numpy as np
import pytest
import skimage.data
from PIL import Image
from rich.console import Console

from align.artifacts import PACK_PROGRESS, PACK_STAGING
from align.cli import main as cli_main
from align.data import pack_order
from align.data.pack import pack_source
from align.data.pack_order import OrderedListing
from align.data.sources import iter_source, list_source
from align.data.vectors import VectorSource
from align.errors import DataError

ROOT = Path(__file__).resolve().parents[1]
PHOTOS = (skimage.data.chelsea, skimage.data.coffee, skimage.data.astronaut, skimage.data.rocket, skimage.data.camera)
BAD = {"broken": "unreadable_image", "blank": "empty_caption", "latin": "not_utf8", "nocaption": "missing_caption",
       "nested": "bad_labels", "long": "caption_too_long"}


def quiet() -> Console:
    return Console(file=io.StringIO(), width=160)


def write(folder: Path, name: str, image: Image.Image | bytes, caption: str | bytes | None, labels=None, **save):
    path = folder / name
    path.parent.mkdir(parents=True, exist_ok=True)
    image.save(path, **save) if isinstance(image, Image.Image) else path.write_bytes(image)
    if caption is not None:
        path.with_suffix(".txt").write_bytes(caption if isinstance(caption, bytes) else caption.encode())
    if labels is not None:
        path.with_suffix(".json").write_text(json.dumps(labels))


@pytest.fixture(scope="module")
def mixed_folder(tmp_path_factory) -> Path:
    """48 good samples in four formats and two folders, every kind of bad sample, a repeated key."""
    src = tmp_path_factory.mktemp("mixed") / "src"
    for i in range(48):
        photo = Image.fromarray(PHOTOS[i % len(PHOTOS)]())
        photo.thumbnail((20 + i, 20 + i))
        name, save = [("png", {}), ("jpg", {"quality": 80}), ("bmp", {}), ("webp", {"lossless": True})][i % 4]
        write(src, f"{'sub/' if i % 3 else ''}s{i:02d}.{name}", photo, f"photo {i} of {PHOTOS[i % 5].__name__}",
              {"kind": PHOTOS[i % 5].__name__, "i": i % 4}, **save)
    small = Image.fromarray(skimage.data.coffee())
    small.thumbnail((32, 32))
    jpeg = io.BytesIO()
    Image.fromarray(skimage.data.chelsea()).save(jpeg, format="JPEG")
    write(src, "broken.jpg", jpeg.getvalue()[: len(jpeg.getvalue()) // 2], "a truncated photo")
    write(src, "garbage.png", b"not an image at all", "undecodable bytes")
    write(src, "blank.png", small, "   \n")
    write(src, "latin.png", small, b"\xff\xfe bad")
    write(src, "nocaption.png", small, None)
    write(src, "nested.png", small, "labels nested", {"a": {"b": 1}})
    write(src, "long.png", small, "x" * 1200)
    write(src, "sub/s05.png", small, "a second sub/s05: a duplicate key")  # sub/s05.jpg sorts first
    return src


def folder_bytes(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def manifest_of(folder: Path) -> dict:
    return json.loads((folder / "manifest.json").read_text())


@pytest.fixture(scope="module")
def one_worker(mixed_folder, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("one") / "out"
    pack_source(mixed_folder, out, val_fraction=0.25, shard_size=3, console=quiet())
    return out


def test_one_worker_pack_has_the_expected_content(one_worker):
    manifest = manifest_of(one_worker)
    rejects = [json.loads(line) for line in (one_worker / "rejected.jsonl").read_text().splitlines()]
    assert {r["key"]: r["reason"] for r in rejects if r["key"] in BAD} == BAD
    assert {r["key"]: r["reason"] for r in rejects if r["key"] not in BAD} == {
        "garbage": "unreadable_image", "sub_s05": "duplicate_key"}
    assert manifest["counts"] == {"seen": 56, "packed": 48, "rejected": 8,
                                  "rejected_by_reason": {"bad_labels": 1, "caption_too_long": 1, "duplicate_key": 1,
                                                         "empty_caption": 1, "missing_caption": 1, "not_utf8": 1,
                                                         "unreadable_image": 2}}
    # no process address or other run-specific text in a reject's detail (common practice: reports diff cleanly)
    assert all(" at 0x" not in r["detail"] for r in rejects)


def test_two_workers_write_the_same_bytes_as_one(mixed_folder, one_worker, tmp_path, capsys):
    out = tmp_path / "two"
    code = cli_main(["pack", str(mixed_folder), "--out", str(out), "--val-fraction", "0.25", "--shard-size", "3",
                     "--workers", "2"])
    assert code == 0, capsys.readouterr().err
    assert folder_bytes(out) == folder_bytes(one_worker)  # reference: the one-process path, every file


def test_shards_are_framed_exactly_as_tarfile_writes_them(one_worker, tmp_path):
    """Members are encoded in the workers; re-writing each shard's members with Python's tarfile
    (PAX format, the same header fields) must give the shard's bytes back."""
    for shard in sorted(one_worker.glob("*.tar")):
        rewritten = io.BytesIO()
        with tarfile.open(shard) as source, tarfile.open(fileobj=rewritten, mode="w", format=tarfile.PAX_FORMAT) as tar:
            for member in source.getmembers():
                tar.addfile(member, source.extractfile(member))
        assert rewritten.getvalue() == shard.read_bytes(), shard.name


def test_the_listing_sorted_in_runs_on_disk_equals_the_sort_in_memory(mixed_folder, tmp_path, monkeypatch):
    monkeypatch.setattr(pack_order, "RUN_SIZE", 5)
    listing = OrderedListing(iter_source(mixed_folder), tmp_path / "runs")
    assert len(list((tmp_path / "runs").iterdir())) == -(-56 // 5)  # the runs were really spilled
    reference = [(c.key, c.source) for c in list_source(mixed_folder)]  # Python's sorted() of the whole list
    assert [(c.key, c.source) for c in listing.ordered()] == reference
    assert [c.source for c in listing.ordered(skip=50)] == [s for _, s in reference[50:]]
    listing.close()
    assert not (tmp_path / "runs").exists()


def test_a_pack_sorted_through_runs_on_disk_is_the_same_pack(mixed_folder, one_worker, tmp_path, monkeypatch):
    monkeypatch.setattr(pack_order, "RUN_SIZE", 7)
    pack_source(mixed_folder, tmp_path / "runs", val_fraction=0.25, shard_size=3, console=quiet())
    assert folder_bytes(tmp_path / "runs") == folder_bytes(one_worker)


def test_a_table_streams_into_the_same_pack_with_workers(tmp_path):
    src = tmp_path / "t"
    src.mkdir()
    for i in range(12):
        photo = Image.fromarray(PHOTOS[i % 5]())
        photo.thumbnail((24 + i, 24 + i))
        photo.save(src / f"{i}.png")
    rows = ["image,caption,shade"] + [f"{i}.png,photo {i},{i % 3}" for i in range(12)]
    rows += ["missing.png,gone,1", "3.png,,2", "5.png,again,0", "\"bad,row\",x,y,z"]
    (src / "pairs.csv").write_bytes(("\n".join(rows) + "\n").encode() + b"7.png,\xff,1\n")
    one = pack_source(src / "pairs.csv", tmp_path / "one", val_fraction=0.3, shard_size=2, console=quiet())
    two = pack_source(src / "pairs.csv", tmp_path / "two", val_fraction=0.3, shard_size=2, console=quiet(), workers=2)
    assert one == two and folder_bytes(tmp_path / "one") == folder_bytes(tmp_path / "two")
    assert one["counts"]["packed"] == 12 and one["counts"]["rejected"] == 5


# ---------------------------------------------------------------------------------------------
# killed and resumed

KILLED_PACK = """
import os, signal, sys
from align.data import pack_stage
from align.data.pack import pack_source

source, out, method, when, workers = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4]), int(sys.argv[5])
calls = 0
original = getattr(pack_stage.StagedPack, method)

def call_then_die(self, *args):
    global calls
    calls += 1
    if calls == when:  # a real SIGKILL: no cleanup, no flush, no finally
        os.kill(os.getpid(), signal.SIGKILL)
    return original(self, *args)

setattr(pack_stage.StagedPack, method, call_then_die)
vectors = None
if len(sys.argv) > 6:
    from pathlib import Path
    from align.data.vectors import VectorSource
    vectors = VectorSource(Path(sys.argv[6]), "seeded-normal", keys=Path(sys.argv[7]))
pack_source(source, out, val_fraction=0.25, shard_size=3, workers=workers, vectors=vectors)
"""


def killed_pack(source: Path, out: Path, when: int, workers: int = 1, method: str = "add",
                vectors: tuple[Path, Path] | None = None, seen: int = 56) -> None:
    """``align pack`` in a child process, killed with SIGKILL as it enters ``StagedPack.METHOD`` for
    the WHEN-th time (``add``: about to write a sample; ``_record_progress``: a shard just renamed)."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    args = [str(source), str(out), method, str(when), str(workers), *(str(p) for p in vectors or ())]
    done = subprocess.run([sys.executable, "-c", KILLED_PACK, *args], cwd=ROOT, env=env, capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == -9, done.stderr  # killed, not finished
    assert not (out / "manifest.json").exists()
    progress = json.loads((out / PACK_STAGING / PACK_PROGRESS).read_text())
    finished = [n for split in progress["splits"].values() for n in split["shards"]]
    assert finished and all((out / PACK_STAGING / name).is_file() for name in finished)
    assert 0 < progress["position"] < seen


def test_a_killed_pack_resumes_and_ends_as_an_uninterrupted_one(mixed_folder, one_worker, tmp_path):
    out = tmp_path / "out"
    killed_pack(mixed_folder, out, when=20)  # mid-shard: bytes after the last progress record
    stage_before = folder_bytes(out / PACK_STAGING)
    console = quiet()
    # resumed with two workers: the worker count is no part of what the staged shards depend on
    manifest = pack_source(mixed_folder, out, val_fraction=0.25, shard_size=3, console=console, workers=2)
    assert "resuming an interrupted pack" in console.file.getvalue()
    assert folder_bytes(out) == folder_bytes(one_worker)  # reference: the uninterrupted one-process pack
    assert manifest == manifest_of(one_worker)
    kept = [name for name in stage_before if name.endswith(".tar")]
    assert kept  # the finished shards were there to be reused, and are the final ones
    assert all(stage_before[name] == (out / name).read_bytes() for name in kept)


def test_a_pack_killed_while_workers_run_resumes_too(mixed_folder, one_worker, tmp_path):
    out = tmp_path / "out"
    killed_pack(mixed_folder, out, when=31, workers=2)
    pack_source(mixed_folder, out, val_fraction=0.25, shard_size=3, console=quiet())
    assert folder_bytes(out) == folder_bytes(one_worker)


def test_a_pack_killed_between_a_shards_rename_and_its_record_resumes(mixed_folder, one_worker, tmp_path):
    out = tmp_path / "out"
    killed_pack(mixed_folder, out, when=6, method="_record_progress")
    # the case at hand: a shard the last record saw open (with samples) is already renamed into place
    progress = json.loads((out / PACK_STAGING / PACK_PROGRESS).read_text())
    renamed = [f"{split}-{len(info['shards']):06d}.tar" for split, info in progress["splits"].items()
               if info["open_samples"]]
    assert renamed and all((out / PACK_STAGING / name).is_file() for name in renamed)
    console = quiet()
    pack_source(mixed_folder, out, val_fraction=0.25, shard_size=3, console=console)
    assert "resuming an interrupted pack" in console.file.getvalue()
    assert folder_bytes(out) == folder_bytes(one_worker)


def test_a_killed_pack_with_stored_vectors_resumes(tmp_path):
    """Caption-and-vector rows (no images): the vectors of samples in the kept shards are taken
    again from the staged records, so the vectors' cache entries come out the same too."""
    rng = np.random.default_rng(0)
    keys = [f"item{i:03d}" for i in range(40)]
    rows = [{"key": k, "caption": f"item {i}", "shade": str(i % 3)} for i, k in enumerate(keys)]
    rows += [{"key": "novector", "caption": "a row without a vector"}, {"key": "item007", "caption": "again"}]
    (tmp_path / "rows.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rows))
    vectors = rng.normal(size=(41, 8)).astype(np.float32)
    vectors[3] = np.nan  # vector_not_finite
    np.save(tmp_path / "v.npy", vectors)
    (tmp_path / "keys.txt").write_text("\n".join(keys + ["nobody"]) + "\n")  # one unmatched vector
    source = VectorSource(tmp_path / "v.npy", "seeded-normal", keys=tmp_path / "keys.txt")
    reference = pack_source(tmp_path / "rows.jsonl", tmp_path / "reference", val_fraction=0.25, shard_size=3,
                            vectors=source, console=quiet())
    assert reference["counts"]["rejected_by_reason"] == {"duplicate_key": 1, "missing_vector": 1,
                                                         "unmatched_vector": 1, "vector_not_finite": 1}
    assert list(reference["vectors"]["splits"]) == ["train", "val"]

    out = tmp_path / "out"
    killed_pack(tmp_path / "rows.jsonl", out, when=20, vectors=(tmp_path / "v.npy", tmp_path / "keys.txt"), seen=42)
    console = quiet()
    pack_source(tmp_path / "rows.jsonl", out, val_fraction=0.25, shard_size=3, vectors=source, console=console,
                workers=2)
    assert "resuming an interrupted pack" in console.file.getvalue()
    assert folder_bytes(out) == folder_bytes(tmp_path / "reference")  # shards, manifest and the vectors' entries


def test_changed_options_or_source_do_not_reuse_staged_shards(mixed_folder, tmp_path):
    out = tmp_path / "out"
    killed_pack(mixed_folder, out, when=20)
    console = quiet()
    pack_source(mixed_folder, out, val_fraction=0.25, shard_size=4, console=console)  # another shard size
    assert "resuming" not in console.file.getvalue()
    pack_source(mixed_folder, tmp_path / "reference4", val_fraction=0.25, shard_size=4, console=quiet())
    assert folder_bytes(out) == folder_bytes(tmp_path / "reference4")

    changed = tmp_path / "changed"
    subprocess.run(["cp", "-a", str(mixed_folder), str(changed)], check=True)
    out = tmp_path / "out2"
    killed_pack(changed, out, when=20)
    (changed / "s00.txt").write_text("a caption changed after the kill")
    console = quiet()
    pack_source(changed, out, val_fraction=0.25, shard_size=3, console=console)
    assert "resuming" not in console.file.getvalue()
    pack_source(changed, tmp_path / "reference_changed", val_fraction=0.25, shard_size=3, console=quiet())
    assert folder_bytes(out) == folder_bytes(tmp_path / "reference_changed")
    captions = {}
    for shard in out.glob("*.tar"):
        with tarfile.open(shard) as tar:
            captions.update({m.name: tar.extractfile(m).read() for m in tar.getmembers() if m.name.endswith(".txt")})
    assert captions["s00.txt"] == b"a caption changed after the kill"


def test_workers_must_be_positive(mixed_folder, tmp_path):
    with pytest.raises(DataError, match="workers must be at least 1") as refused:
        pack_source(mixed_folder, tmp_path / "out", workers=0, console=quiet())
    assert "--workers" in refused.value.hint
    assert not (tmp_path / "out").exists()
