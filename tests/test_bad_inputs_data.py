"""Bad inputs to `align pack` and to the shard readers, each driven through the real command line.

For every case: exit code 2 with a message and a hint (or, for one bad sample among good ones, a
counted reject in rejected.jsonl with its reason), no traceback on stderr, and nothing valid lost
or half-written.

Outside references: numpy computes the expected 8-bit pixels of 16-bit images (``v >> 8``, the
high byte, which is also what Pillow keeps when it reads 16-bit RGB); Pillow writes 16-bit
grayscale PNG/TIFF (mode ``I;16``) and tifffile (a scikit-image dependency) 16-bit RGB TIFF; the
16-bit RGB PNG and the oversized header are written byte by byte after the PNG specification (W3C,
"Portable Network Graphics Specification", chunk layout and CRC-32 of section 5; zlib for IDAT).
Python's ``json`` writes the NaN / Infinity literals it also reads.
"""
from __future__ import annotations

import json
import struct
import tarfile
import warnings
import zlib
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image

from align.artifacts import FAILED_PACK_REJECTED, MANIFEST, PACK_STAGING, REJECTED
from align.cli import main as cli_main
from align.data.shards import decode_image, iter_images, load_table, read_manifest
from align.errors import DataError

REPO = Path(__file__).resolve().parent.parent


def squash(text: str) -> str:
    """Rich wraps (and folds long paths) at the terminal width: compare without any whitespace."""
    return "".join(text.split())


def run_cli(capsys, *args) -> tuple[int, str]:
    capsys.readouterr()
    code = cli_main([str(a) for a in args])
    return code, capsys.readouterr().err


def assert_refused(code: int, err: str, *phrases: str) -> None:
    """Exit 2, an error message and a hint on stderr, no traceback."""
    assert code == 2, err
    assert "Traceback" not in err
    assert "error:" in err and "hint:" in err, err
    for phrase in phrases:
        assert squash(phrase) in squash(err), (phrase, err)


def rejects_of(out: Path) -> dict[str, dict]:
    return {r["key"]: r for r in map(json.loads, (out / REJECTED).read_text().splitlines())}


def photo(seed: int, side: int = 24) -> Image.Image:
    return Image.fromarray(np.random.default_rng(seed).integers(0, 256, (side, side, 3), dtype=np.uint8))


def good_folder(root: Path, n: int = 6) -> Path:
    root.mkdir(parents=True)
    for i in range(n):
        photo(i).save(root / f"tile-{i}.png")
        (root / f"tile-{i}.txt").write_text(f"tile number {i}")
    return root


def folder_bytes(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()}


def png_chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))


def png_file(width: int, height: int, bit_depth: int, colour_type: int, idat: bytes) -> bytes:
    """A PNG: signature, IHDR, one IDAT, IEND (PNG specification, section 5)."""
    ihdr = struct.pack(">IIBBBBB", width, height, bit_depth, colour_type, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + png_chunk(b"IHDR", ihdr) + png_chunk(b"IDAT", idat)
            + png_chunk(b"IEND", b""))


def png_rgb16(samples: np.ndarray) -> bytes:
    """(H, W, 3) uint16 as a 16-bit RGB PNG: each row is filter byte 0, then big-endian samples."""
    rows = b"".join(b"\x00" + row.astype(">u2").tobytes() for row in samples)
    return png_file(samples.shape[1], samples.shape[0], 16, 2, zlib.compress(rows))


# ---------------------------------------------------------------------------------------------
# 4: a pack replaces the old one only when it succeeds


def test_a_pack_that_packs_nothing_leaves_the_good_pack_byte_identical(tmp_path, capsys):
    out = tmp_path / "packed"
    assert run_cli(capsys, "pack", good_folder(tmp_path / "good"), "--out", out, "--shard-size", "2")[0] == 0
    (out / "features").mkdir()  # the feature cache lives in the pack folder by default
    (out / "features" / "entry.bin").write_bytes(b"cached")
    before = folder_bytes(out)
    assert MANIFEST in before and REJECTED in before and sum(n.endswith(".tar") for n in before) >= 3

    bad = tmp_path / "bad"
    bad.mkdir()
    (bad / "one.png").write_bytes(b"not a png")
    (bad / "one.txt").write_text("a caption")
    photo(9).save(bad / "two.png")
    (bad / "two.txt").write_text("   ")
    code, err = run_cli(capsys, "pack", bad, "--out", out)

    assert_refused(code, err, "nothing usable", "2 samples seen, all rejected",
                   "the pack already there is unchanged", str(out / FAILED_PACK_REJECTED))
    after = folder_bytes(out)
    report = after.pop(FAILED_PACK_REJECTED)
    assert after == before  # manifest, every shard and rejected.jsonl, byte for byte
    assert (out / "features" / "entry.bin").read_bytes() == b"cached"
    assert not (out / PACK_STAGING).exists()
    reasons = sorted(json.loads(line)["reason"] for line in report.decode().splitlines())
    assert reasons == ["empty_caption", "unreadable_image"]
    table = load_table(out, "train")  # the old pack still reads as a whole
    assert len(table) == read_manifest(out)["splits"]["train"]["samples"]

    # the next pack that succeeds replaces the old one, and the failed attempt's report with it
    assert run_cli(capsys, "pack", good_folder(tmp_path / "good2", n=2), "--out", out, "--val-fraction", "0")[0] == 0
    assert not (out / FAILED_PACK_REJECTED).exists()
    assert read_manifest(out)["counts"]["packed"] == 2
    assert sorted(p.name for p in out.glob("*.tar")) == ["train-000000.tar"]


def test_an_out_path_that_is_a_file_is_refused_before_any_work(tmp_path, capsys):
    out = tmp_path / "notes.txt"
    out.write_text("keep me")
    code, err = run_cli(capsys, "pack", good_folder(tmp_path / "good"), "--out", out)
    assert_refused(code, err, f"--out {out} is a file")
    assert out.read_text() == "keep me"


# ---------------------------------------------------------------------------------------------
# 5: 16-bit images


def test_16_bit_images_are_scaled_to_8_bits_not_clipped(tmp_path, capsys):
    rng = np.random.default_rng(16)
    gray = rng.integers(0, 65536, (20, 28), dtype=np.uint16)
    rgb = rng.integers(0, 65536, (20, 28, 3), dtype=np.uint16)
    src = tmp_path / "sixteen"
    src.mkdir()
    Image.fromarray(gray).save(src / "gray-png.png")  # Pillow's mode I;16
    Image.fromarray(gray).save(src / "gray-tiff.tif")
    tifffile.imwrite(src / "rgb-tiff.tif", rgb, photometric="rgb")
    (src / "rgb-png.png").write_bytes(png_rgb16(rgb))
    for name in ("gray-png", "gray-tiff", "rgb-tiff", "rgb-png"):
        (src / f"{name}.txt").write_text(f"a 16-bit {name} image")
    assert Image.open(src / "gray-png.png").mode == "I;16" and Image.open(src / "gray-tiff.tif").mode == "I;16"

    out = tmp_path / "out"
    code, err = run_cli(capsys, "pack", src, "--out", out, "--val-fraction", "0")
    assert code == 0 and "Traceback" not in err, err
    assert read_manifest(out)["counts"]["packed"] == 4

    # numpy's reference: the high byte of each 16-bit sample (v >> 8, as Pillow keeps for 16-bit RGB)
    expected = {"gray-png": np.repeat((gray >> 8).astype(np.uint8)[..., None], 3, axis=2),
                "gray-tiff": np.repeat((gray >> 8).astype(np.uint8)[..., None], 3, axis=2),
                "rgb-tiff": (rgb >> 8).astype(np.uint8), "rgb-png": (rgb >> 8).astype(np.uint8)}
    decoded = dict(iter_images(out, "train"))
    assert sorted(decoded) == sorted(expected)
    for key, want in expected.items():
        got = np.asarray(decoded[key])
        assert got.dtype == np.uint8 and np.array_equal(got, want), key
        assert (got == 255).mean() < 0.02, key  # clipping turned 99.6% of such pixels to 255
    # align.load and the feature build decode the source bytes the same way
    assert np.array_equal(np.asarray(decode_image((src / "gray-png.png").read_bytes())), expected["gray-png"])


def test_floating_point_and_32_bit_images_are_counted_rejects(tmp_path, capsys):
    src = good_folder(tmp_path / "src", n=2)
    Image.fromarray(np.linspace(0, 1, 400, dtype=np.float32).reshape(20, 20)).save(src / "float.tif")
    Image.fromarray(np.arange(400, dtype=np.int32).reshape(20, 20) * 100_000).save(src / "wide.tif")
    for name in ("float", "wide"):
        (src / f"{name}.txt").write_text("a scientific image")
    out = tmp_path / "out"
    code, err = run_cli(capsys, "pack", src, "--out", out)
    assert code == 0 and "Traceback" not in err
    rejects = rejects_of(out)
    assert rejects["float"]["reason"] == rejects["wide"]["reason"] == "unsupported_pixels"
    assert "floating-point" in rejects["float"]["detail"] and "32-bit" in rejects["wide"]["detail"]
    assert read_manifest(out)["counts"]["packed"] == 2


# ---------------------------------------------------------------------------------------------
# 7: clear messages


@pytest.fixture
def packed_tiles(tmp_path, capsys) -> Path:
    out = tmp_path / "packed"
    assert run_cli(capsys, "pack", good_folder(tmp_path / "src", n=8), "--out", out, "--val-fraction", "0.3",
                   "--shard-size", "3")[0] == 0
    return out


@pytest.mark.parametrize("workers", [0, 1])
def test_a_truncated_shard_is_named_with_its_byte_offset(packed_tiles, tmp_path, capsys, workers):
    shard = packed_tiles / read_manifest(packed_tiles)["splits"]["train"]["shards"][0]
    second_image = _members(shard)[4]  # KEY.json, KEY.png, KEY.txt per sample
    cut = second_image.offset_data + second_image.size // 2
    shard.write_bytes(shard.read_bytes()[:cut])
    code, err = run_cli(capsys, "features", REPO / "recipes" / "lora-cpu.toml",
                        "--set", f"data.shards={json.dumps(str(packed_tiles))}", "--set", "vision.image_size=64",
                        "--set", f"vision.feature_cache={json.dumps(str(tmp_path / 'cache'))}",
                        "--set", f"vision.workers={workers}")
    # workers=1: the shard is read in a DataLoader worker, whose errors come back wrapped in a traceback
    assert_refused(code, err, f"shard {shard} is damaged", f"cut short at byte {cut:,}, inside member {second_image.name}",
                   "skips and counts single images that fail to decode, but stops at a damaged shard",
                   "align pack SOURCE")
    assert "BufferedReader" not in err  # no tuple's repr


def test_a_shard_cut_between_members_or_overwritten_is_named(packed_tiles):
    shard = packed_tiles / read_manifest(packed_tiles)["splits"]["train"]["shards"][0]
    intact = shard.read_bytes()
    # cut exactly after the first sample (3 members: header + data blocks each): no reader error of
    # its own, only a shorter split; the message still names the shard and the byte
    with pytest.raises(DataError) as cut:
        shard.write_bytes(intact[:_end_of_first_sample(shard)])
        load_table(packed_tiles, "train")
    assert "end-of-archive marker is missing" in cut.value.message and str(shard) in cut.value.message
    assert "align pack" in cut.value.hint

    garbage = bytearray(intact)
    start = _end_of_first_sample(shard)
    garbage[start:start + 512] = b"\xab" * 512  # the second sample's header overwritten
    shard.write_bytes(bytes(garbage))
    with pytest.raises(DataError) as overwritten:
        list(iter_images(packed_tiles, "train"))
    assert f"no readable tar header at byte {start:,}" in overwritten.value.message


def _members(shard: Path) -> list:
    with tarfile.open(shard) as tar:  # Python's tarfile: where each member's header and data lie
        return tar.getmembers()


def _end_of_first_sample(shard: Path) -> int:
    third = _members(shard)[2]
    return third.offset_data + -(-third.size // tarfile.BLOCKSIZE) * tarfile.BLOCKSIZE  # data padded to blocks


def test_a_csv_with_only_a_header_says_so(tmp_path, capsys):
    table = tmp_path / "pairs.csv"
    table.write_text("image,caption,glaze\n")
    code, err = run_cli(capsys, "pack", table, "--out", tmp_path / "out")
    assert_refused(code, err, "has a header row but no data rows")
    assert not (tmp_path / "out").exists()

    table.write_text("")
    assert_refused(*run_cli(capsys, "pack", table, "--out", tmp_path / "out"), "is empty: it has no header row")
    empty_lines = tmp_path / "pairs.jsonl"
    empty_lines.write_text("\n\n")
    assert_refused(*run_cli(capsys, "pack", empty_lines, "--out", tmp_path / "out"), "holds no rows")


def test_a_repeated_column_header_is_refused(tmp_path, capsys):
    photo(1).save(tmp_path / "a.png")
    table = tmp_path / "pairs.csv"
    table.write_text("image,caption,caption\na.png,first caption,second caption\n")
    code, err = run_cli(capsys, "pack", table, "--out", tmp_path / "out")
    assert_refused(code, err, "names column(s) 'caption' more than once", "give every column its own name")
    assert not (tmp_path / "out").exists()


def test_an_image_value_that_is_not_a_path_is_a_counted_reject(tmp_path, capsys):
    photo(1).save(tmp_path / "a.png")
    rows = [{"image": "a.png", "caption": "a good row"}, {"image": 5, "caption": "a number, not a path"},
            {"image": ["a.png"], "caption": "a list, not a path"}]
    (tmp_path / "pairs.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rows))
    out = tmp_path / "out"
    code, err = run_cli(capsys, "pack", tmp_path / "pairs.jsonl", "--out", out)
    assert code == 0 and "Traceback" not in err
    details = {r["source"].rsplit(":", 1)[1]: r for r in map(json.loads, (out / REJECTED).read_text().splitlines())}
    assert details["2"]["reason"] == details["3"]["reason"] == "bad_row"
    assert "'image' must be a path (text), got int 5" in details["2"]["detail"]
    assert "got list" in details["3"]["detail"]


def test_a_decompression_bomb_header_is_a_counted_reject_with_a_reason(tmp_path, capsys):
    src = good_folder(tmp_path / "src", n=2)
    limit = Image.MAX_IMAGE_PIXELS
    tiny_idat = zlib.compress(b"\x00" * 16)
    # just over the limit (Pillow warns) and over twice it (Pillow raises): headers only, a few bytes each
    (src / "warned.png").write_bytes(png_file(limit // 10_000 + 1, 10_000, 8, 0, tiny_idat))
    (src / "refused.png").write_bytes(png_file(30_000, 30_000, 8, 0, tiny_idat))
    for name in ("warned", "refused"):
        (src / f"{name}.txt").write_text("a huge header")
    out = tmp_path / "out"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        code, err = run_cli(capsys, "pack", src, "--out", out)
    assert code == 0 and "Traceback" not in err and "DecompressionBomb" not in err
    assert not [w for w in caught if issubclass(w.category, Image.DecompressionBombWarning)]
    rejects = rejects_of(out)
    assert rejects["warned"]["reason"] == rejects["refused"]["reason"] == "image_too_large"
    assert f"over the limit of {limit:,}" in rejects["warned"]["detail"]
    assert "900,000,000 pixels" in rejects["refused"]["detail"]
    assert read_manifest(out)["counts"]["packed"] == 2


def test_nan_and_infinity_labels_are_bad_labels(tmp_path, capsys):
    for i in range(3):
        photo(i).save(tmp_path / f"{i}.png")
    rows = [{"image": "0.png", "caption": "fine", "size": 30.5}, {"image": "1.png", "caption": "nan", "size": float("nan")},
            {"image": "2.png", "caption": "inf", "size": float("-inf")}]
    text = "".join(json.dumps(r) + "\n" for r in rows)
    assert "NaN" in text and "-Infinity" in text  # the literals Python's json writes and reads
    (tmp_path / "pairs.jsonl").write_text(text)
    out = tmp_path / "out"
    code, err = run_cli(capsys, "pack", tmp_path / "pairs.jsonl", "--out", out)
    assert code == 0 and "Traceback" not in err
    rejects = rejects_of(out)
    assert rejects["1"]["reason"] == rejects["2"]["reason"] == "bad_labels"
    assert "'size' is nan, not a finite number" in rejects["1"]["detail"]
    kept = load_table(out, "train") if read_manifest(out)["splits"]["train"]["samples"] else load_table(out, "val")
    assert kept.keys == ["0"] and kept.labels == [{"size": "30.5"}]

    folder = good_folder(tmp_path / "folder", n=2)
    (folder / "tile-1.json").write_text('{"weight": Infinity}')
    out2 = tmp_path / "out2"
    assert run_cli(capsys, "pack", folder, "--out", out2)[0] == 0
    assert rejects_of(out2)["tile-1"]["reason"] == "bad_labels"


# ---------------------------------------------------------------------------------------------
# 9: images outside the table's folder


@pytest.fixture
def table_with_outside_rows(tmp_path) -> tuple[Path, Path]:
    src, elsewhere = tmp_path / "src", tmp_path / "elsewhere"
    (src / "img").mkdir(parents=True)
    elsewhere.mkdir()
    photo(1).save(src / "img" / "inside.png")
    photo(2).save(elsewhere / "relative.png")
    photo(3).save(elsewhere / "absolute.png")
    photo(4).save(elsewhere / "linked.png")
    (src / "img" / "link.png").symlink_to(elsewhere / "linked.png")  # inside by name, outside in fact
    rows = ["image,caption", "img/inside.png,inside", "../elsewhere/relative.png,dot dot",
            f"{elsewhere / 'absolute.png'},absolute", "img/link.png,a symlink"]
    (src / "pairs.csv").write_text("\n".join(rows) + "\n")
    return src / "pairs.csv", elsewhere


def test_rows_naming_images_outside_the_tables_folder_are_refused(table_with_outside_rows, tmp_path, capsys):
    table, elsewhere = table_with_outside_rows
    out = tmp_path / "out"
    code, err = run_cli(capsys, "pack", table, "--out", out)
    assert_refused(code, err, "3 row(s)", f"name images outside {table.parent.resolve()}",
                   f"{table}:3 names {table.parent / '../elsewhere/relative.png'}",
                   f"--image-root {elsewhere.resolve()}")
    assert not out.exists()  # refused before anything is written


def test_image_root_allows_the_named_folder(table_with_outside_rows, tmp_path, capsys):
    table, elsewhere = table_with_outside_rows
    out = tmp_path / "out"
    code, err = run_cli(capsys, "pack", table, "--out", out, "--val-fraction", "0", "--image-root", elsewhere)
    assert code == 0 and "Traceback" not in err
    assert read_manifest(out)["counts"] == {"seen": 4, "packed": 4, "rejected": 0, "rejected_by_reason": {}}
    code, err = run_cli(capsys, "pack", table, "--out", out, "--image-root", tmp_path / "nowhere")
    assert_refused(code, err, "is not a folder")
