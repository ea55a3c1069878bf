"""Filtering a gallery by its samples' labels: ``--where glaze=cobalt`` and the service's ``where``.

Labels are stored column-wise beside the vectors, so a filter is a few vectorised comparisons
however large the gallery:

    labels.json       {"fields": [field, ...], "values": {field: [distinct value, ...]}}
    label_codes.npy   (N, F) int32: row i's value of field f as its position in values[f], -1 if none

A filter maps each field to the values it accepts: a row matches when, for every field named, its
value is one of them (fields AND, values of one field OR). Values compare as the exact strings
``align pack`` stores (numbers and booleans as their JSON text).
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from .. import artifacts as A
from ..errors import AlignError

Where = dict[str, list[str]]


def parse_where(specs: Sequence[str]) -> Where:
    """``["glaze=cobalt", "glaze=ochre", "pattern=chevron"]`` -> ``{"glaze": [...], "pattern": [...]}``."""
    where: Where = {}
    for spec in specs:
        field, sep, value = spec.partition("=")
        if not sep or not field.strip():
            raise AlignError(f"--where {spec!r} is not FIELD=VALUE", "e.g. --where glaze=cobalt (repeatable)")
        where.setdefault(field.strip(), []).append(value)
    return where


def normalise_where(where: Mapping[str, str | Sequence[str]] | None) -> Where | None:
    """A filter as given by a caller (one value or a list per field) in the one form the search takes."""
    if not where:
        return None
    out: Where = {}
    for field, values in where.items():
        values = [values] if isinstance(values, str) else list(values)
        if not values or not all(isinstance(v, str) for v in values):
            raise AlignError(f"the filter on {field!r} needs one or more string values",
                             'e.g. {"glaze": "cobalt"} or {"glaze": ["cobalt", "ochre"]}')
        out[str(field)] = values
    return out


@dataclass
class LabelTable:
    """Every row's labels, coded: ``codes[i, f]`` is row i's value of ``fields[f]`` in ``values``."""

    fields: list[str]
    values: dict[str, list[str]]
    codes: np.ndarray  # (N, F) int32, -1 = no value

    @classmethod
    def from_rows(cls, labels: Sequence[Mapping[str, str]]) -> "LabelTable":
        fields = sorted({f for row in labels for f in row})
        values = {f: sorted({row[f] for row in labels if f in row}) for f in fields}
        position = {f: {v: i for i, v in enumerate(vs)} for f, vs in values.items()}
        codes = np.full((len(labels), len(fields)), -1, np.int32)
        for i, row in enumerate(labels):
            for j, f in enumerate(fields):
                if f in row:
                    codes[i, j] = position[f][row[f]]
        return cls(fields, values, codes)

    @classmethod
    def empty(cls, rows: int) -> "LabelTable":
        return cls([], {}, np.zeros((rows, 0), np.int32))

    def save(self, folder: Path) -> None:
        (folder / A.INDEX_LABELS).write_text(json.dumps({"fields": self.fields, "values": self.values},
                                                        ensure_ascii=False) + "\n", encoding="utf-8")
        np.save(folder / A.INDEX_LABEL_CODES, self.codes)

    @classmethod
    def load(cls, folder: Path, rows: int) -> "LabelTable":
        """The folder's labels; plain errors when a file is unreadable or does not fit the gallery."""
        if not (folder / A.INDEX_LABELS).is_file():
            return cls.empty(rows)
        record = json.loads((folder / A.INDEX_LABELS).read_text(encoding="utf-8"))
        codes = np.load(folder / A.INDEX_LABEL_CODES, mmap_mode="r")
        if codes.shape != (rows, len(record["fields"])):
            raise ValueError(f"{A.INDEX_LABEL_CODES} is {codes.shape}, expected ({rows}, {len(record['fields'])})")
        return cls(list(record["fields"]), dict(record["values"]), codes)

    def row_labels(self, row: int) -> dict[str, str]:
        return {f: self.values[f][c] for f, c in zip(self.fields, self.codes[row].tolist()) if c >= 0}

    def mask(self, where: Where) -> np.ndarray:
        """(N,) bool: the rows whose labels match every field of ``where``."""
        unknown = [f for f in where if f not in self.fields]
        if unknown:
            known = ", ".join(self.fields) if self.fields else "none: the gallery has no labels"
            raise AlignError(f"no label field {', '.join(map(repr, unknown))} in this gallery",
                             f"label fields here: {known}")
        allowed = np.ones(self.codes.shape[0], bool)
        for field, accepted in where.items():
            column = np.asarray(self.codes[:, self.fields.index(field)])  # (N,)
            wanted = [self.values[field].index(v) for v in accepted if v in self.values[field]]
            allowed &= np.isin(column, wanted)
        return allowed
