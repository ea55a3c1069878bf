"""A sample's labels as one canonical text, so equal labels compare equal everywhere.

``canonical_labels`` is the text ``align pack`` stores as a sample's ``.json`` member and feeds
into the manifest's content hashes: keys sorted, no spaces, non-ASCII kept as is. Changing it would
change every packed folder's hashes, so it is the one form; readers that group samples by their
labels (the loss's positive ids, evaluation's label groups) use ``label_group``, the same text, but
None for a sample without labels: such a sample shares its labels with nobody.
"""
from __future__ import annotations

import json


def canonical_labels(labels: dict) -> str:
    """The stored text of a labels dict: ``{"glaze":"cobalt","pattern":"chevron"}`` (``{}`` when empty)."""
    return json.dumps(labels, sort_keys=True, ensure_ascii=False, separators=(",", ":"))


def label_group(labels: dict | None) -> str | None:
    """Samples with equal labels share a group; a sample without labels (None or ``{}``) is in none."""
    return canonical_labels(labels) if labels else None
