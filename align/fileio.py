"""Writing files and folders so a reader never sees half of one. Torch-free: every writer imports it.

- ``write_text_atomic`` / ``write_json_atomic`` / ``write_bytes_atomic``: the content goes to a
  temporary file beside the target, which is then renamed over it (a rename within one folder is
  atomic). The file gets the mode a plain ``open(path, "w")`` would give (0666 less the umask).
- ``swap_dir_in``: a finished folder replaces the previous one, which is removed only afterwards.
- ``open_permissions``: files made through ``tempfile`` are private (0600, folders 0700); an output
  meant to be shared (an export, an index) gets the umask's modes instead before it is swapped in
  (``publish_dir`` does both).
- ``check_output_dir``: an ``--out`` folder may be new, empty, or an earlier output of the same kind
  (recognised by its marker file); anything else is refused before work starts.
"""
from __future__ import annotations

import json
import os
import secrets
import shutil
from pathlib import Path

from .errors import AlignError


def write_bytes_atomic(path: Path, data: bytes) -> None:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    while True:  # a random name: two processes writing the same target never share a temporary
        temp = path.with_name(f".{path.name}.{secrets.token_hex(4)}.tmp")
        try:
            # 0o666 filtered by the umask by the kernel, as for a plain open(); no process-wide umask dance
            fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
            break
        except FileExistsError:
            continue
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(temp, path)
    except BaseException:
        temp.unlink(missing_ok=True)
        raise


def write_text_atomic(path: Path, text: str) -> None:
    write_bytes_atomic(path, text.encode("utf-8"))


def write_json_atomic(path: Path, data) -> None:
    write_text_atomic(path, json.dumps(data, indent=2, sort_keys=True) + "\n")


def swap_dir_in(temp: Path, final: Path) -> None:
    """Put a finished folder in place of ``final`` so a reader never sees half of one.

    The previous folder is moved aside first and removed only after the rename succeeded.
    """
    old = final.with_name(f".{final.name}.old")
    if old.exists():
        shutil.rmtree(old)
    if final.exists():
        os.replace(final, old)
    os.replace(temp, final)
    shutil.rmtree(old, ignore_errors=True)


def open_permissions(root: Path) -> None:
    """Temporary files are created private (0600); an output meant to be shared honours the umask."""
    umask = os.umask(0)
    os.umask(umask)
    for path in [root, *root.rglob("*")]:
        path.chmod((0o777 if path.is_dir() else 0o666) & ~umask)


def publish_dir(temp: Path, final: Path) -> None:
    """Put a finished output folder (export, index) in place of ``final``, readable by others: the
    folder was made private by ``tempfile``, and a previous one is replaced only now it is complete."""
    open_permissions(temp)
    swap_dir_in(temp, final)


def check_output_dir(out: Path, marker: str, what: str) -> None:
    """Refuse an ``--out`` that is a file, or a non-empty folder without ``marker`` (not an earlier ``what``)."""
    if out.exists() and not out.is_dir():
        raise AlignError(f"--out {out} is a file", "pass a folder path (it is created if missing)")
    if out.is_dir() and any(out.iterdir()) and not (out / marker).is_file():
        raise AlignError(f"--out {out} holds files that are not an align {what}", "pass an empty or new folder")
