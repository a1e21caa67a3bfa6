"""The one exception of the store layer, and the one way a driver error becomes message text."""

from __future__ import annotations


class StoreError(ValueError):
    """A store problem the user can fix: one line naming the problem and the fix.

    Raised for unknown runs, datasets or queries, a store written by a newer schema, a store locked by
    another process, a bad location or URL, and rows that do not fit the schema.  When a write raises
    it, nothing of that write is in the store.
    """


def first_line(error: BaseException, secret: str | None = None) -> str:
    """The first line of a (driver) error's message, with ``secret`` (a store password) masked:
    a message that quotes the connection string must not carry the password into output."""
    inner = getattr(error, "orig", None) or error
    line = (str(inner).strip().splitlines() or [type(inner).__name__])[0]
    return line.replace(secret, "***") if secret else line


def url_secret(url) -> str | None:
    """The password a SQLAlchemy URL carries, in its user part or as a ``password=`` query parameter."""
    if url.password:
        return str(url.password)
    value = url.query.get("password")
    return str(value) if isinstance(value, str) and value else None


#: What to do about a damaged store file.
DAMAGE_FIX = ("restore it from a backup copy, or ingest and fit into a new store (riskprem never repairs a "
              "store in place)")


def is_damage(line: str) -> bool:
    """Whether a driver message says the database file is damaged."""
    return any(word in line.lower() for word in ("corrupt", "checksum mismatch", "does not match stored checksum"))


def damage_in(error: BaseException) -> str | None:
    """The line of a driver error (any line: DuckDB puts the cause under a rollback failure) that
    says the database file is damaged, or None."""
    inner = getattr(error, "orig", None) or error
    return next((line.strip() for line in str(inner).splitlines() if is_damage(line)), None)


def database_failure(error: BaseException) -> StoreError | None:
    """A driver error met while reading or writing an open store (a damaged DuckDB file, a server
    that went away) as a one-line :class:`StoreError`; None for any other exception."""
    inner = getattr(error, "orig", None) or error
    module = type(inner).__module__.split(".")[0]
    if not (module in ("duckdb", "_duckdb", "psycopg", "psycopg2")
            or type(error).__module__.startswith("sqlalchemy.exc")):
        return None
    line, damage = first_line(error), damage_in(error)
    if damage is not None:
        return StoreError(f"the store is damaged ({damage}); {DAMAGE_FIX}")
    return StoreError(f"the store could not be read or written: {line}; check that it is reachable and "
                      "intact (`riskprem store info`)")
