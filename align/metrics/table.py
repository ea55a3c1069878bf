"""The evaluation's metrics as one rich table."""
from __future__ import annotations

import math
import re
from typing import Mapping

import numpy as np
from rich.table import Table

_RECALL_KEY = re.compile(r"^(text_to_image|image_to_text)_recall@(\d+)$")
_FIELD_KEY = re.compile(r"^(zero_shot_accuracy|linear_probe_accuracy|linear_probe_rows)/(.+)$")


def _cell(value) -> str:
    if value is None:
        return "—"
    if isinstance(value, (float, np.floating)):
        return "—" if math.isnan(value) else f"{value:.3f}"
    return str(value)


def format_metrics_table(metrics: Mapping[str, object], title: str = "evaluation") -> Table:
    """A rich table: recall@K both ways side by side, then zero-shot next to linear probe per field
    (and the probe's training rows, when the metrics give them).

    Keys the table does not know are listed last, one per row.
    """
    recall: dict[int, dict[str, object]] = {}
    fields: dict[str, dict[str, object]] = {}
    others: list[tuple[str, object]] = []
    for key, value in metrics.items():
        if match := _RECALL_KEY.match(key):
            recall.setdefault(int(match.group(2)), {})[match.group(1)] = value
        elif match := _FIELD_KEY.match(key):
            fields.setdefault(match.group(2), {})[match.group(1)] = value
        else:
            others.append((key, value))

    # Each section: a header row and its body rows; the first header becomes the column headers.
    sections: list[tuple[tuple[str, ...], list[tuple[str, ...]]]] = []
    if recall:
        sections.append((("recall", "text → image", "image → text"),
                         [(f"R@{k}", _cell(recall[k].get("text_to_image")), _cell(recall[k].get("image_to_text")))
                          for k in sorted(recall)]))
    if fields:
        with_rows = any("linear_probe_rows" in row for row in fields.values())
        sections.append((("field", "zero-shot", "linear probe") + (("probe rows",) if with_rows else ()),
                         [(name, _cell(row.get("zero_shot_accuracy")), _cell(row.get("linear_probe_accuracy")))
                          + ((_cell(row.get("linear_probe_rows")),) if with_rows else ())
                          for name, row in fields.items()]))
    if others:
        sections.append((("other", "value", ""), [(key, _cell(value), "") for key, value in others]))
    if not sections:
        sections.append((("metric", "value", ""), []))

    width = max(len(header) for header, _ in sections)
    pad = lambda cells: tuple(cells) + ("",) * (width - len(cells))  # noqa: E731
    first_header = pad(sections[0][0])
    table = Table(title=title)
    table.add_column(first_header[0], style="bold")
    for name in first_header[1:]:
        table.add_column(name, justify="right")
    for index, (header, rows) in enumerate(sections):
        if index:
            table.add_section()
            table.add_row(*pad(header), style="bold")
        for row in rows:
            table.add_row(*pad(row))
    return table
