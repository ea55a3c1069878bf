"""align: train a text tower into a frozen image tower's embedding space, and hand it to retrieval.

``align.load(EXPORT_DIR)`` opens an export written by ``align export`` (see ``align.api``). The
import is deferred so that ``import align`` (and every ``align`` command) stays cheap: torch and
transformers load only when a model is.
"""
from __future__ import annotations

__version__ = "0.1.0"


def load(export_dir, *, weights=None, image_tower: bool = True):
    """An ``AlignedModel`` with ``embed_text``, ``embed_images`` and ``scores``; see ``align.api.load``."""
    from .api import load as _load

    return _load(export_dir, weights=weights, image_tower=image_tower)


__all__ = ["load", "__version__"]
