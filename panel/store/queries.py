"""Named queries: plain SQL files in the top-level ``queries/`` folder, run with bound parameters.

Each file opens with a header of ``--`` lines::

    -- purpose: what the query answers (continued on indented ``--`` lines)
    -- param NAME: what to pass as :NAME
    -- columns: a, b, c

and then one SQL statement using ``:NAME`` parameters (portable SQL: DuckDB and PostgreSQL).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
from sqlalchemy import text
from sqlalchemy.exc import DBAPIError

from panel.store._io import read_frame
from panel.store.handle import Store
from panel.store.errors import StoreError
from panel.store.resources import resource_dir

_ENTRY = re.compile(r"^(purpose|columns|param\s+(\w+))\s*:\s*(.*)$")
_BIND = re.compile(r"(?<![:\w]):(\w+)")


@dataclass(frozen=True)
class QueryInfo:
    """A named query: file stem, purpose, parameters (name -> description), result columns."""

    name: str
    purpose: str
    parameters: dict[str, str] = field(default_factory=dict)
    columns: tuple[str, ...] = ()
    path: Path | None = None

    @property
    def sql(self) -> str:
        """The statement without its comment lines."""
        text_ = self.path.read_text(encoding="utf-8") if self.path else ""
        return "\n".join(line for line in text_.splitlines() if not line.lstrip().startswith("--")).strip()


def _parse(path: Path) -> QueryInfo:
    purpose: list[str] = []
    params: dict[str, list[str]] = {}
    columns: list[str] = []
    current: list[str] | None = None
    for line in path.read_text(encoding="utf-8").splitlines():
        if not line.startswith("--"):
            break
        body = line[2:].strip()
        match = _ENTRY.match(body)
        if match and match.group(1) == "purpose":
            current = purpose
            current.append(match.group(3))
        elif match and match.group(1) == "columns":
            current = columns
            current.append(match.group(3))
        elif match:
            current = params.setdefault(match.group(2), [])
            current.append(match.group(3))
        elif current is not None and body:
            current.append(body)
    cols = tuple(c.strip() for c in " ".join(columns).split(",") if c.strip())
    if not purpose or not cols:
        raise StoreError(f"query file {path} lacks a '-- purpose:' or '-- columns:' header line; add it")
    return QueryInfo(name=path.stem, purpose=" ".join(purpose),
                     parameters={k: " ".join(v) for k, v in params.items()}, columns=cols, path=path)


def list_queries() -> list[QueryInfo]:
    """All named queries, by name."""
    return [_parse(p) for p in sorted(resource_dir("queries").glob("*.sql"))]


def query_parameters(sql: str) -> list[str]:
    """The ``:name`` parameters used in ``sql`` (comment lines ignored), in first-use order."""
    body = "\n".join(line for line in sql.splitlines() if not line.lstrip().startswith("--"))
    return list(dict.fromkeys(_BIND.findall(body)))


def get_query(name: str) -> QueryInfo:
    queries = {q.name: q for q in list_queries()}
    if name not in queries:
        raise StoreError(f"no query {name!r}; known queries: {', '.join(sorted(queries))}")
    return queries[name]


def run_query(store: Store, name: str, params: dict | None = None) -> pd.DataFrame:
    """Run the named query with ``params`` (all its parameters, no others); a ``dataset`` parameter
    may be a dataset name, hash or hash prefix."""
    from panel.store.reader import resolve_dataset

    store.require_current()
    info = get_query(name)
    params = dict(params or {})
    needed = query_parameters(info.sql)
    missing = [p for p in needed if p not in params]
    if missing:
        hints = "; ".join(f"{p}: {info.parameters.get(p, '')}" for p in missing)
        raise StoreError(f"query {name!r} needs parameter(s) {', '.join(missing)} ({hints}); "
                         "give them as name=value")
    extra = sorted(set(params) - set(needed))
    if extra:
        raise StoreError(f"query {name!r} has no parameter(s) {', '.join(extra)}; its parameters: "
                         f"{', '.join(needed) or 'none'}")
    if "dataset" in params:
        if params["dataset"] is None:
            raise StoreError(f"query {name!r}: parameter dataset cannot be NULL; give a dataset name or hash")
        params["dataset"] = resolve_dataset(store, params["dataset"])
    try:
        with store.engine.connect() as conn:
            return read_frame(conn, text(info.sql), params)
    except DBAPIError as error:
        raise StoreError(f"query {name!r} failed: {store.error_line(error)}; check the parameter values") from None
