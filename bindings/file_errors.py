"""The one error type of the file commands (reading, writing, the backfill)."""

from __future__ import annotations


class StreamError(ValueError):
    """A user-facing problem with an input or output file (one line of text)."""


def one_line(exc: BaseException) -> str:
    """The first line of an exception's message (its type's name when it has none)."""
    text = str(exc).strip() or type(exc).__name__
    return text.splitlines()[0]
