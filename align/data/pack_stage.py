"""The staging folder a pack writes into (``OUT/.pack.partial``): samples appended in key order,
a progress record after every finished shard, a resumed pack picking up there, the final commit.

A shard is written under a temporary name (``train-000003.tar.partial``) and renamed when full;
then the progress record (``progress.json``, written atomically) says how far into the key-ordered
listing everything is written: the finished shards of both splits, how many bytes of each split's
open shard, of ``rejected.jsonl`` and of the content hash's lines (``content-records.txt``) belong
to that point, the counts so far. A pack killed at any moment and run again with the same source
and options (the same listing fingerprint) cuts those files back to the recorded lengths,
recomputes the hashes from the recorded lines and goes on from that candidate: the bytes it
appends are the bytes the first run would have appended, so the result is the uninterrupted one.
Anything else in the staging folder (a shard renamed after the last record, a manifest) is removed.

Nothing is written half into OUT: only ``commit`` moves the pack there, ``manifest.json`` last.
"""
from __future__ import annotations

import fcntl
import hashlib
import json
import os
import re
import shutil
import tarfile
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from ..artifacts import (FAILED_PACK_REJECTED, MANIFEST, PACK_OPEN_SHARD, PACK_PROGRESS, PACK_RECORDS,
                         PACK_SORT_RUNS, PACK_STAGING, REJECTED, SHARD_PATTERN, SPLITS)
from ..errors import DataError
from ..fileio import write_json_atomic
from .pack_check import Checked
from .sources import Candidate
from .vectors import replace_stored_entries

_SHARD_NAME = re.compile(r"^(%s)-\d{6}\.tar$" % "|".join(SPLITS))
_END_OF_ARCHIVE = tarfile.NUL * (2 * tarfile.BLOCKSIZE)


def open_stage(out: Path) -> Path:
    """The staging folder inside OUT (same file system, so moving files out of it is a rename),
    with whatever an interrupted pack left in it."""
    if out.exists() and not out.is_dir():
        raise DataError(f"--out {out} is a file", hint="pass a folder path (it is created if missing)")
    stage = out / PACK_STAGING
    try:
        stage.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise DataError(f"cannot write into --out {out}: {exc.strerror or exc}",
                        hint="pass a folder you can write to") from None
    return stage


@contextmanager
def held(stage: Path, out: Path) -> Iterator[None]:
    """One pack at a time writes into OUT: a second one would resume from, and write over, the
    first one's shards."""
    descriptor = os.open(stage, os.O_RDONLY)
    try:
        try:
            fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)  # released when the descriptor closes
        except BlockingIOError:
            raise DataError(f"another align pack is writing into {out}",
                            hint="wait for it to finish, or pass another --out") from None
        yield
    finally:
        os.close(descriptor)


def _fresh_split() -> dict:
    return {"shards": [], "samples": 0, "open_samples": 0, "open_bytes": 0}


class StagedPack:
    """The pack being written into STAGE, in key order, resumable from its last progress record."""

    def __init__(self, stage: Path, fingerprint: str, shard_size: int):
        self.stage, self.fingerprint, self.shard_size = stage, fingerprint, shard_size
        self.progress = self._resumable_progress() or self._fresh_progress()
        self.resumed_at = self.progress["position"]
        self._remove_unrecorded()
        self.split_hashes = {split: hashlib.sha256() for split in SPLITS}
        self.overall_hash = hashlib.sha256()
        self.replayed: list[tuple[str, str]] = []  # (split, key) of every sample packed before resuming
        self.label_fields = set(self.progress["label_fields"])
        self._replay_records()
        self._records = self._append(PACK_RECORDS, self.progress["records_bytes"])
        self._rejects = self._append(REJECTED, self.progress["rejects_bytes"])
        self._shards = {split: None for split in SPLITS}
        for split in SPLITS:
            if self.progress["splits"][split]["open_samples"]:
                self._shards[split] = self._append(self._open_name(split), self.progress["splits"][split]["open_bytes"])

    # -- resuming -------------------------------------------------------------------------------

    def _fresh_progress(self) -> dict:
        return {"fingerprint": self.fingerprint, "position": 0, "splits": {s: _fresh_split() for s in SPLITS},
                "last_key": None, "packed": 0, "rejected_by_reason": {}, "label_fields": [],
                "records_bytes": 0, "rejects_bytes": 0}

    def _resumable_progress(self) -> dict | None:
        """The last progress record, if it belongs to this listing and every file it names is there
        (an open shard renamed after the record is put back under its temporary name first)."""
        try:
            progress = json.loads((self.stage / PACK_PROGRESS).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        if not isinstance(progress, dict) or progress.get("fingerprint") != self.fingerprint:
            return None
        try:
            lengths = {PACK_RECORDS: progress["records_bytes"], REJECTED: progress["rejects_bytes"]}
            for split in SPLITS:
                info = progress["splits"][split]
                if any(not (self.stage / name).is_file() for name in info["shards"]):
                    return None
                if info["open_samples"]:
                    name = self._shard_name(split, len(info["shards"]))
                    lengths[PACK_OPEN_SHARD.format(name=name)] = info["open_bytes"]
                    self._reopen(name)
        except (KeyError, TypeError):
            return None
        for name, length in lengths.items():
            path = self.stage / name
            if (length and not path.is_file()) or (path.is_file() and path.stat().st_size < length):
                return None
        return progress

    def _reopen(self, name: str) -> None:
        """A kill between a shard's rename and the next progress record: its recorded bytes are
        still the first bytes of the renamed file, which goes back under its temporary name."""
        if not (self.stage / PACK_OPEN_SHARD.format(name=name)).exists() and (self.stage / name).is_file():
            os.replace(self.stage / name, self.stage / PACK_OPEN_SHARD.format(name=name))

    def _remove_unrecorded(self) -> None:
        """Everything in the stage the progress record does not speak for (the sorted runs are this
        run's own and stay)."""
        kept = {PACK_PROGRESS, PACK_RECORDS, REJECTED, PACK_SORT_RUNS}
        for split in SPLITS:
            kept.update(self.progress["splits"][split]["shards"])
            if self.progress["splits"][split]["open_samples"]:
                kept.add(self._open_name(split))
        for path in self.stage.iterdir():
            if path.name not in kept:
                shutil.rmtree(path) if path.is_dir() and not path.is_symlink() else path.unlink()
        if not self.progress["position"]:
            for name in (PACK_PROGRESS, PACK_RECORDS, REJECTED):
                (self.stage / name).unlink(missing_ok=True)

    def _replay_records(self) -> None:
        """The hashes as they stood at the progress record, from the lines it covers."""
        if not self.progress["records_bytes"]:
            return
        with open(self.stage / PACK_RECORDS, "rb") as stream:
            data = stream.read(self.progress["records_bytes"])
        for line in data.splitlines(keepends=True):
            split, record = line.split(b"\t", 1)
            self.split_hashes[split.decode()].update(record)
            self.overall_hash.update(record)
            self.replayed.append((split.decode(), json.loads(record)[0]))

    def _append(self, name: str, length: int):
        """NAME opened for appending after its first LENGTH bytes (anything later is cut off)."""
        stream = open(self.stage / name, "ab")
        stream.truncate(length)
        stream.seek(length)
        return stream

    # -- writing --------------------------------------------------------------------------------

    @staticmethod
    def _shard_name(split: str, index: int) -> str:
        return SHARD_PATTERN.format(split=split, index=index)

    def _open_name(self, split: str) -> str:
        return PACK_OPEN_SHARD.format(name=self._shard_name(split, len(self.progress["splits"][split]["shards"])))

    @property
    def last_key(self) -> str | None:
        return self.progress["last_key"]

    def reject(self, candidate: Candidate, reason: str, detail: str) -> None:
        record = {"source": candidate.source, "key": candidate.key, "reason": reason, "detail": detail}
        self._rejects.write((json.dumps(record, ensure_ascii=False) + "\n").encode("utf-8"))
        counts = self.progress["rejected_by_reason"]
        counts[reason] = counts.get(reason, 0) + 1
        self.progress["position"] += 1

    def add(self, checked: Checked, split: str) -> None:
        info = self.progress["splits"][split]
        if self._shards[split] is None:
            self._shards[split] = self._append(self._open_name(split), 0)
        self._shards[split].write(checked.members)
        info["open_bytes"] += len(checked.members)
        info["open_samples"] += 1
        info["samples"] += 1
        self._records.write(split.encode() + b"\t" + checked.record)
        self.split_hashes[split].update(checked.record)
        self.overall_hash.update(checked.record)
        self.label_fields.update(checked.label_fields)
        self.progress["last_key"] = checked.key
        self.progress["packed"] += 1
        self.progress["position"] += 1
        if info["open_samples"] >= self.shard_size:
            self._finish_shard(split)
            self._record_progress()

    def _finish_shard(self, split: str) -> None:
        """End-of-archive blocks and padding as ``tarfile`` closes a written archive, then the rename
        that makes the shard complete."""
        info, stream = self.progress["splits"][split], self._shards[split]
        size = info["open_bytes"] + len(_END_OF_ARCHIVE)
        stream.write(_END_OF_ARCHIVE + tarfile.NUL * (-size % tarfile.RECORDSIZE))
        stream.close()
        name = self._shard_name(split, len(info["shards"]))
        os.replace(self.stage / PACK_OPEN_SHARD.format(name=name), self.stage / name)
        info["shards"].append(name)
        info["open_samples"] = info["open_bytes"] = 0
        self._shards[split] = None

    def _record_progress(self) -> None:
        """Every byte the record counts is on disk before the record says so."""
        for stream in (self._records, self._rejects, *(s for s in self._shards.values() if s is not None)):
            stream.flush()
            os.fsync(stream.fileno())
        self.progress["records_bytes"] = self._records.tell()
        self.progress["rejects_bytes"] = self._rejects.tell()
        self.progress["label_fields"] = sorted(self.label_fields)
        write_json_atomic(self.stage / PACK_PROGRESS, self.progress)

    def finish(self, extra_rejects: list[dict]) -> None:
        """The last, partly filled shards closed; rejects found after the listing appended."""
        for split in SPLITS:
            if self._shards[split] is not None:
                self._finish_shard(split)
        for record in extra_rejects:
            self._rejects.write((json.dumps(record, ensure_ascii=False) + "\n").encode("utf-8"))
            counts = self.progress["rejected_by_reason"]
            counts[record["reason"]] = counts.get(record["reason"], 0) + 1
        self.close()

    def close(self) -> None:
        for stream in (self._records, self._rejects, *(s for s in self._shards.values() if s is not None)):
            stream.close()

    def rejects_text(self) -> str:
        return (self.stage / REJECTED).read_text(encoding="utf-8")

    def rejected_by_reason(self) -> dict:
        return dict(sorted(Counter(self.progress["rejected_by_reason"]).items()))


def commit(stage: Path, out: Path, shards: list[str]) -> None:
    """Move the finished pack from STAGE into OUT. The old manifest goes first: for the few renames
    until the new one lands, readers refuse the folder instead of mixing two packs."""
    (out / MANIFEST).unlink(missing_ok=True)
    for name in shards:
        os.replace(stage / name, out / name)
    for path in out.iterdir():  # shards of an earlier, larger pack would otherwise look current
        if _SHARD_NAME.match(path.name) and path.name not in shards:
            path.unlink()
    os.replace(stage / REJECTED, out / REJECTED)
    replace_stored_entries(stage, out)  # stored vectors: this pack's, or none
    (out / FAILED_PACK_REJECTED).unlink(missing_ok=True)  # it spoke of an attempt this pack replaces
    os.replace(stage / MANIFEST, out / MANIFEST)
    shutil.rmtree(stage)  # the progress record, the content lines, the sorted runs
