"""The open store handle.  Kept apart from :mod:`panel.store.connection` (which opens stores and
runs the migrations) so that the migrations runner can name it without importing the opener back."""

from __future__ import annotations

from pathlib import Path

from sqlalchemy.engine import Engine

from panel.store.errors import DAMAGE_FIX, StoreError, damage_in, first_line, url_secret
from panel.store.versions import head_version


class Store:
    """An open store: the SQLAlchemy engine plus what was learnt when opening it.

    ``display`` is the location as it may be shown (a file path, or the URL with its password
    masked).  Use as a context manager or call :meth:`close`; a read-write DuckDB store holds the file
    lock until then (unless opened with ``hold=False``).
    """

    def __init__(self, engine: Engine, *, display: str, path: Path | None, read_only: bool,
                 schema_version: int):
        self.engine = engine
        self.display = display
        self.path = path
        self.read_only = read_only
        self.schema_version = schema_version

    @property
    def is_duckdb(self) -> bool:
        return self.engine.dialect.name == "duckdb"

    def error_line(self, error: BaseException) -> str:
        """First line of a driver error, with this store's password (if its URL has one) masked; for a
        damaged file, what is damaged and how to recover."""
        damage = damage_in(error)
        if damage is not None:
            return f"the store is damaged ({damage}); {DAMAGE_FIX}"
        return first_line(error, url_secret(self.engine.url))

    def close(self) -> None:
        self.engine.dispose()

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        mode = "read-only" if self.read_only else "read-write"
        return f"Store({self.display!r}, {mode}, schema {self.schema_version})"

    def require_writable(self, action: str = "write") -> None:
        if self.read_only:
            raise StoreError(f"store {self.display} is open read-only; open it read-write to {action}")

    def require_current(self) -> None:
        head = head_version()
        if self.schema_version < head:
            raise StoreError(f"store {self.display} has schema version {self.schema_version}, this riskprem "
                             f"uses {head}; upgrade it with `riskprem store upgrade` (back the file up first)")
        if self.schema_version > head:
            raise StoreError(self.newer_message(head))

    def newer_message(self, head: int) -> str:
        return (f"store {self.display} has schema version {self.schema_version}, newer than this riskprem "
                f"knows ({head}); install a newer riskprem to use it")
