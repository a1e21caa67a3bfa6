"""The one error type of the ingest layer and the helpers that format its one-line messages."""

from __future__ import annotations


class IngestError(ValueError):
    """Bad input file or option.  ``str(err)`` is one line: the file, where (line/row, column), the
    offending value, and how to fix it.  The CLI prints it and exits 1."""

    def __init__(self, message: str):
        # One line, always: a raw cell or file name may hold a line break.
        super().__init__(str(message).replace("\r", " ").replace("\n", " "))


def shown(value, limit: int = 40) -> str:
    """A raw cell value quoted for a message, shortened so one bad cell can't flood the line."""
    text = str(value)
    if len(text) > limit:
        text = text[: limit - 3] + "..."
    return repr(text)


def listed(items, limit: int = 3) -> str:
    """``'a', 'b', 'c' (+4 more)``: the first few of ``items`` for a message."""
    items = list(items)
    head = ", ".join(str(i) for i in items[:limit])
    return head + (f" (+{len(items) - limit} more)" if len(items) > limit else "")
