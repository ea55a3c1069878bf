"""User-facing errors.

An ``AlignError`` is a mistake the user can fix (a wrong path, a bad recipe value, an unpacked
folder). The CLI prints its message and hint and exits with status 2, never a traceback.
"""
from __future__ import annotations


class AlignError(Exception):
    """A problem the user can fix; ``hint`` says how."""

    def __init__(self, message: str, hint: str | None = None):
        super().__init__(message)
        self.message = message
        self.hint = hint

    def __str__(self) -> str:
        return self.message if not self.hint else f"{self.message}\n  hint: {self.hint}"


class RecipeError(AlignError):
    """A recipe key or value is wrong."""


class DataError(AlignError):
    """Input data is missing or unusable."""


class FingerprintMismatch(AlignError):
    """Stored artefacts were made with a different frozen tower or preprocessing."""
