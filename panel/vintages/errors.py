"""Errors of the vintage workflow."""


class BackfillError(ValueError):
    """A backfill (or a look-up of one, or a rebuild of a stored run) that cannot be done as asked;
    the message is one line."""
