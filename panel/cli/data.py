"""Commands about datasets: ``ingest`` a return file, list ``datasets``."""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Annotated

import typer

from panel.cli import output
from panel.cli.common import CsvFlag, JsonFlag, State, state, store_for, user_errors


class Layout(str, Enum):
    wide = "wide"
    long = "long"


class Units(str, Enum):
    decimal = "decimal"
    percent = "percent"


class Compounding(str, Enum):
    simple = "simple"
    log = "log"


class Frequency(str, Enum):
    B = "B"
    W = "W"
    M = "M"
    Q = "Q"
    A = "A"


# Every option of `ingest` is also an option of `fit --file` (same meaning, same names), so an
# ingest message that names one (e.g. "CLI --allow-extreme") is true for both commands.
LayoutOpt = Annotated[Layout | None, typer.Option("--layout", help="wide (date + one column per "
                      "asset) or long (date, asset, value); default: detected.", show_default=False)]
UnitsOpt = Annotated[Units | None, typer.Option("--units", help="Units of the returns in the file; "
                     "default: inferred (ambiguous data is refused).", show_default=False)]
DateColOpt = Annotated[str | None, typer.Option("--date-col", help="Name of the date column; default: a "
                       "column named 'date', else the first.", show_default=False)]
MinObsOpt = Annotated[int, typer.Option("--min-obs", help="Fewest observations an asset needs; assets "
                      "with fewer are dropped with a warning.")]
ReturnsOpt = Annotated[Compounding, typer.Option("--returns", help="How the returns compound.")]
TotalOpt = Annotated[bool, typer.Option("--total-returns", help="The file holds total returns; subtract the "
                     "rate given by --risk-free.")]
RiskFreeOpt = Annotated[str | None, typer.Option("--risk-free", help="Risk-free rate: a column of the file, or "
                        "a file with a date column and one rate column (same units as the returns).",
                        show_default=False)]
DateFormatOpt = Annotated[str | None, typer.Option("--date-format", help="strftime format of the dates, e.g. "
                          "%d/%m/%Y; default: ISO dates, YYYYMMDD, YYYYMM, 2020Q1.", show_default=False)]
DelimiterOpt = Annotated[str | None, typer.Option("--delimiter", help="CSV separator; default: detected.",
                         show_default=False)]
FrequencyOpt = Annotated[Frequency | None, typer.Option("--frequency", help="B W M Q A; default: inferred "
                         "from the dates.", show_default=False)]
AssetColOpt = Annotated[str, typer.Option("--asset-col", help="Long layout: the column of asset names.")]
ValueColOpt = Annotated[str, typer.Option("--value-col", help="Long layout: the column of returns.")]
RefuseShortOpt = Annotated[bool, typer.Option("--refuse-short", help="Refuse the file when an asset has fewer "
                           "than --min-obs observations (default: drop it with a warning).")]
ExtremeOpt = Annotated[bool, typer.Option("--allow-extreme", help="Accept returns beyond +-100% a period, and "
                       "risk-free rates above 20% a year (median).")]


def file_options(layout, units, returns, total_returns, risk_free, date_col, date_format, delimiter,
                 frequency, asset_col, value_col, min_obs, refuse_short, allow_extreme) -> dict:
    """Keyword options for :func:`panel.ingest.read_panel` from the file options that ``ingest`` and
    ``fit --file`` share."""
    found = {"layout": layout, "units": units, "returns": returns, "total_returns": total_returns,
             "risk_free": risk_free, "date_col": date_col, "date_format": date_format, "delimiter": delimiter,
             "frequency": frequency, "asset_col": asset_col, "value_col": value_col, "min_obs": min_obs,
             "on_short": "refuse" if refuse_short else "drop", "allow_extreme": allow_extreme}
    return {k: (v.value if isinstance(v, Enum) else v) for k, v in found.items()}


def read_file(path: Path, options: dict):
    """Ingest ``path`` (no store involved); user errors exit 1."""
    from panel.ingest import read_panel

    with user_errors():
        return read_panel(path, **options)


def describe(panel) -> dict:
    values = panel.values
    cells = values.size
    present = int(values.notna().to_numpy().sum())
    return {"hash": panel.hash, "assets": list(panel.assets), "n_assets": len(panel.assets),
            "n_dates": len(panel.dates), "n_values": present,
            "missing_share": 0.0 if cells == 0 else 1 - present / cells,
            "first_date": panel.dates[0], "last_date": panel.dates[-1], "frequency": panel.frequency,
            "periods_per_year": panel.periods_per_year, "returns": panel.returns,
            "units_in_file": panel.meta.get("units"), "layout": panel.meta.get("layout"),
            "source": panel.meta.get("source"), "warnings": list(panel.warnings)}


def print_dataset(name: str, facts: dict, location: str) -> None:
    output.line(f"dataset {name} stored in {location}")
    output.facts([
        ("hash", facts["hash"]),
        ("shape", f"{facts['n_dates']} dates x {facts['n_assets']} assets, {facts['n_values']:,} values "
                  f"({100 * facts['missing_share']:.1f}% missing)"),
        ("dates", f"{output.day(facts['first_date'])} to {output.day(facts['last_date'])}"),
        ("frequency", f"{facts['frequency']} ({facts['periods_per_year']} periods a year)"),
        ("returns", f"{facts['returns']} excess returns, file in {facts['units_in_file']} "
                    f"({facts['layout']} layout); stored as decimal per period"),
        ("assets", ", ".join(facts["assets"])),
    ])
    if facts["warnings"]:
        output.line(f"warnings ({len(facts['warnings'])}):", style="yellow")
        for warning in facts["warnings"]:
            output.line(f"  - {warning}", style="yellow")
    else:
        output.line("warnings: none")


def ingest(
    ctx: typer.Context,
    path: Annotated[Path, typer.Argument(help="CSV or Parquet file of returns.", show_default=False)],
    name: Annotated[str, typer.Option("--name", help="Dataset name to store it under (re-ingesting a "
                                      "name with new data keeps the history).", show_default=False)],
    layout: LayoutOpt = None,
    units: UnitsOpt = None,
    returns: ReturnsOpt = Compounding.simple,
    total_returns: TotalOpt = False,
    risk_free: RiskFreeOpt = None,
    date_col: DateColOpt = None,
    date_format: DateFormatOpt = None,
    delimiter: DelimiterOpt = None,
    frequency: FrequencyOpt = None,
    asset_col: AssetColOpt = "asset",
    value_col: ValueColOpt = "value",
    min_obs: MinObsOpt = 24,
    refuse_short: RefuseShortOpt = False,
    allow_extreme: ExtremeOpt = False,
    as_json: JsonFlag = False,
) -> None:
    """Read a return file, validate it and store it as a dataset snapshot.

    Prints the dataset hash (its identity in the store), shape, date range, frequency and any
    warnings.  Nothing is stored when the file is refused.
    """
    st: State = state(ctx)
    options = file_options(layout, units, returns, total_returns, risk_free, date_col, date_format, delimiter,
                           frequency, asset_col, value_col, min_obs, refuse_short, allow_extreme)
    panel = read_file(path, options)
    from panel.store import write_dataset

    with store_for(st, write=True) as store, user_errors():
        write_dataset(store, panel, name)
        location = store.display
    facts = describe(panel)
    if as_json:
        output.emit_json({"dataset": name.strip(), "store": location, **facts})
        return
    print_dataset(name.strip(), facts, location)


def datasets(ctx: typer.Context, as_json: JsonFlag = False, as_csv: CsvFlag = False) -> None:
    """List the dataset snapshots in the store, oldest first, with their names and run counts."""
    from panel.store import list_datasets

    st = state(ctx)
    with store_for(st) as store, user_errors():
        frame = list_datasets(store)
    if as_json:
        output.emit_json({"store": st.shown, "datasets": frame})
        return
    if as_csv:
        output.emit_csv(frame)
        return
    rows = [(output.short_hash(r.hash), r.current_names or f"({r.name})", r.frequency, r.n_assets, r.n_dates,
             f"{output.day(r.first_date)} to {output.day(r.last_date)}", r.n_runs, r.source_file or "-")
            for r in frame.itertuples(index=False)]
    output.show(output.table(f"Datasets in {st.shown}", ["hash", "name(s)", "freq", "assets", "dates",
                             "range", "runs", "source"], rows, right_from=2))
    if not rows:
        output.line("no datasets yet; store one with `riskprem ingest FILE --name NAME`")


def register(app: typer.Typer) -> None:
    app.command("ingest")(ingest)
    app.command("datasets")(datasets)
