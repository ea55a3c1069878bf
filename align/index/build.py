"""``align index``: embed (or adopt) a gallery for an export and write the index folder.

The folder is written under a temporary name and swapped in whole. What goes in it:

    --format both (default)  embeddings.npy + keys.txt (searched, memory-mapped) and gallery.parquet
    --format npy             embeddings.npy + keys.txt only
    --format parquet         gallery.parquet only (the vectors are searched from it)
    always                   index.json; labels.json + label_codes.npy when the samples have labels
    --ann auto|yes|no        approximate.faiss: built when the gallery holds at least
                             ``ANN_AUTO_VALUES`` numbers (auto), always, or never
"""
from __future__ import annotations

import hashlib
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
from rich.console import Console

from .. import artifacts as A
from ..api import AlignedModel, load, read_export
from ..errors import AlignError, DataError
from ..fileio import check_output_dir, publish_dir, write_json_atomic
from .adopt import ADOPT_SAMPLE, ROW_BLOCK, adopt_embeddings, refuse_bad_rows
from .ann import build_approximate, save_approximate
from .filters import LabelTable
from .parquet import write_gallery_parquet
from .sources import captions_and_labels, embed_folder, embed_packed, is_packed

FORMAT_VERSION = 2  # 2: optional gallery.parquet, labels, approximate.faiss; embeddings.npy may be absent
FORMATS = ("both", "npy", "parquet")
ANN_CHOICES = ("auto", "yes", "no")
# the approximate index is built (auto) from 50,000 images of a 1280-wide tower up: there one exact
# query scans 256 MB and took 35 ms p50 on this project's 2-core machine (10k: 4 ms, 100k: 51-63 ms),
# more than embedding the query text; building the index there takes ~10 s (100k: 18 s)
ANN_AUTO_VALUES = 50_000 * 1280
PROBE_QUERIES = 200  # queries tuning nprobe, and as many more held out to report recall@10


def write_unit_rows(path: Path, rows: np.ndarray, keys: list[str]) -> None:
    """Save (N, D) as float32 with every row L2-normalised, in slices (a memory map is never read whole).

    A row of zeros or non-finite values is refused by its number and key, every such row counted.
    """
    out = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=rows.shape)
    bad: list[int] = []
    for start in range(0, rows.shape[0], ROW_BLOCK):
        block = np.asarray(rows[start:start + ROW_BLOCK], dtype=np.float64)  # (b, D)
        norms = np.linalg.norm(block, axis=1, keepdims=True)
        broken = ~np.isfinite(block).all(axis=1) | (norms[:, 0] == 0)
        bad += (start + np.flatnonzero(broken)).tolist()
        out[start:start + len(block)] = block / np.where(broken[:, None], 1.0, norms)
    out.flush()
    del out
    refuse_bad_rows(rows, keys, bad=bad)


def export_identity(export_dir: Path) -> dict:
    """What names the export a gallery was built for: its folder, export.json's hash and what it records."""
    export_dir, info, _ = read_export(export_dir)
    return {"export_dir": str(export_dir.resolve()),
            "export_json_sha256": hashlib.sha256((export_dir / A.EXPORT_INFO).read_bytes()).hexdigest(),
            "kind": info.get("kind"), "embedding_dim": info.get("embedding_dim"), "run_dir": info.get("run_dir"),
            "checkpoint": info.get("checkpoint"), "align_version": info.get("align_version")}


def wants_approximate(choice: str, rows: int, dim: int) -> bool:
    if choice not in ANN_CHOICES:
        raise AlignError(f"--ann {choice!r} is not one of {', '.join(ANN_CHOICES)}")
    return choice == "yes" or (choice == "auto" and rows * dim >= ANN_AUTO_VALUES)


def _gallery(model: AlignedModel, source: Path, embeddings, keys, sample: int, console: Console):
    """(keys, (N, D) rows, skipped keys, how it was built)."""
    if embeddings is not None:
        row_keys, rows = adopt_embeddings(model, source, Path(embeddings), Path(keys), sample, console)
        return row_keys, rows, [], {"built": "adopted", "embeddings_file": str(Path(embeddings).resolve()),
                                    "checked_sample": min(sample, len(row_keys))}
    if is_packed(source):
        return *embed_packed(model, source, console), {"built": "embedded", "source_kind": "packed"}
    return *embed_folder(model, source, console), {"built": "embedded", "source_kind": "folder"}


def _probe_queries(model: AlignedModel, vectors: np.ndarray, captions: list[str | None], seed: int = 0):
    """Tuning and held queries: the gallery's own captions, embedded, when it has enough; else gallery
    rows (each then leaves itself out of both rankings). Returns (tune, held, tune_self, held_self, what)."""
    rng = np.random.default_rng(seed)
    texts = sorted({c for c in captions if c})
    if len(texts) >= 2 * PROBE_QUERIES:
        picked = [texts[i] for i in rng.choice(len(texts), 2 * PROBE_QUERIES, replace=False)]
        queries = model.embed_text(picked)  # (2Q, D)
        return queries[:PROBE_QUERIES], queries[PROBE_QUERIES:], None, None, "captions of the gallery"
    count = min(2 * PROBE_QUERIES, vectors.shape[0])
    rows = rng.choice(vectors.shape[0], count, replace=False)
    tune_rows, held_rows = np.sort(rows[:count // 2]), np.sort(rows[count // 2:])
    return (np.asarray(vectors[tune_rows], dtype=np.float32), np.asarray(vectors[held_rows], dtype=np.float32),
            tune_rows, held_rows, "gallery rows (self excluded)")


def _write_approximate(temp: Path, vectors: np.ndarray, model: AlignedModel, captions, console: Console) -> dict:
    tune, held, tune_self, held_self, what = _probe_queries(model, vectors, captions)
    with console.status("building the approximate index"):
        index, report = build_approximate(vectors, tune, held, tune_self=tune_self, held_self=held_self)
    save_approximate(index, temp / A.INDEX_ANN)
    report["queries"] = what
    console.print(f"approximate index: built in {report['build_seconds']:.1f}s (+{report['tune_seconds']:.1f}s "
                  f"tuning nprobe={report['nprobe']} of {report['nlist']} lists); recall@10 vs exact "
                  f"{report['recall_at_10']:.3f} on {report['held_queries']} held queries ({what})")
    return report


def build_index(export_dir: str | Path, source: str | Path, out: str | Path, *, weights: str | Path | None = None,
                embeddings: str | Path | None = None, keys: str | Path | None = None, sample: int = ADOPT_SAMPLE,
                fmt: str = "both", ann: str = "auto", console: Console | None = None) -> dict:
    """Embed (or adopt) a gallery for ``export_dir`` into the index folder ``out``; returns index.json."""
    console = console or Console(stderr=True)
    started = time.perf_counter()
    export_dir, source, out = Path(export_dir), Path(source), Path(out)
    check_output_dir(out, A.INDEX_INFO, "index")
    if fmt not in FORMATS:
        raise AlignError(f"--format {fmt!r} is not one of {', '.join(FORMATS)}")
    wants_approximate(ann, 0, 0)  # the choice is checked before any work
    if not source.is_dir():
        raise DataError(f"no gallery folder at {source}", "pass a folder of images or a folder written by `align pack`")
    if (embeddings is None) != (keys is None):
        raise AlignError("--embeddings and --keys go together", "pass both to adopt stored embeddings, or neither")
    model = load(export_dir, weights=weights)  # refuses a tower whose fingerprint differs from the export's
    row_keys, rows, skipped, how = _gallery(model, source, embeddings, keys, sample, console)
    if skipped:
        console.print(f"[yellow]skipped {len(skipped)} image(s) that failed to decode: {', '.join(skipped[:5])}"
                      f"{' ...' if len(skipped) > 5 else ''}")
    if not row_keys:
        raise DataError(f"no usable images in {source}")
    captions, labels = captions_and_labels(source, row_keys)
    label_table = LabelTable.from_rows(labels)
    info = {"format_version": FORMAT_VERSION, "export_dir": str(export_dir.resolve()),
            "export": export_identity(export_dir), "source": str(source.resolve()), "count": len(row_keys),
            "dim": int(rows.shape[1]), "dtype": "float32", "normalised": "l2",
            "image_fingerprint": model.image_fingerprint, "skipped": skipped, **how,
            "tower_forward_passes": model.tower_forward_passes, "format": fmt,
            "label_fields": label_table.fields, "approximate": None}

    out.parent.mkdir(parents=True, exist_ok=True)
    temp = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.partial-"))
    try:
        write_unit_rows(temp / A.INDEX_EMBEDDINGS, rows, row_keys)
        vectors = np.load(temp / A.INDEX_EMBEDDINGS, mmap_mode="r")  # (N, D) the unit rows, as searched
        (temp / A.INDEX_KEYS).write_text("".join(k + "\n" for k in row_keys), encoding="utf-8")
        if label_table.fields:
            label_table.save(temp)
        if fmt in ("both", "parquet"):
            write_gallery_parquet(temp / A.INDEX_PARQUET, row_keys, vectors, captions, label_table,
                                  {"image_fingerprint": info["image_fingerprint"], "export": info["export"],
                                   "index": {k: info[k] for k in ("format_version", "count", "dim", "dtype", "normalised")}})
        if wants_approximate(ann, *vectors.shape):
            info["approximate"] = _write_approximate(temp, vectors, model, captions, console)
        del vectors
        if fmt == "parquet":  # the vectors live once, in the Parquet file
            (temp / A.INDEX_EMBEDDINGS).unlink()
            (temp / A.INDEX_KEYS).unlink()
        info["seconds"] = round(time.perf_counter() - started, 2)
        write_json_atomic(temp / A.INDEX_INFO, info)
        publish_dir(temp, out)
    except BaseException:
        shutil.rmtree(temp, ignore_errors=True)
        raise
    console.print(f"[green]indexed[/green] {info['count']} images ({how['built']}) into {out} "
                  f"in {info['seconds']:.1f}s")
    return info
