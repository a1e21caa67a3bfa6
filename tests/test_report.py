"""The HTML report of a run: content, escaping, self-containment, and that a real browser renders it.

Data: the invented five-sleeve panel of :mod:`tests.cli_helpers`, renamed so that asset and dataset
names carry HTML (they are user data and must come out as text).  The browser check runs the
Debian ``chromium`` package headless; it is skipped, saying so, only where chromium is not installed
(``.ci/run`` installs it).
"""

from __future__ import annotations

import base64
import re
import shutil
import subprocess
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from panel import ModelSpec, Panel, Prior, fit
from panel.report import build_report, gather
from panel.report.content import STATUS_WORDS, setting_lines
from panel.store import open_store, write_dataset, write_run
from panel.vintages.reproduce import record_fit, store_fit
from tests.cli_helpers import cli_small_frame

HOSTILE = ["<script>alert(1)</script>", 'Tom & "Jerry"', "Cedar", "Douglas", "Elm </td>"]
DATASET = "<b>trees</b> & co"
CAUTION = "Caution: invented test caution, not investment advice."
SECTION_IDS = ("data", "settings", "fit", "cross-section", "paths", "vintages", "parameters", "diagnostics",
               "caution")


@pytest.fixture(scope="module")
def report_store(tmp_path_factory):
    """Store with the renamed panel: run 1 = fit to 2017-12-31, run 2 = full fit (same model, so two
    vintages), run 3 = run 2's record marked as stopped at the iteration limit."""
    frame = cli_small_frame()
    frame.columns = HOSTILE
    panel = Panel.from_frame(frame)
    spec = ModelSpec(premium_prior=Prior(0.01, 60), std_errors="never", max_iter=300)
    path = tmp_path_factory.mktemp("report") / "report.duckdb"
    with open_store(path) as store:
        digest = write_dataset(store, panel, DATASET)
        store_fit(store, fit(panel.cut("2017-12-31"), spec), digest, label="first <i>cut</i>")
        full = fit(panel, spec)
        store_fit(store, full, digest, label="full <i>sample</i>")
        run, tables = record_fit(full, digest, kind="reproduce", label="stopped")
        run.update(status="max_iter", converged=False, message="reached 300 E-steps")
        write_run(store, run, tables)
    return path


@pytest.fixture(scope="module")
def report_page(report_store) -> str:
    """Run 2's report (built once for the tests that read it)."""
    with open_store(report_store, read_only=True) as store:
        return build_report(store, 2, caution=CAUTION)


class _Page(HTMLParser):
    """Collects element ids, img sources, script tags and the text of a page."""

    def __init__(self):
        super().__init__()
        self.ids, self.images, self.scripts, self.text = [], [], 0, []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if "id" in attrs:
            self.ids.append(attrs["id"])
        if tag == "img":
            self.images.append(attrs.get("src", ""))
        self.scripts += tag == "script"

    def handle_data(self, data):
        self.text.append(data)


def _parse(page: str) -> _Page:
    parser = _Page()
    parser.feed(page)
    return parser


def test_page_is_self_contained_and_escapes_user_text(report_page):
    page = report_page
    parsed = _parse(page)
    assert [i for i in parsed.ids if i in SECTION_IDS] == list(SECTION_IDS)
    assert parsed.scripts == 0
    # user data is text: the names appear escaped in the markup and verbatim in the text
    text = "".join(parsed.text)
    for name in HOSTILE + [DATASET, "full <i>sample</i>"]:
        assert name in text
    assert "<script>alert" not in page and "<b>trees" not in page and "<i>sample" not in page
    # nothing is loaded from elsewhere: a policy forbids it and no attribute points out of the file
    assert "default-src 'none'; img-src data:" in page
    assert not re.search(r"""(src|href)\s*=\s*["'](?!data:|#)""", page)
    assert len(parsed.images) == 3  # cross-section, paths, revisions
    for src in parsed.images:
        head, data = src.split(",", 1)
        assert head == "data:image/svg+xml;base64"
        ET.fromstring(base64.b64decode(data))  # a well-formed SVG document
    assert text.count(CAUTION) == 2 and "the model itself is wrong" in text  # top and own section
    assert "Premium volatility V% a year" in text and "sqrt(h x ppy)" in text


def test_numbers_are_the_runs_annualised_estimates(report_store, report_page):
    with open_store(report_store, read_only=True) as store:
        content = gather(store, 2)
    cs = content.cross_section
    assert cs.date == pd.Timestamp("2019-12-31")
    # P(premium > 0) is the normal posterior probability (reference: scipy.stats.norm)
    assert np.allclose(cs.prob_positive, stats.norm.sf(0.0, loc=cs.mean, scale=cs.std))
    # at the as-of date the cross-section is the stored filtered estimate
    est = content.tables["estimates"]
    last = est[pd.to_datetime(est["date"]) == cs.date].set_index("asset").loc[list(cs.assets)]
    assert np.allclose(cs.mean, last["filtered_mean"], rtol=1e-8, atol=1e-12)
    top = cs.table().iloc[0]
    text = "".join(_parse(report_page).text)
    assert f"{100 * 12 * top['mean']:,.2f}" in text
    # two vintages of the same model: the first cut-off is the revision date
    assert list(content.vintages["run_id"]) == [1, 2]
    assert content.revision_date == pd.Timestamp("2017-12-31")
    assert set(content.revisions["asset"]) == set(HOSTILE)


def test_fit_status_in_plain_words(report_store):
    with open_store(report_store, read_only=True) as store:
        stopped = "".join(_parse(build_report(store, 3, caution=CAUTION)).text)
        first = gather(store, 1)
    assert STATUS_WORDS["max_iter"][0] in stopped and "raise --max-iter" in stopped
    assert "reached 300 E-steps" in stopped
    assert first.status_words == STATUS_WORDS[first.run["status"]]
    # run 1 is the first vintage: nothing to revise yet
    assert len(first.vintages) == 1 and first.revisions.empty


def test_legacy_premium_vol_settings_are_shown_in_todays_convention(report_store):
    with open_store(report_store, read_only=True) as store:
        content = gather(store, 2)
    legacy = ModelSpec(premium_prior=Prior(0.01, 60), premium_vol_convention="sqrt-ppy")
    lines = dict(setting_lines(legacy, {}, content.params, 12))
    # legacy 1% = sqrt(12 q), so q = 0.01^2/12; today's V = sqrt(q 12^3) = 12% (panel/units.py)
    assert lines["premium prior"].startswith("12% a year (stored as 1 in the legacy")
    today = dict(setting_lines(content.spec, {}, content.params, 12))
    assert today["premium prior"] == "1% a year, weight 60 periods"


# ---------------------------------------------------------------------------------------------
# a real browser

CHROMIUM = shutil.which("chromium")
BROWSER_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--hide-scrollbars")


def _browse(page: Path, folder: Path, action: str) -> subprocess.CompletedProcess:
    """Chromium headless on ``page`` with ``action`` (``--screenshot=...`` or ``--dump-dom``);
    console messages go to stderr (``--enable-logging=stderr``)."""
    profile = folder / f"profile-{action.strip('-').split('=')[0]}"
    command = [CHROMIUM, *BROWSER_FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0",
               "--window-size=1200,2000", action, page.resolve().as_uri()]
    return subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)


def _console_lines(stderr: str) -> list[str]:
    """The page's console messages (errors, CSP refusals, script output) in chromium's log."""
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


needs_chromium = pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (apt-get install "
                                    "chromium); .ci/run installs it")


@needs_chromium
def test_the_console_check_sees_errors_and_blocked_loads(tmp_path):
    # The check below must be able to fail: a page that logs an error and one whose policy blocks
    # an outside image both leave console lines.
    noisy = tmp_path / "noisy.html"
    noisy.write_text("<!DOCTYPE html><html><body><p>x</p><script>console.error('broken chart')</script>"
                     "</body></html>")
    assert any("broken chart" in line for line in _console_lines(_browse(noisy, tmp_path, "--dump-dom").stderr))
    blocked = tmp_path / "blocked.html"
    blocked.write_text("<!DOCTYPE html><html><head><meta http-equiv=\"Content-Security-Policy\" "
                       "content=\"default-src 'none'\"></head><body><img src=\"https://example.invalid/a.png\">"
                       "</body></html>")
    assert _console_lines(_browse(blocked, tmp_path, "--dump-dom").stderr)


@needs_chromium
def test_chromium_renders_the_report(report_page, tmp_path):
    from PIL import Image

    target = tmp_path / "report.html"
    target.write_text(report_page, encoding="utf-8")
    shot = tmp_path / "report.png"
    done = _browse(target, tmp_path, f"--screenshot={shot}")
    assert done.returncode == 0, done.stderr[-2000:]
    assert _console_lines(done.stderr) == []
    image = Image.open(shot).convert("RGB")
    assert image.size == (1200, 2000)
    colours = image.getcolors(maxcolors=1 << 20)
    assert colours is not None and len(colours) > 50          # not a blank or single-colour page
    dominant = max(colours)[0] / (image.size[0] * image.size[1])
    assert dominant < 0.97                                     # the background does not fill the view
    dom = _browse(target, tmp_path, "--dump-dom")
    assert dom.returncode == 0 and _console_lines(dom.stderr) == []
    rendered = _parse(dom.stdout)
    assert [i for i in rendered.ids if i in SECTION_IDS] == list(SECTION_IDS)
    assert len(rendered.images) == 3
