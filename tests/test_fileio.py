"""align.fileio (atomic writes, folder swap, shared permissions, the --out check) and align.offline.

Outside references: POSIX ``rename(2)`` replaces the target in one step and ``open(2)`` applies the
umask to the requested mode (the reference for "the mode a plain open() gives" is ``Path.write_text``
itself, run beside ours); the environment variable names are those huggingface_hub, transformers and
tokenizers read.
"""
from __future__ import annotations

import json
import os
import stat

import pytest

from align.errors import AlignError
from align.fileio import (check_output_dir, open_permissions, swap_dir_in, write_bytes_atomic, write_json_atomic,
                          write_text_atomic)
from align.offline import OFFLINE_DEFAULTS, offline_env, use_offline_defaults


def _mode(path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


def test_atomic_writes_replace_whole_files_with_a_plain_files_mode(tmp_path):
    plain = tmp_path / "plain.txt"
    plain.write_text("x")  # the reference: what an ordinary write gives under this umask
    target = tmp_path / "deep" / "out.json"
    write_json_atomic(target, {"b": 1, "a": [1, 2]})
    assert target.read_text() == '{\n  "a": [\n    1,\n    2\n  ],\n  "b": 1\n}\n'  # sorted, indented, newline
    write_text_atomic(target, "ünïcode\n")
    assert target.read_bytes() == "ünïcode\n".encode("utf-8")
    write_bytes_atomic(target, b"\x00\x01")
    assert target.read_bytes() == b"\x00\x01"
    assert _mode(target) == _mode(plain)
    assert sorted(p.name for p in target.parent.iterdir()) == ["out.json"]  # no temporary left behind


def test_a_failed_write_leaves_the_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "keep.json"
    write_json_atomic(target, {"v": 1})
    with pytest.raises(TypeError):
        write_json_atomic(target, {"v": object()})  # fails while serialising: nothing is written
    with pytest.raises(TypeError):
        write_bytes_atomic(target, "not bytes")  # fails inside the write: the temporary is removed
    assert json.loads(target.read_text()) == {"v": 1}
    assert [p.name for p in tmp_path.iterdir()] == ["keep.json"]


def test_swap_dir_in_replaces_a_folder_whole(tmp_path):
    final, temp = tmp_path / "out", tmp_path / ".out.partial"
    final.mkdir()
    (final / "old.txt").write_text("old")
    temp.mkdir()
    (temp / "new.txt").write_text("new")
    swap_dir_in(temp, final)
    assert [p.name for p in final.iterdir()] == ["new.txt"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]  # the previous folder is gone, no leftovers


def test_open_permissions_gives_shared_outputs_the_umasks_modes(tmp_path):
    import tempfile

    reference_dir = tmp_path / "reference"
    reference_dir.mkdir()  # what mkdir gives under this umask
    out = tmp_path / "out"
    out.mkdir()
    folder = tempfile.mkdtemp(dir=out)  # private: 0700
    fd, name = tempfile.mkstemp(dir=folder)  # private: 0600
    os.close(fd)
    (tmp_path / "plain").write_text("x")
    open_permissions(out)
    assert _mode(out / os.path.basename(folder)) == _mode(reference_dir)
    assert _mode(out / os.path.basename(folder) / os.path.basename(name)) == _mode(tmp_path / "plain")


def test_check_output_dir(tmp_path):
    check_output_dir(tmp_path / "new", "index.json", "index")  # a new folder is fine
    (tmp_path / "empty").mkdir()
    check_output_dir(tmp_path / "empty", "index.json", "index")
    (tmp_path / "earlier").mkdir()
    (tmp_path / "earlier" / "index.json").write_text("{}")
    check_output_dir(tmp_path / "earlier", "index.json", "index")  # an earlier output of the same kind
    (tmp_path / "file").write_text("x")
    with pytest.raises(AlignError, match="is a file"):
        check_output_dir(tmp_path / "file", "index.json", "index")
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "notes.txt").write_text("mine")
    with pytest.raises(AlignError, match="not an align export") as err:
        check_output_dir(tmp_path / "other", "export.json", "export")
    assert err.value.hint


def test_offline_defaults_fill_gaps_and_keep_what_is_set(monkeypatch):
    env = offline_env({"HF_HUB_OFFLINE": "0"})
    assert env == {**OFFLINE_DEFAULTS, "HF_HUB_OFFLINE": "0"}  # the user's value wins
    assert OFFLINE_DEFAULTS == {"HF_HUB_OFFLINE": "1", "TRANSFORMERS_OFFLINE": "1", "TOKENIZERS_PARALLELISM": "false"}
    for name in OFFLINE_DEFAULTS:
        monkeypatch.delenv(name, raising=False)
    monkeypatch.setenv("TOKENIZERS_PARALLELISM", "true")
    use_offline_defaults()
    assert [os.environ[k] for k in ("HF_HUB_OFFLINE", "TRANSFORMERS_OFFLINE", "TOKENIZERS_PARALLELISM")] == \
        ["1", "1", "true"]
