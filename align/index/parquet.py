"""The gallery as one Parquet file (pyarrow), the columnar form vector databases ingest.

    key       string, the sample key (packed) or the path relative to the gallery folder
    vector    fixed_size_list<float32>[D], the L2-normalised image embedding, bit for bit as searched
    caption   string or null, the sample's caption when the gallery has one
    <field>   string or null, one column per label field (``label_<field>`` where the field's name
              is one of the three above)

The file's schema metadata carries, as JSON under ``align.*`` keys, what the vectors mean:
``align.image_fingerprint`` (the frozen tower that made them), ``align.export`` (the export the
gallery was built for), ``align.index`` (count, width, normalisation) and ``align.label_columns``.
Rows are written in groups of ``ROW_GROUP`` so a gallery of millions never sits in memory twice.
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from ..errors import AlignError

ROW_GROUP = 65536
RESERVED = ("key", "vector", "caption")


def _pyarrow():
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise AlignError("pyarrow is not installed", "pip install pyarrow, or index with --format npy") from None
    return pa, pq


def label_columns(fields: Sequence[str]) -> dict[str, str]:
    """Each label field's column name (prefixed only where it would clash with a fixed column)."""
    return {f: f"label_{f}" if f in RESERVED else f for f in fields}


def write_gallery_parquet(path: Path, keys: Sequence[str], vectors: np.ndarray, captions: Sequence[str | None],
                          labels, metadata: Mapping[str, object]) -> None:
    """Write ``vectors`` (N, D) float32 with keys, captions and ``labels`` (a ``LabelTable``) to ``path``."""
    pa, pq = _pyarrow()
    rows, dim = vectors.shape
    columns = label_columns(labels.fields)
    schema = pa.schema([pa.field("key", pa.string(), nullable=False),
                        pa.field("vector", pa.list_(pa.float32(), dim), nullable=False),
                        pa.field("caption", pa.string())] + [pa.field(columns[f], pa.string()) for f in labels.fields])
    schema = schema.with_metadata({f"align.{name}": json.dumps(value, sort_keys=True, ensure_ascii=False)
                                   for name, value in {**metadata, "label_columns": columns}.items()})
    with pq.ParquetWriter(str(path), schema, compression="zstd") as writer:
        for start in range(0, rows, ROW_GROUP):
            stop = min(rows, start + ROW_GROUP)
            block = np.ascontiguousarray(vectors[start:stop], dtype=np.float32).reshape(-1)  # (n·D,)
            arrays = [pa.array(keys[start:stop], pa.string()),
                      pa.FixedSizeListArray.from_arrays(pa.array(block, pa.float32()), dim),
                      pa.array(captions[start:stop], pa.string())]
            for j, field in enumerate(labels.fields):
                codes = np.asarray(labels.codes[start:stop, j])
                values = labels.values[field]
                arrays.append(pa.array([values[c] if c >= 0 else None for c in codes.tolist()], pa.string()))
            writer.write_table(pa.Table.from_arrays(arrays, schema=schema), row_group_size=ROW_GROUP)


def read_gallery_parquet(path: Path) -> tuple[list[str], np.ndarray, dict]:
    """(keys, (N, D) float32 vectors, the ``align.*`` metadata) of a gallery file; plain errors when damaged."""
    pa, pq = _pyarrow()
    table = pq.read_table(str(path), columns=["key", "vector"], memory_map=True)
    vector = table.column("vector").combine_chunks()
    dim = vector.type.list_size
    if vector.null_count:
        raise ValueError("its vector column holds nulls")
    flat = vector.flatten().to_numpy(zero_copy_only=False)  # (N·D,) float32
    metadata = {k.decode()[len("align."):]: json.loads(v) for k, v in (table.schema.metadata or {}).items()
                if k.startswith(b"align.")}
    return table.column("key").to_pylist(), flat.reshape(-1, dim), metadata
