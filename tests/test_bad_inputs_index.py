"""Bad inputs to ``align index`` and ``align query``: damaged index folders, bad adopted vectors, bad
filters, non-finite numbers. Each ends with exit code 2, a message and a hint on stderr, no traceback,
and nothing written or changed; ``--json`` output is strict JSON (Python's parser with every
non-finite constant refused, RFC 8259 having no NaN).

The damage is made here, to copies of one index of the session's tiny LoRA export (tests/conftest.py).
"""
from __future__ import annotations

import json
import shutil

import numpy as np
import pytest

from align import artifacts as A
from align.cli import main as cli_main


@pytest.fixture(scope="module")
def index_dir(tiny_lora_run, small_digits_shards, tmp_path_factory):
    out = tmp_path_factory.mktemp("bad-index") / "index"
    assert cli_main(["index", str(tiny_lora_run.export), str(small_digits_shards), "--out", str(out),
                     "--ann", "yes"]) == 0
    return out


def _copy(index_dir, tmp_path):
    copy = tmp_path / "index"
    shutil.copytree(index_dir, copy)
    return copy


def _refused(capsys, argv: list[str], *needles: str) -> tuple[str, str]:
    """Run the CLI, expect a refusal; returns (stderr as one line, stdout)."""
    capsys.readouterr()
    code = cli_main(argv)
    captured = capsys.readouterr()
    err = " ".join(captured.err.split())  # rich wraps long lines
    assert code == 2, err
    assert "error:" in err and "hint:" in err and "Traceback" not in err, err
    packed = "".join(err.split())  # rich may break a long path anywhere, even inside a name
    for needle in needles:
        assert "".join(needle.split()) in packed, (needle, err)
    return err, captured.out


def _strict_json(text: str):
    def refuse(constant):
        raise ValueError(f"bare {constant} in JSON output")
    return json.loads(text, parse_constant=refuse)


def test_query_on_truncated_vectors(index_dir, tmp_path, capsys):
    copy = _copy(index_dir, tmp_path)
    path = copy / A.INDEX_EMBEDDINGS
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    _refused(capsys, ["query", str(copy), "a seven"], "embeddings.npy is damaged or truncated", "align index")
    path.write_bytes(b"")  # cut inside the header
    _refused(capsys, ["query", str(copy), "a seven"], "embeddings.npy is damaged or truncated")


def test_query_on_missing_or_short_keys(index_dir, tmp_path, capsys):
    copy = _copy(index_dir, tmp_path)
    keys = copy / A.INDEX_KEYS
    lines = keys.read_text().splitlines()
    keys.write_text("".join(k + "\n" for k in lines[:-1]))
    _refused(capsys, ["query", str(copy), "a seven"], f"{len(lines) - 1} keys")
    keys.unlink()
    _refused(capsys, ["query", str(copy), "a seven"], "keys.txt is missing")


def test_query_on_damaged_index_json_labels_or_parquet(index_dir, tmp_path, capsys):
    copy = _copy(index_dir, tmp_path)
    (copy / A.INDEX_LABEL_CODES).write_bytes(b"\x93NUMPY garbage")
    _refused(capsys, ["query", str(copy), "a seven"], "label_codes.npy is damaged")
    (copy / A.INDEX_INFO).write_text("{not json")
    _refused(capsys, ["query", str(copy), "a seven"], "index.json is not valid JSON")
    # an index whose vectors live only in its Parquet file, cut short
    only = _copy(index_dir, tmp_path / "parquet-only")
    info = json.loads((only / A.INDEX_INFO).read_text())
    (only / A.INDEX_INFO).write_text(json.dumps({**info, "format": "parquet"}))
    (only / A.INDEX_EMBEDDINGS).unlink()
    (only / A.INDEX_KEYS).unlink()
    parquet = only / A.INDEX_PARQUET
    parquet.write_bytes(parquet.read_bytes()[:1000])
    _refused(capsys, ["query", str(only), "a seven"], "gallery.parquet is damaged or truncated")


def test_query_on_damaged_approximate_index_points_to_exact(index_dir, tmp_path, capsys):
    copy = _copy(index_dir, tmp_path)
    ann = copy / A.INDEX_ANN
    ann.write_bytes(ann.read_bytes()[:200])
    _refused(capsys, ["query", str(copy), "a seven"], "approximate.faiss is damaged", "--exact")
    capsys.readouterr()
    assert cli_main(["query", str(copy), "a seven", "--exact", "--json"]) == 0  # exact search still answers
    assert _strict_json(capsys.readouterr().out)["backend"] == "numpy"
    ann.unlink()
    _refused(capsys, ["query", str(copy), "a seven", "--backend", "ann"], "approximate.faiss is missing")


def test_bad_filters(index_dir, capsys):
    _refused(capsys, ["query", str(index_dir), "a seven", "--where", "digit"], "is not FIELD=VALUE")
    _refused(capsys, ["query", str(index_dir), "a seven", "--where", "glaze=cobalt"], "no label field 'glaze'",
             "label fields here: digit")
    _refused(capsys, ["query", str(index_dir), "a seven", "--faiss", "--exact"], "give one of them")


@pytest.mark.parametrize("value,what", [(np.nan, "non-finite values"), (0.0, "zeros")])
def test_adopted_vectors_name_the_bad_row(index_dir, tiny_lora_run, small_digits_shards, tmp_path, capsys,
                                          value, what):
    keys = (index_dir / A.INDEX_KEYS).read_text().splitlines()
    rows = np.load(index_dir / A.INDEX_EMBEDDINGS).copy()
    rows[123] = value
    rows[200, 5] = np.inf
    np.save(tmp_path / "mine.npy", rows)
    (tmp_path / "mine.txt").write_text("".join(k + "\n" for k in keys))
    out = tmp_path / "adopted"
    _refused(capsys, ["index", str(tiny_lora_run.export), str(small_digits_shards), "--out", str(out),
                      "--embeddings", str(tmp_path / "mine.npy"), "--keys", str(tmp_path / "mine.txt")],
             f"embedding row 123 (key '{keys[123]}') holds {what}", "2 such rows in all: 123, 200")
    assert not out.exists() and not list(tmp_path.glob(".adopted*"))  # nothing half-written


def test_query_json_is_strict_with_non_finite_gallery_rows(index_dir, tmp_path, capsys):
    copy = _copy(index_dir, tmp_path)
    rows = np.load(copy / A.INDEX_EMBEDDINGS)
    rows[4] = np.nan  # damage an index by hand: the build itself refuses such rows
    np.save(copy / A.INDEX_EMBEDDINGS, rows)
    capsys.readouterr()
    assert cli_main(["query", str(copy), "a seven", "-k", str(len(rows)), "--exact", "--json"]) == 0
    out = capsys.readouterr().out
    answer = _strict_json(out)
    results = answer["queries"][0]["results"]
    keys = (copy / A.INDEX_KEYS).read_text().splitlines()
    assert len(results) == len(rows) and results[-1] == {"rank": len(rows), "key": keys[4], "score": None}
    assert all(isinstance(r["score"], float) for r in results[:-1])


def test_query_with_a_non_finite_text_encoder(index_dir, tiny_lora_run, tmp_path, capsys):
    from safetensors.torch import load_file, save_file

    export = tmp_path / "export"
    shutil.copytree(tiny_lora_run.export, export)
    path = export / A.EXPORT_TEXT_ENCODER / A.PROJECTION
    weight = load_file(str(path))["weight"]
    weight[0, 0] = float("nan")
    save_file({"weight": weight}, str(path))
    _, out = _refused(capsys, ["query", str(index_dir), "a seven", "--json", "--export", str(export)],
                      "non-finite embedding for 'a seven'", "export the run again")
    assert out == ""  # nothing on stdout: no half answer, no NaN
