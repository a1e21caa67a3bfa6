"""The one exception of the store layer."""

from __future__ import annotations


class StoreError(ValueError):
    """A store problem the user can fix: one line naming the problem and the fix.

    Raised for unknown runs, datasets or queries, a store written by a newer schema, a store locked by
    another process, a bad location or URL, and rows that do not fit the schema.  When a write raises
    it, nothing of that write is in the store.
    """
