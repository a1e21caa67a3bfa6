"""Charts of premium estimates (matplotlib, Agg backend; PNG, SVG or PDF).  No printing, no store.

Every chart states its units: premia are annualised percent (a per-period premium and its standard
deviation times ``periods_per_year``), bands are 90% (mean +- 1.645 std), and the data cut-off
(``as_of``) is in the title.  Callers name the data in the title with :func:`heading` (dataset and
label, not a run number).

- :func:`premium_paths`: filtered (real-time) and smoothed (revised) premium paths with bands, a
  grid of small panels (one per asset), optionally on one shared vertical scale;
- :func:`cross_section_chart`: the premia at one date, ranked, with intervals and P(premium > 0);
- :func:`vintage_chart`: how the estimate for one asset and date moved across vintages;
- :func:`vintage_lines`: the same for several assets at once (smoothed means only).

A chart with nothing to show raises :class:`ChartError` (a ``ValueError`` with a one-line message
naming the fix).  Date axes are ticked at the data's own period ends and labelled by the period
they end (a 2020-12-31 vintage is labelled 2020-12, not placed under a 2021-01 tick).
"""

from __future__ import annotations

import functools
import io
import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402
from matplotlib.ticker import NullLocator  # noqa: E402

Z90 = 1.6448536269514722
UNIT = "% a year"
#: Chart file formats by file-name ending.
FORMATS = {".png": "png", ".svg": "svg", ".pdf": "pdf"}
PNG_DPI = 144

# Own palette: the smoothed (revised) view is a filled warm band, the filtered (real-time) view a
# dark blue line whose band is drawn as two thin edges, so the two never blend into one colour.
_FILTERED = "#1f3f8f"
_SMOOTHED = "#b8560f"
_SMOOTHED_FILL = "#f4c37d"
_ZERO = "#4a4a4a"
_REFERENCE = "#1b1b1b"
#: Distinct line colours for several assets on one chart (cycled beyond twelve).
_SERIES = ("#1f3f8f", "#c0392b", "#2e8b57", "#8e44ad", "#d4880f", "#17808a", "#7f5539", "#d63384",
           "#556b2f", "#5c6bc0", "#a0522d", "#2f4f4f")


def _plain_text(chart):
    """Draw ``chart`` with user text taken literally: an asset named ``$x^$`` is not math markup."""
    @functools.wraps(chart)
    def drawn(*args, **kwargs):
        with matplotlib.rc_context({"text.parse_math": False}):
            return chart(*args, **kwargs)
    return drawn


class ChartError(ValueError):
    """A chart that cannot be drawn or written; the message is one line naming the fix."""


def _day(value) -> str:
    return str(pd.Timestamp(value).date())


def _annual(values, ppy: int) -> np.ndarray:
    return np.asarray(values, dtype=float) * ppy * 100.0


def heading(what: str, dataset: str | None = None, label: str | None = None) -> str:
    """A chart heading naming the data: ``"Premium paths: sleeves (monthly review)"``."""
    named = dataset or ""
    if label:
        named = f"{named} ({label})" if named else str(label)
    return f"{what}: {named}" if named else what


def chart_format(path) -> str:
    """The format (``png``, ``svg``, ``pdf``) of a chart file name; ChartError for other endings."""
    suffix = Path(path).suffix.lower()
    if suffix not in FORMATS:
        raise ChartError(f"cannot write a chart to {Path(path).name}: give a file name ending in "
                         f"{', '.join(FORMATS)} (the ending picks the format)")
    return FORMATS[suffix]


def period_ticks(dates, max_ticks: int = 7) -> tuple[list[pd.Timestamp], list[str]]:
    """Tick positions among ``dates`` (period ends) and their labels, at most ``max_ticks``.

    Few dates: every date, labelled in full.  Otherwise the last date of every ``step``-th calendar
    month (step 1, 2, 3, 6, 12, 24, ... months, the smallest giving at most ``max_ticks``; with
    step 12 the year ends), labelled ``YYYY-MM`` -- the month the period ends in.
    """
    d = pd.DatetimeIndex(sorted(set(pd.to_datetime(list(dates)))))
    if len(d) == 0:
        return [], []
    if len(d) <= max_ticks:
        return list(d), [_day(x) for x in d]
    month = np.asarray(d.year * 12 + d.month - 1)
    last = pd.Series(d, index=month).groupby(level=0).last()
    span = int(month.max() - month.min() + 1)
    step = next((s for s in (1, 2, 3, 6, 12, 24, 36, 60, 120, 240, 600) if span / s <= max_ticks), 1200)
    chosen = last[(last.index.to_numpy() + 1) % step == 0]
    if len(chosen) < 2:  # e.g. a few vintages at irregular months: every k-th date instead
        stride = math.ceil(len(d) / max_ticks)
        picked = list(d[::-1][::stride][::-1])
        return picked, [_day(x) for x in picked]
    return list(chosen), [x.strftime("%Y-%m") for x in chosen]


def _date_axis(ax, dates, max_ticks: int = 7) -> None:
    positions, labels = period_ticks(dates, max_ticks)
    ax.set_xticks(positions, labels)
    ax.xaxis.set_minor_locator(NullLocator())


def band_edges(mean, std, ppy: int, q05=None, q95=None):
    """(low, high) edges of 90% bands, annualised: a Bayesian run's posterior 5% and 95% quantiles
    ``q05``/``q95`` (per period) where given and finite, else mean -+ 1.645 std — element by
    element, so ML and Bayesian vintages can share one chart.  Scalars or arrays."""
    m, s = _annual(mean, ppy), _annual(std, ppy)
    lo, hi = m - Z90 * s, m + Z90 * s
    if q05 is not None and q95 is not None:
        qlo, qhi = _annual(q05, ppy), _annual(q95, ppy)
        use = np.isfinite(qlo) & np.isfinite(qhi)
        lo, hi = np.where(use, qlo, lo), np.where(use, qhi, hi)
    return lo, hi


def _kind_edges(frame: pd.DataFrame, kind: str, ppy: int):
    """Band edges of ``kind`` ("filtered" | "smoothed") for rows of ``PanelFit.estimates``."""
    return band_edges(frame[f"{kind}_mean"], frame[f"{kind}_std"], ppy, frame.get(f"{kind}_q05"),
                      frame.get(f"{kind}_q95"))


def _band_edges(frame: pd.DataFrame, ppy: int, skip: int = 12) -> np.ndarray:
    """Both bands' edges after the first ``skip`` dates (the first filtered estimates of a diffuse
    start are as wide as a single return and would flatten the rest)."""
    body = frame.iloc[skip:] if len(frame) > 2 * skip else frame
    edges = []
    for kind in ("filtered", "smoothed"):
        edges += list(_kind_edges(body, kind, ppy))
    values = np.concatenate(edges) if edges else np.empty(0)
    return values[np.isfinite(values)]


def _range(values: np.ndarray) -> tuple[float, float]:
    """A vertical range covering ``values`` and zero, with a margin."""
    if values.size == 0:
        return -1.0, 1.0
    lo, hi = min(values.min(), 0.0), max(values.max(), 0.0)
    pad = 0.08 * (hi - lo or 1.0)
    return lo - pad, hi + pad


def _grid_shape(n: int) -> int:
    """Columns of the small-multiple grid for ``n`` assets."""
    return 1 if n == 1 else 2 if n <= 4 else 3 if n <= 12 else 4


@_plain_text
def premium_paths(estimates: pd.DataFrame, assets, ppy: int, as_of, title: str | None = None,
                  reference: pd.DataFrame | None = None, reference_label: str = "true premium",
                  shared_scale: bool = False, last_return=None) -> Figure:
    """Filtered and smoothed premium paths of ``assets`` with 90% bands, one small panel per asset.

    ``estimates``: the ``PanelFit.estimates`` columns (per-period decimals).  Panels sit in a grid
    (1 column for one asset, 2 up to 4, 3 up to 12, then 4) on a shared time axis.  Each panel's
    vertical range follows its bands after the asset's first year; ``shared_scale`` puts every panel
    on one range (comparable heights).  ``reference``: optional dates x assets premia (per period)
    drawn dashed, e.g. the true premia of a simulation.  ``last_return``: each asset's last date with
    a return (:meth:`panel.data.Panel.last_returns`); an asset whose last return precedes ``as_of``
    (it has left, or its latest returns are late) is titled with that date and a dotted line marks
    it: the paths after it are the model's prediction from that return.
    """
    assets = list(assets)
    if not assets:
        raise ChartError("a premium-paths chart needs at least one asset")
    known = set(estimates["asset"])
    missing = [a for a in assets if a not in known]
    if missing:
        raise ChartError(f"no estimates for asset(s) {', '.join(missing)}")
    n = len(assets)
    cols = _grid_shape(n)
    rows = math.ceil(n / cols)
    width = 9.5 if cols == 1 else 4.3 * cols + 0.6
    fig, axes = plt.subplots(rows, cols, figsize=(width, 2.5 * rows + 1.3), sharex=True, squeeze=False,
                             sharey=shared_scale, layout="constrained")
    frames = {a: estimates[estimates["asset"] == a].sort_values("date") for a in assets}
    all_dates = pd.to_datetime(estimates.loc[estimates["asset"].isin(assets), "date"])
    common = _range(np.concatenate([_band_edges(f, ppy) for f in frames.values()])) if shared_scale else None
    ended = {} if last_return is None else \
        {a: pd.Timestamp(last_return[a]) for a in assets if pd.Timestamp(last_return[a]) < pd.Timestamp(as_of)}
    for index, asset in enumerate(assets):
        ax = axes[index // cols, index % cols]
        frame = frames[asset]
        dates = pd.to_datetime(frame["date"])
        smooth = _annual(frame["smoothed_mean"], ppy)
        ax.fill_between(dates, *_kind_edges(frame, "smoothed", ppy), color=_SMOOTHED_FILL,
                        alpha=0.55, lw=0)
        ax.plot(dates, smooth, color=_SMOOTHED, lw=1.6)
        filt = _annual(frame["filtered_mean"], ppy)
        for edge in _kind_edges(frame, "filtered", ppy):
            ax.plot(dates, edge, color=_FILTERED, lw=0.7, alpha=0.6)
        ax.plot(dates, filt, color=_FILTERED, lw=1.3)
        if reference is not None and asset in reference:
            ref = reference[asset].dropna()
            ax.plot(ref.index, _annual(ref, ppy), color=_REFERENCE, lw=1.1, ls="--")
        ax.set_ylim(*(common or _range(_band_edges(frame, ppy))))
        ax.axhline(0.0, color=_ZERO, lw=0.8)
        if asset in ended:
            ax.axvline(ended[asset], color=_ZERO, lw=1.0, ls=":")
        ax.set_title(f"{asset} (to {_day(ended[asset])})" if asset in ended else asset, loc="left",
                     fontsize=9.5, fontweight="bold")
        if index % cols == 0:
            ax.set_ylabel(f"premium, {UNIT}", fontsize=8.5)
        ax.tick_params(labelsize=8)
        ax.grid(alpha=0.25)
    for index in range(n, rows * cols):
        axes[index // cols, index % cols].set_visible(False)
    _date_axis(axes[0, 0], all_dates, max_ticks=6 if cols > 1 else 8)
    for index in range(n):  # a hidden panel below leaves its column's last panel without tick labels
        if index + cols >= n:
            axes[index // cols, index % cols].xaxis.set_tick_params(labelbottom=True)
    handles = [Line2D([], [], color=_FILTERED, lw=1.3, label="filtered (real-time)"),
               Line2D([], [], color=_FILTERED, lw=0.7, alpha=0.6, label="its 90% band (edges)"),
               Line2D([], [], color=_SMOOTHED, lw=1.6, label="smoothed (revised)"),
               Patch(color=_SMOOTHED_FILL, alpha=0.55, label="its 90% band")]
    if reference is not None:
        handles.append(Line2D([], [], color=_REFERENCE, lw=1.1, ls="--", label=reference_label))
    if ended:
        handles.append(Line2D([], [], color=_ZERO, lw=1.0, ls=":", label="last return (then: prediction)"))
    scale = "one scale for all panels" if shared_scale else "each panel its own scale"
    fig.suptitle(f"{title or 'Premium paths'}\nas of {_day(as_of)}; annualised %, 90% bands; {scale}",
                 fontsize=11)
    fig.legend(handles=handles, loc="outside lower center", ncol=len(handles), fontsize=8.5, frameon=False)
    return fig


@_plain_text
def cross_section_chart(table: pd.DataFrame, ppy: int, date, kind: str, as_of,
                        title: str | None = None) -> Figure:
    """The premia at one date, highest at the top, with 90% intervals and P(premium > 0) beside.

    ``table``: ``CrossSection.table()`` columns ``asset, mean, std, prob_positive`` (per period;
    a Bayesian run's ``q05, q95`` give the intervals; ``last_return`` marks an asset whose last
    return precedes ``date``: :func:`panel.model.result.asset_labels`).
    """
    from panel.model.result import asset_labels

    if len(table) == 0:
        raise ChartError(f"no asset has a premium estimate at {_day(date)}; pick a later date")
    frame = table.sort_values("mean", ascending=True, kind="stable")
    mean = _annual(frame["mean"], ppy)
    y = np.arange(len(frame))
    fig, ax = plt.subplots(figsize=(9.0, 0.42 * len(frame) + 1.9), layout="constrained")
    colour = _FILTERED if kind == "filtered" else _SMOOTHED
    ax.hlines(y, *band_edges(frame["mean"], frame["std"], ppy, frame.get("q05"), frame.get("q95")),
              color=colour, lw=2.2, alpha=0.45)
    ax.plot(mean, y, "o", color=colour, ms=6)
    ax.axvline(0.0, color=_ZERO, lw=0.8)
    ax.set_yticks(y, asset_labels(frame, date), fontsize=8.5)
    ax.set_ylim(-0.7, len(frame) - 0.3)
    side = ax.secondary_yaxis("right")
    side.set_yticks(y, [f"{100 * p:.0f}%" for p in frame["prob_positive"]], fontsize=8)
    side.set_ylabel("P(premium > 0)", fontsize=8.5)
    ax.set_xlabel(f"{kind} premium at {_day(date)}, {UNIT} (dot: mean; bar: 90% interval)", fontsize=9)
    ax.grid(alpha=0.25, axis="x")
    basis = "real-time" if kind == "filtered" else "revised"
    ax.set_title(f"{title or 'Cross-section of premia'}\nat {_day(date)}, {kind} ({basis}); as of "
                 f"{_day(as_of)}; annualised %", fontsize=10)
    return fig


def vintage_frame(vintages, asset: str, date) -> pd.DataFrame:
    """Collect one asset's estimate at ``date`` from each vintage.

    ``vintages``: iterable of ``(as_of, estimates)`` (``PanelFit.estimates`` columns).  Returns
    ``as_of, filtered_mean, filtered_std, smoothed_mean, smoothed_std, smoothed_q05, smoothed_q95``
    (the quantiles NaN for a maximum-likelihood vintage) for the vintages whose estimates include
    ``(asset, date)``, oldest cut-off first.
    """
    stamp = pd.Timestamp(date)
    values = ("filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std", "smoothed_q05",
              "smoothed_q95")
    rows = []
    for as_of, est in vintages:
        hit = est[(est["asset"] == asset) & (pd.to_datetime(est["date"]) == stamp)]
        if len(hit):
            row = hit.iloc[0]
            rows.append({"as_of": pd.Timestamp(as_of),
                         **{c: float(row[c]) if c in row.index else np.nan for c in values}})
    frame = pd.DataFrame(rows, columns=["as_of", *values])
    return frame.sort_values("as_of", kind="stable").reset_index(drop=True)


def _need_vintages(count: int, what: str, date, first_as_of=None) -> None:
    """ChartError unless at least two vintages cover ``date``."""
    if count == 0:
        raise ChartError(f"no vintage has an estimate for {what} at {_day(date)}; pick a date on or "
                         "before the newest cut-off")
    if count == 1:
        raise ChartError(f"only one vintage (as of {_day(first_as_of)}) has an estimate for {what} at "
                         f"{_day(date)}, so there is no revision to draw; store more vintages "
                         "(riskprem backfill) or pick an earlier date")


@_plain_text
def vintage_chart(history: pd.DataFrame, asset: str, date, ppy: int, title: str | None = None,
                  reference: float | None = None, reference_label: str = "true premium") -> Figure:
    """How the estimate of ``asset``'s premium at ``date`` moved across vintages (two or more).

    ``history``: ``as_of, smoothed_mean, smoothed_std`` (and optionally ``filtered_*`` and a
    Bayesian vintage's ``smoothed_q05, smoothed_q95``, which then give its band) per vintage (per
    period), e.g. :func:`vintage_frame` or the ``revision_history`` query.  The first vintage at
    ``date`` itself is the real-time (filtered) estimate; later vintages revise it.
    ``reference``: optional per-period premium drawn as a dashed line (e.g. the simulated truth).
    """
    frame = history.sort_values("as_of", kind="stable")
    _need_vintages(len(frame), asset, date, frame["as_of"].iloc[0] if len(frame) else None)
    as_of = pd.to_datetime(frame["as_of"])
    mean = _annual(frame["smoothed_mean"], ppy)
    lo, hi = band_edges(frame["smoothed_mean"], frame["smoothed_std"], ppy, frame.get("smoothed_q05"),
                        frame.get("smoothed_q95"))
    fig, ax = plt.subplots(figsize=(9.0, 4.4), layout="constrained")
    ax.fill_between(as_of, lo, hi, color=_SMOOTHED_FILL, alpha=0.55, lw=0, label="90% interval")
    ax.plot(as_of, mean, "o-", color=_SMOOTHED, lw=1.5, ms=5, label="estimate in each vintage (smoothed)")
    realtime = frame[as_of == pd.Timestamp(date)]
    if len(realtime) and "filtered_mean" in frame:
        ax.plot(pd.to_datetime(realtime["as_of"]), _annual(realtime["filtered_mean"], ppy), "D",
                color=_FILTERED, ms=7, label="real-time (filtered) estimate")
    if reference is not None:
        ax.axhline(_annual([reference], ppy)[0], color=_REFERENCE, lw=1.1, ls="--", label=reference_label)
    ax.axhline(0.0, color=_ZERO, lw=0.8)
    _date_axis(ax, as_of)
    ax.set_xlabel("vintage (data cut-off, as of)")
    ax.set_ylabel(f"premium at {_day(date)}, {UNIT}")
    ax.grid(alpha=0.25)
    fig.legend(loc="outside lower center", ncol=4, fontsize=8, frameon=False)
    fig.suptitle(f"{title or 'Revisions across vintages'}\n{asset} at {_day(date)}; {len(frame)} vintages "
                 f"{_day(as_of.iloc[0])} to {_day(as_of.iloc[-1])}; annualised %", fontsize=10.5)
    return fig


@_plain_text
def vintage_lines(history: pd.DataFrame, date, ppy: int, title: str | None = None) -> Figure:
    """Several assets' smoothed premium at ``date`` in each vintage, one line per asset.

    ``history``: ``asset, as_of, smoothed_mean`` (per period), two or more vintages.
    """
    vintages = pd.to_datetime(history["as_of"]).drop_duplicates().sort_values()
    _need_vintages(len(vintages), "any asset", date, vintages.iloc[0] if len(vintages) else None)
    fig, ax = plt.subplots(figsize=(9.5, 4.6), layout="constrained")
    for i, (asset, frame) in enumerate(history.groupby("asset", sort=False)):
        frame = frame.sort_values("as_of", kind="stable")
        ax.plot(pd.to_datetime(frame["as_of"]), _annual(frame["smoothed_mean"], ppy), "o-", ms=4, lw=1.4,
                color=_SERIES[i % len(_SERIES)], label=str(asset))
    ax.axhline(0.0, color=_ZERO, lw=0.8)
    _date_axis(ax, vintages)
    ax.set_xlabel("vintage (data cut-off, as of)")
    ax.set_ylabel(f"premium at {_day(date)}, {UNIT}")
    ax.grid(alpha=0.25)
    ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=8, frameon=False)
    ax.set_title(f"{title or 'Revisions across vintages'}\npremia at {_day(date)} (smoothed) in "
                 f"{len(vintages)} vintages; annualised %", fontsize=10.5)
    return fig


def render(fig: Figure, fmt: str = "png") -> bytes:
    """``fig`` as PNG, SVG or PDF bytes (no creation date, so output is reproducible); closes it."""
    if fmt not in FORMATS.values():
        raise ChartError(f"unknown chart format {fmt!r}; use one of {', '.join(FORMATS.values())}")
    metadata = {"png": {}, "svg": {"Date": None}, "pdf": {"CreationDate": None}}[fmt]
    buffer = io.BytesIO()
    try:
        with matplotlib.rc_context({"svg.hashsalt": "riskprem", "svg.fonttype": "path"}):
            fig.savefig(buffer, format=fmt, dpi=PNG_DPI, metadata=metadata)
    finally:
        plt.close(fig)
    return buffer.getvalue()


def save(fig: Figure, path) -> Path:
    """Write ``fig`` to ``path`` (folder must exist) in the format its ending names (.png, .svg,
    .pdf); closes the figure and returns the path."""
    target = Path(path)
    try:
        fmt = chart_format(target)
    except ChartError:
        plt.close(fig)
        raise
    target.write_bytes(render(fig, fmt))
    return target
