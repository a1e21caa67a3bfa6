"""Root of the ``riskprem`` command line.

The root holds the global options only; every command group lives in its own module, which
exposes ``register(app)``.  :data:`COMMAND_MODULES` lists them in help order; a module listed in
:data:`OPTIONAL_MODULES` is registered when it is installed (commands added by later work).
"""

from __future__ import annotations

import importlib
import platform
from typing import Annotated

import typer
from typer.core import TyperGroup

from panel import __version__
from panel.cli import output
from panel.cli.common import DEFAULT_LOCK_WAIT, JsonFlag, State, fail
from panel.cli.output import ANNUALISING
from panel.threads import blas_threads

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
Global options may also follow the command: riskprem runs --store other.duckdb.
"""


def hoist_global_options(group, args: list[str]) -> list[str]:
    """``args`` with the root's own options that follow the command name moved in front of it, so
    ``riskprem runs --store X`` means ``riskprem --store X runs``.  Eager options (``--help``,
    ``--version``) stay where they are; ``--`` ends the search."""
    takes_value = {}
    for param in group.params:
        if getattr(param, "is_eager", False) or not getattr(param, "opts", None):
            continue
        for name in (*param.opts, *param.secondary_opts):
            takes_value[name] = not (param.is_flag or param.count)

    def width(token: str) -> int:  # how many tokens this global option spans (0: not one)
        name, eq, _ = token.partition("=")
        return 0 if name not in takes_value else 1 + (takes_value[name] and not eq)

    i = 0
    while i < len(args) and args[i] != "--":
        if width(args[i]):
            i += width(args[i])
        elif args[i].startswith("-"):
            i += 1                                  # another root option (click judges it)
        else:
            break
    if i >= len(args) or args[i] == "--":
        return list(args)
    moved, kept, rest = [], [], args[i + 1:]
    j = 0
    while j < len(rest):
        if rest[j] == "--":
            kept.extend(rest[j:])
            break
        n = width(rest[j])
        (moved if n else kept).extend(rest[j:j + max(n, 1)])
        j += max(n, 1)
    return [*args[:i], *moved, args[i], *kept]


class RootGroup(TyperGroup):
    """The root command group: accepts the global options after the command as well."""

    def parse_args(self, ctx, args):
        return super().parse_args(ctx, hoist_global_options(self, list(args)))

app = typer.Typer(help=HELP, no_args_is_help=True, add_completion=False, cls=RootGroup,
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
    show_version: Annotated[bool, typer.Option(
        "--version", is_eager=True, callback=lambda value: _print_version(value),
        help="Print the riskprem version and exit.")] = False,
) -> None:
    ctx.obj = State(store=store, quiet=quiet, verbose=verbose and not quiet, lock_wait=lock_wait)
    try:
        blas_threads()                  # read by every fit and every run's record: checked once, here
    except ValueError as error:
        fail(str(error))


def _print_version(value: bool) -> None:
    if value:
        typer.echo(__version__)
        raise typer.Exit()


@app.command()
def version(as_json: JsonFlag = False) -> None:
    """Print the riskprem version (with --json: also Python's and the platform's)."""
    if as_json:
        output.emit_json({"riskprem": __version__, "python": platform.python_version(),
                          "platform": platform.platform()})
        return
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
