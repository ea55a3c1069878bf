"""Pack a folder, CSV or JSONL of image-caption pairs into webdataset tar shards.

Every sample is checked before it is written (``pack_check.py``). A bad sample is skipped and
listed in ``rejected.jsonl`` with its reason; it never stops the pack.

Samples are written in key order (``pack_order.py``: the listing is sorted in runs on disk, so
memory does not grow with the source). ``workers`` > 1 checks and encodes samples in that many
processes (``pack_workers.py``) while this one appends their bytes in order: the shards, manifest,
``rejected.jsonl`` and content hash are byte-identical whatever the number of workers.

Nothing valid is lost: the new pack is written into a staging folder inside OUT and moved into
place only when it succeeded, ``manifest.json`` last, so a folder that has one is complete. A pack
that is killed leaves its finished shards there; the same command run again resumes from them
(``pack_stage.py``) and ends with the pack an uninterrupted run gives. A pack that packs nothing
leaves an earlier pack in OUT as it was and writes its report to ``rejected-of-failed-pack.jsonl``
beside it. Other files in OUT (the feature cache) are kept.

Reject reasons: ``unreadable_image``, ``missing_image``, ``image_too_large`` (the header claims more
pixels than Pillow's ``MAX_IMAGE_PIXELS``), ``unsupported_pixels`` (32-bit integer or floating-point
samples), ``missing_caption``, ``empty_caption``, ``caption_too_long``, ``not_utf8``, ``bad_labels``,
``duplicate_key``, and ``bad_row`` (a CSV/JSONL row that cannot be parsed, or whose image or caption
is not text). With stored vectors (``vectors.py``), a row needs no image but a vector, and the vector
reasons join these: ``missing_vector``, ``vector_wrong_width``, ``vector_not_finite``, ``vector_zero``,
``duplicate_vector_key``, ``unmatched_vector``.

Labels are stored as an object of strings (numbers and booleans are written as their JSON text,
null values are dropped), so evaluation can compare label values without caring where they came from.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
from collections import Counter
from pathlib import Path

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, ProgressColumn, TextColumn, TimeRemainingColumn
from rich.table import Table
from rich.text import Text

from ..artifacts import FAILED_PACK_REJECTED, MANIFEST, PACK_SORT_RUNS, REJECTED, SPLITS
from ..errors import DataError
from ..fileio import write_text_atomic
from .pack_check import Refused, split_of
from .pack_order import OrderedListing, blocks_of
from .pack_stage import StagedPack, commit, held, open_stage
from .pack_workers import block_size_for, checked_blocks, checking_pool
from .sources import Candidate, Reject, iter_source
from .vectors import StoredVectors, VectorSource

FORMAT_VERSION = 1


class _Rate(ProgressColumn):
    def render(self, task) -> Text:
        speed = task.finished_speed or task.speed
        return Text(f"{speed:,.0f} samples/s" if speed else "… samples/s")


def _progress(console: Console) -> Progress:
    return Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), _Rate(),
                    TimeRemainingColumn(), console=console, transient=True)


# ---------------------------------------------------------------------------------------------
# writing, in key order


def _take(staged: StagedPack, candidate: Candidate, outcome, val_fraction: float,
          vectors: StoredVectors | None) -> None:
    """One candidate's outcome into the stage. A key is only taken by a sample that was packed; a
    rejected first copy frees it. Equal keys are neighbours in key order, so the last packed key is
    the only one a candidate can repeat."""
    if candidate.key == staged.last_key:
        staged.reject(candidate, "duplicate_key", f"key {candidate.key!r} is already used by another sample")
        return
    if isinstance(outcome, Refused):
        staged.reject(candidate, outcome.reason, outcome.detail)
        return
    if vectors is not None:
        try:
            vectors.check(outcome.key)
        except Reject as rej:
            staged.reject(candidate, rej.reason, rej.detail)
            return
    split = split_of(outcome.key, val_fraction)
    staged.add(outcome, split)
    if vectors is not None:
        vectors.take(outcome.key, split)


def _write_samples(listing: OrderedListing, staged: StagedPack, pool, *, workers: int, val_fraction: float,
                   max_caption_chars: int, vectors: StoredVectors | None, console: Console) -> None:
    if vectors is not None:
        for split, key in staged.replayed:  # the samples of the shards a resumed pack keeps
            vectors.take(key, split)
    remaining = listing.count - staged.resumed_at
    blocks = blocks_of(listing.ordered(skip=staged.resumed_at), block_size_for(remaining, workers))
    with _progress(console) as progress:
        task = progress.add_task("packing", total=listing.count, completed=staged.resumed_at)
        for block, outcomes in checked_blocks(blocks, pool, workers=workers, max_chars=max_caption_chars,
                                              image_optional=vectors is not None):
            for candidate, outcome in zip(block, outcomes):
                _take(staged, candidate, outcome, val_fraction, vectors)
            progress.advance(task, len(block))
    staged.finish(vectors.unmatched(listing.keys) if vectors is not None else [])


def _manifest(source: Path, listing: OrderedListing, staged: StagedPack, val_fraction: float) -> dict:
    by_reason = staged.rejected_by_reason()
    splits = staged.progress["splits"]
    return {
        "format_version": FORMAT_VERSION,
        "source": str(source.resolve()),
        "counts": {"seen": listing.count, "packed": staged.progress["packed"], "rejected": sum(by_reason.values()),
                   "rejected_by_reason": by_reason},
        "splits": {split: {"samples": splits[split]["samples"], "shards": list(splits[split]["shards"]),
                           "content_hash": staged.split_hashes[split].hexdigest()} for split in SPLITS},
        "label_fields": sorted(staged.label_fields),
        "content_hash": staged.overall_hash.hexdigest(),
        "val_fraction": val_fraction,
    }


# ---------------------------------------------------------------------------------------------
# the output folder


def _refuse_empty(source: Path, out: Path, seen: int, rejects_text: str) -> None:
    """Nothing packed: report why, beside whatever OUT already holds, which stays as it was."""
    report = out / FAILED_PACK_REJECTED
    write_text_atomic(report, rejects_text)
    by_reason = Counter(json.loads(line)["reason"] for line in rejects_text.splitlines())
    kept = " (the pack already there is unchanged)" if (out / MANIFEST).is_file() else ""
    raise DataError(f"nothing usable in {source}: {seen} samples seen, all rejected; see {report}{kept}",
                    hint="fix the samples for these reasons and pack again: "
                         + ", ".join(f"{k} x{v}" for k, v in sorted(by_reason.items())))


def _summary(console: Console, manifest: dict, rejected_path: Path) -> None:
    table = Table(title=f"packed {manifest['source']}", show_edge=False)
    table.add_column("")
    table.add_column("samples", justify="right")
    table.add_column("shards", justify="right")
    for split in SPLITS:
        info = manifest["splits"][split]
        table.add_row(split, str(info["samples"]), str(len(info["shards"])))
    for reason, count in sorted(manifest["counts"]["rejected_by_reason"].items()):
        table.add_row(f"[yellow]rejected: {reason}[/]", str(count), "")
    console.print(table)
    if manifest["counts"]["rejected"]:
        console.print(f"rejected samples are listed in {rejected_path}")


def _check_options(val_fraction: float, shard_size: int, max_caption_chars: int, workers: int) -> None:
    if not 0.0 <= val_fraction <= 1.0:  # also refuses NaN, which fails every comparison
        raise DataError(f"val_fraction must be between 0 and 1, got {val_fraction}",
                        hint="use 0.1 to hold out about a tenth, 1.0 for an evaluation-only set")
    if shard_size < 1:
        raise DataError(f"shard_size must be at least 1, got {shard_size}", hint="use e.g. --shard-size 1000")
    if max_caption_chars < 1:
        raise DataError(f"max_caption_chars must be at least 1, got {max_caption_chars}",
                        hint="use e.g. --max-caption-chars 1000")
    if workers < 1:
        raise DataError(f"workers must be at least 1, got {workers}",
                        hint=f"use e.g. --workers {os.cpu_count() or 1} (one per core)")


def _file_state(path: Path | None) -> list | None:
    if path is None or not path.is_file():
        return None
    stat = path.stat()
    return [str(path.resolve()), stat.st_size, stat.st_mtime_ns]


def _pack_fingerprint(source: Path, listing: OrderedListing, options: dict, vectors: VectorSource | None) -> str:
    """What a staged pack's bytes depend on: the listing and every option but the worker count."""
    stored = None if vectors is None else {
        "file": _file_state(vectors.path), "keys": _file_state(vectors.keys), "model": vectors.model,
        "columns": [vectors.key_column, vectors.vector_column], "dim": vectors.dim}
    record = {"format_version": FORMAT_VERSION, "source": str(source.resolve()),
              "listing": listing.fingerprint, "options": options, "vectors": stored}
    return hashlib.sha256(json.dumps(record, sort_keys=True, default=str).encode("utf-8")).hexdigest()


def _list(source: Path, stage: Path, image_roots: list[Path], keep_keys: bool, console: Console) -> OrderedListing:
    """The whole listing, before anything is checked: a bad source packs nothing."""
    runs = stage / PACK_SORT_RUNS
    shutil.rmtree(runs, ignore_errors=True)  # a killed pack's runs: this listing makes its own
    with _progress(console) as progress:
        task = progress.add_task("listing", total=None)

        def counted():
            for listed, candidate in enumerate(iter_source(source, image_roots), start=1):
                if listed % 256 == 0:  # the bar takes a lock per update: not once per file
                    progress.update(task, completed=listed)
                yield candidate
        return OrderedListing(counted(), runs, keep_keys=keep_keys)


def _drop_unused(stage: Path, out: Path, out_existed: bool) -> None:
    """After a failed listing: the stage (and OUT) this run made, unless a killed pack's shards are there."""
    shutil.rmtree(stage / PACK_SORT_RUNS, ignore_errors=True)
    for folder in (stage, out) if not out_existed else (stage,):
        if folder.is_dir() and not any(folder.iterdir()):
            folder.rmdir()


def pack_source(source: str | Path, out: str | Path, *, val_fraction: float = 0.1, shard_size: int = 1000,
                max_caption_chars: int = 1000, image_roots: list[str | Path] | tuple = (),
                console: Console | None = None, vectors: VectorSource | None = None, workers: int = 1) -> dict:
    """Validate SOURCE and put shards, ``rejected.jsonl`` and (last) ``manifest.json`` into OUT.

    ``image_roots``: folders besides a CSV/JSONL's own that its rows may name images in.
    ``vectors``: stored vectors, matched to the samples by key (see ``vectors.py``).
    ``workers``: processes that check and encode samples (the result is the same for any number).
    A pack interrupted earlier with the same source and options resumes from its finished shards.
    """
    console = console or Console()
    source, out = Path(source), Path(out)
    _check_options(val_fraction, shard_size, max_caption_chars, workers)
    roots = [Path(r) for r in image_roots]
    stored = StoredVectors(vectors) if vectors is not None else None
    options = {"val_fraction": val_fraction, "shard_size": shard_size, "max_caption_chars": max_caption_chars,
               "image_roots": [str(r.resolve()) for r in roots]}
    out_existed = out.exists()
    stage = open_stage(out)
    with held(stage, out), checking_pool(workers) as pool:  # the workers start while the listing is read
        try:
            listing = _list(source, stage, roots, stored is not None, console)
        except BaseException:
            _drop_unused(stage, out, out_existed)
            raise
        try:
            manifest = _pack_into(stage, source, out, listing, options, stored, console,
                                  _pack_fingerprint(source, listing, options, vectors), pool=pool, workers=workers)
        finally:
            listing.close()
    _summary(console, manifest, out / REJECTED)
    return manifest


def _pack_into(stage: Path, source: Path, out: Path, listing: OrderedListing, options: dict,
               vectors: StoredVectors | None, console: Console, fingerprint: str, *, pool, workers: int) -> dict:
    """Everything into STAGE, then into OUT. A failure leaves the stage for the next run to resume
    from; only a pack that packed nothing removes it (there is nothing to resume)."""
    try:
        staged = StagedPack(stage, fingerprint, options["shard_size"])
        if staged.resumed_at:
            console.print(f"resuming an interrupted pack: {staged.resumed_at:,} of {listing.count:,} samples "
                          f"are in finished shards")
        _write_samples(listing, staged, pool, workers=workers, val_fraction=options["val_fraction"],
                       max_caption_chars=options["max_caption_chars"], vectors=vectors, console=console)
        if not staged.progress["packed"]:
            rejects = staged.rejects_text()
            shutil.rmtree(stage)
            _refuse_empty(source, out, listing.count, rejects)
        manifest = _manifest(source, listing, staged, options["val_fraction"])
        if vectors is not None:
            manifest["vectors"] = vectors.write_entries(stage, manifest["splits"])
        (stage / MANIFEST).write_text(json.dumps(manifest, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
        commit(stage, out, [name for split in SPLITS for name in manifest["splits"][split]["shards"]])
    except OSError as exc:  # a full disk, a folder that turned read-only
        raise DataError(f"cannot write the pack into {out}: {exc.strerror or exc}",
                        hint="free some space or pass another --out, then run the same command again: it "
                             "resumes from the finished shards; an earlier pack there is unchanged") from None
    return manifest
