"""Commands about the store itself: ``store info``, ``store upgrade``, and named ``query``."""

from __future__ import annotations

from typing import Annotated

import typer

from panel.cli import output
from panel.cli.common import CsvFlag, JsonFlag, fail, state, store_exists, store_for, user_errors

store_app = typer.Typer(help="The store: facts about it, and upgrading its schema.", no_args_is_help=True)


@store_app.command("info")
def info(ctx: typer.Context, as_json: JsonFlag = False) -> None:
    """Location, schema version, DuckDB version, file size and row counts of the store."""
    from panel.store import store_info

    st = state(ctx)
    with store_for(st) as store, user_errors():
        facts = store_info(store)
    if as_json:
        output.emit_json(facts)
        return
    size = facts.get("file_size")
    behind = facts["schema_version"] < facts["code_schema_version"]
    output.facts([
        ("location", facts["location"]),
        ("database", facts["dialect"] + (f" {facts['duckdb_library']}" if facts.get("duckdb_library") else "")
         + (f", storage {facts['storage_version']}" if facts.get("storage_version") else "")),
        ("schema", f"version {facts['schema_version']} (this riskprem uses {facts['code_schema_version']})"
         + ("; run `riskprem store upgrade`" if behind else "")),
        ("file size", None if size is None else f"{size / 1e6:,.2f} MB"),
        ("created", facts["meta"].get("created_utc")),
        ("upgraded", facts["meta"].get("upgraded_utc")),
    ])
    rows = [(name, f"{count:,}") for name, count in facts["counts"].items()]
    output.show(output.table("Rows per table", ["table", "rows"], rows))


@store_app.command("upgrade")
def upgrade(ctx: typer.Context, as_json: JsonFlag = False) -> None:
    """Migrate the store's schema to this riskprem's version, keeping every row (back the file up
    first)."""
    from panel.store import upgrade as migrate

    st = state(ctx)
    if not store_exists(st):
        fail(f"no store at {st.shown}; nothing to upgrade (give --store PATH)")
    with store_for(st, write=True) as store, user_errors():
        before = store.schema_version
        applied = migrate(store)
        after = store.schema_version
        where = store.display
    if as_json:
        output.emit_json({"store": where, "from_version": before, "to_version": after, "applied": applied})
        return
    if applied:
        output.line(f"upgraded {where} from schema version {before} to {after} "
                    f"(applied {', '.join(str(v) for v in applied)})")
    else:
        output.line(f"{where} is already at schema version {after}; nothing to do")


def query(
    ctx: typer.Context,
    name: Annotated[str | None, typer.Argument(help="Query name (see --list).", show_default=False)] = None,
    list_: Annotated[bool, typer.Option("--list", help="List the named queries and their parameters.")]
    = False,
    param: Annotated[list[str] | None, typer.Option("--param", metavar="KEY=VALUE",
                     help="A query parameter (repeatable), e.g. --param dataset=sleeves; split at the first "
                          "'=', so a value may hold '='.", show_default=False)] = None,
    null: Annotated[list[str] | None, typer.Option("--null", metavar="KEY", help="Pass SQL NULL for this "
                    "parameter (repeatable), e.g. --null key for every run of oos_forecasts.",
                    show_default=False)] = None,
    as_json: JsonFlag = False, as_csv: CsvFlag = False,
) -> None:
    """Run a named query of the store (SQL files in queries/) with bound parameters."""
    from panel.store import list_queries, run_query

    st = state(ctx)
    if list_:
        with user_errors():
            queries = list_queries()
        if as_json:
            output.emit_json({"queries": [{"name": q.name, "purpose": q.purpose, "parameters": q.parameters,
                                           "columns": list(q.columns)} for q in queries]})
            return
        rows = [(q.name, q.purpose, "; ".join(f"{k}: {v}" for k, v in q.parameters.items()) or "-")
                for q in queries]
        output.show(output.table("Named queries (riskprem query NAME --param KEY=VALUE ...)",
                                 ["name", "purpose", "parameters"], rows, right_from=9))
        return
    if name is None:
        raise typer.BadParameter("give a query NAME, or --list to see them", param_hint="NAME")
    params = _query_params(param, null)
    with store_for(st) as store, user_errors():
        frame = run_query(store, name, params)
    if as_json:
        output.emit_json({"query": name, "parameters": params, "units": output.MACHINE_UNITS,
                          "rows": frame, "caution": output.CAUTION})
        return
    if as_csv:
        output.emit_csv(frame)
        return
    rows = [[_cell(v) for v in r] for r in frame.itertuples(index=False)]
    output.show(output.table(f"{name} ({len(frame)} rows; numbers as stored: per-period decimals)",
                             list(frame.columns), rows, right_from=0))
    output.caution()


def _query_params(items, nulls) -> dict[str, str | None]:
    """``--param KEY=VALUE`` (split at the first '=': names never hold one, values may) and
    ``--null KEY`` -> bound parameters; malformed, empty or repeated ones are usage errors."""
    params: dict[str, str | None] = {}
    for item in items or ():
        name, sep, value = str(item).partition("=")
        name, value = name.strip(), value.strip()
        if not sep or not name.isidentifier():
            raise typer.BadParameter(f"{item!r} is not KEY=VALUE (KEY a parameter name, see --list)",
                                     param_hint="--param")
        if not value:
            raise typer.BadParameter(f"{item!r} has no value; give one, or --null {name} to pass NULL",
                                     param_hint="--param")
        if name in params:
            raise typer.BadParameter(f"parameter {name!r} is given twice", param_hint="--param")
        params[name] = value
    for name in nulls or ():
        name = str(name).strip()
        if name in params:
            raise typer.BadParameter(f"parameter {name!r} is given both as --param and --null", param_hint="--null")
        params[name] = None
    return params


def _cell(value) -> str:
    import pandas as pd

    if isinstance(value, pd.Timestamp):
        return output.day(value) if value == value.normalize() else str(value)
    if isinstance(value, float):
        return output.num(value, 6)
    return "-" if value is None else str(value)


def register(app: typer.Typer) -> None:
    app.add_typer(store_app, name="store")
    app.command("query")(query)
