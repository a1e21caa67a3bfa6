"""Root of the ``riskprem`` command line.

The root holds the global options only; every command group lives in its own module, which
exposes ``register(app)``.  :data:`COMMAND_MODULES` lists them in help order; a module listed in
:data:`OPTIONAL_MODULES` is registered when it is installed (commands added by later work).
"""

from __future__ import annotations

import importlib
from typing import Annotated

import typer

from panel import __version__
from panel.cli.common import DEFAULT_LOCK_WAIT, State
from panel.cli.output import ANNUALISING

COMMAND_MODULES = (
    "panel.cli.data",        # ingest, datasets
    "panel.cli.fitting",     # fit, reproduce
    "panel.cli.runs",        # runs, show, estimates, cross-section, diff, export, plot
    "panel.cli.storecmd",    # store info | upgrade, query
    "panel.cli.demo",        # demo
    "panel.cli.report",      # report
)
OPTIONAL_MODULES = (
    "panel.cli.backfill",    # backfill, revisions, evaluate
)

HELP = f"""Pooled risk-premium estimates for many assets, with a versioned store of vintages.

Premia in tables are annualised percent ({ANNUALISING}); --json, --csv and export keep
per-period decimals.  Volatility options are percent a year: --fix own_premium_vol=1 lets each
asset's own premium move about 1 point a year; --fix return_vol=15 is a 15% return-shock volatility.
Exit codes: 0 success, 1 a problem with the input (one line on stderr), 2 bad usage.
"""

app = typer.Typer(help=HELP, no_args_is_help=True, add_completion=False,
                  pretty_exceptions_enable=False, rich_markup_mode=None,
                  context_settings={"help_option_names": ["-h", "--help"]})


@app.callback()
def root(
    ctx: typer.Context,
    store: Annotated[str | None, typer.Option(
        "--store", envvar="RISKPREM_STORE", show_envvar=True, metavar="PATH|URL",
        help="The store: a DuckDB file or a SQLAlchemy URL (duckdb:///..., postgresql://...). "
             "Default ./riskprem.duckdb.", show_default=False)] = None,
    quiet: Annotated[bool, typer.Option("--quiet", "-q", help="No progress bars or notes.")] = False,
    verbose: Annotated[bool, typer.Option("--verbose", "-v", help="More detail (full messages, "
                                          "environment).")] = False,
    lock_wait: Annotated[float, typer.Option(
        "--lock-wait", envvar="RISKPREM_LOCK_WAIT", metavar="SECONDS", min=0.0,
        help="How long to wait for another process that is writing the store.")] = DEFAULT_LOCK_WAIT,
) -> None:
    ctx.obj = State(store=store, quiet=quiet, verbose=verbose and not quiet, lock_wait=lock_wait)


@app.command()
def version() -> None:
    """Print the riskprem version."""
    typer.echo(__version__)


def _register(target: typer.Typer) -> None:
    for name in COMMAND_MODULES:
        importlib.import_module(name).register(target)
    for name in OPTIONAL_MODULES:
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as error:
            if error.name != name:
                raise
            continue
        module.register(target)


_register(app)


def main() -> None:  # console-script entry point
    app()
