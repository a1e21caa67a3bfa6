"""``report``: one stored run as a self-contained HTML page to share.  The page is built by
:mod:`panel.report`; this module checks the target, writes the file and prints."""

from __future__ import annotations

from datetime import datetime, timezone
from pathlib import Path
from typing import Annotated

import typer

from panel import __version__
from panel.cli import output
from panel.cli.common import JsonFlag, RunArg, existing_folder, fail, state, store_for, user_errors


def report(
    ctx: typer.Context,
    run_id: RunArg,
    out: Annotated[Path | None, typer.Option("--out", help="HTML file to write (default: "
                   "riskprem-run<ID>-report.html here).", show_default=False)] = None,
    as_json: JsonFlag = False,
) -> None:
    """Write a run's report as one HTML file (charts inside, opens offline): data and settings, fit
    status in words, the cross-section with bands and probabilities, premium paths, revisions across
    vintages, parameters, diagnostics and the caution."""
    from panel.report import build_report

    st = state(ctx)
    target = out or Path(f"riskprem-run{run_id}-report.html")
    if target.suffix.lower() not in (".html", ".htm"):
        fail(f"--out {target}: a report is an HTML file; give a file name ending in .html")
    existing_folder(target, "--out")
    stamp = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    with store_for(st) as store, user_errors():
        page = build_report(store, run_id, caution=output.CAUTION,
                            generated=f"Written {stamp} by riskprem {__version__} from {st.location}.")
    target.write_text(page, encoding="utf-8")
    if as_json:
        output.emit_json({"run_id": run_id, "path": str(target), "bytes": len(page.encode("utf-8")),
                          "caution": output.CAUTION})
        return
    output.line(f"wrote {target} (report of run {run_id}, {len(page.encode('utf-8')) / 1e6:.1f} MB; "
                "open it in a browser, it needs no network)")
    output.caution()


def register(app: typer.Typer) -> None:
    app.command("report")(report)
