"""Root of the ``riskprem`` command line."""

from __future__ import annotations

import typer

from panel import __version__

app = typer.Typer(help="Pooled risk-premium estimates with a versioned store of vintages.", no_args_is_help=True)


@app.command()
def version() -> None:
    """Print the riskprem version."""
    typer.echo(__version__)


def main() -> None:  # console-script entry point
    app()
