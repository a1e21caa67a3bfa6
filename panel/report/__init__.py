"""A stored run as one self-contained HTML page to share (no printing, no SQL).

``build_report(store, run_id, caution=...)`` returns the page as a string; :mod:`panel.report.content`
gathers what it shows from the store, :mod:`panel.report.page` writes the HTML (charts embedded as
SVG, no scripts, nothing loaded from elsewhere).
"""

from __future__ import annotations

from panel.report.content import ReportContent, gather


def build_report(store, run_id: int, *, caution: str, generated: str = "") -> str:
    """The HTML report of stored run ``run_id``.  ``caution``: the sentence that warns readers how to
    use the estimates (shown at the top and in its own section); ``generated``: a footer line."""
    from panel.report.page import render_page

    return render_page(gather(store, run_id), caution=caution, generated=generated)


__all__ = ["ReportContent", "build_report", "gather"]
