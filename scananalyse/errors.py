"""Errors and warnings of scananalyse.

Every problem with a user's input is an :class:`InputError` whose message is one
line naming the file and the line or field.  The CLI turns it into exit status 2
with no traceback.  Warnings use :class:`ScanWarning` (or a subclass) so users
and tests can filter them.
"""

from __future__ import annotations

import os

__all__ = ["InputError", "FitError", "ScanWarning", "RegistrationWarning", "where"]


class InputError(ValueError):
    """Bad user input: a one-line message naming the file and the line or field."""

    def __init__(self, message: str):
        # Keep the message on one line whatever the caller passed.
        super().__init__(" ".join(str(message).split()))


class FitError(RuntimeError):
    """A statistical fit that failed or is degenerate; carries the reason."""


class ScanWarning(UserWarning):
    """A result that is computed but should not be trusted blindly."""


class RegistrationWarning(ScanWarning):
    """The registration estimate is unreliable (featureless floor, low overlap)."""


def where(path, line: int | None = None, field: str | None = None) -> str:
    """Format the location prefix of an error message: ``file:line: field``."""
    name = os.fspath(path) if path is not None else "<input>"
    out = name
    if line is not None:
        out += f":{line}"
    if field is not None:
        out += f": field '{field}'"
    return out
