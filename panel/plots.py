"""Charts of premium estimates (matplotlib, Agg backend, PNG files).  No printing, no store.

Every chart states its units: premia are annualised percent (a per-period premium and its standard
deviation times ``periods_per_year``), bands are 90% (mean +- 1.645 std), and the data cut-off
(``as_of``) is in the title.

- :func:`premium_paths`: filtered (real-time) and smoothed (revised) premium paths with bands,
  one panel per asset;
- :func:`cross_section_chart`: the premia at one date, ranked, with intervals;
- :func:`vintage_chart`: how the estimate for one asset and date moved across vintages.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

Z90 = 1.6448536269514722
UNIT = "% a year"
_FILTERED = "#1f6f8b"
_SMOOTHED = "#c2571a"


def _day(value) -> str:
    return str(pd.Timestamp(value).date())


def _annual(values, ppy: int) -> np.ndarray:
    return np.asarray(values, dtype=float) * ppy * 100.0


def premium_paths(estimates: pd.DataFrame, assets, ppy: int, as_of, title: str | None = None,
                  reference: pd.DataFrame | None = None, reference_label: str = "true premium") -> Figure:
    """Filtered and smoothed premium paths of ``assets`` with 90% bands.

    ``estimates``: the ``PanelFit.estimates`` columns (per-period decimals).  One panel per asset,
    shared time axis.  The vertical range follows the bands after each asset's first year (the
    first filtered estimates of a diffuse start are as wide as a single return and would flatten
    the rest).  ``reference``: optional dates x assets premia (per period) drawn dashed, e.g. the
    true premia of a simulation.
    """
    assets = list(assets)
    if not assets:
        raise ValueError("premium_paths needs at least one asset")
    missing = [a for a in assets if a not in set(estimates["asset"])]
    if missing:
        raise ValueError(f"no estimates for asset(s) {', '.join(missing)}")
    rows = len(assets)
    fig, axes = plt.subplots(rows, 1, figsize=(9.5, 2.6 * rows + 0.9), sharex=True, squeeze=False)
    for ax, asset in zip(axes[:, 0], assets):
        frame = estimates[estimates["asset"] == asset].sort_values("date")
        dates = pd.to_datetime(frame["date"])
        for kind, colour, label in (("filtered", _FILTERED, "filtered (real-time)"),
                                    ("smoothed", _SMOOTHED, "smoothed (revised)")):
            mean = _annual(frame[f"{kind}_mean"], ppy)
            std = _annual(frame[f"{kind}_std"], ppy)
            ax.fill_between(dates, mean - Z90 * std, mean + Z90 * std, color=colour, alpha=0.15, lw=0)
            ax.plot(dates, mean, color=colour, lw=1.6, label=f"{label}, 90% band")
        if reference is not None and asset in reference:
            ref = reference[asset].dropna()
            ax.plot(ref.index, _annual(ref, ppy), color="#222222", lw=1.1, ls="--", label=reference_label)
        ax.set_ylim(*_range(frame, ppy))
        ax.axhline(0.0, color="#555555", lw=0.8)
        ax.set_title(asset, loc="left", fontsize=10)
        ax.set_ylabel(f"premium, {UNIT}")
        ax.grid(alpha=0.3)
    axes[0, 0].legend(loc="upper right", fontsize=8, frameon=False)
    heading = title or "Premium paths"
    fig.suptitle(f"{heading} (as of {_day(as_of)}; annualised %, 90% bands)", fontsize=11)
    fig.tight_layout()
    return fig


def _range(frame: pd.DataFrame, ppy: int, skip: int = 12) -> tuple[float, float]:
    """Vertical range covering both bands after the first ``skip`` dates, with a margin."""
    body = frame.iloc[skip:] if len(frame) > 2 * skip else frame
    edges = []
    for kind in ("filtered", "smoothed"):
        mean = _annual(body[f"{kind}_mean"], ppy)
        std = _annual(body[f"{kind}_std"], ppy)
        edges += [mean - Z90 * std, mean + Z90 * std]
    values = np.concatenate(edges)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return -1.0, 1.0
    lo, hi = min(values.min(), 0.0), max(values.max(), 0.0)
    pad = 0.08 * (hi - lo or 1.0)
    return lo - pad, hi + pad


def cross_section_chart(table: pd.DataFrame, ppy: int, date, kind: str, as_of,
                        title: str | None = None) -> Figure:
    """The premia at one date, highest first, with 90% intervals and P(premium > 0).

    ``table``: ``CrossSection.table()`` columns ``asset, mean, std, prob_positive`` (per period).
    """
    frame = table.sort_values("mean", ascending=True, kind="stable")
    mean = _annual(frame["mean"], ppy)
    std = _annual(frame["std"], ppy)
    y = np.arange(len(frame))
    fig, ax = plt.subplots(figsize=(9.0, 0.55 * len(frame) + 1.8))
    colour = _FILTERED if kind == "filtered" else _SMOOTHED
    ax.errorbar(mean, y, xerr=Z90 * std, fmt="o", color=colour, ecolor=colour, capsize=3,
                label=f"{kind} premium, 90% interval")
    ax.axvline(0.0, color="#555555", lw=0.8)
    ax.set_yticks(y, list(frame["asset"]))
    for yi, m, p in zip(y, mean, frame["prob_positive"]):
        ax.annotate(f"P(>0) {100 * p:.0f}%", (m, yi), xytext=(0, 7), textcoords="offset points",
                    ha="center", fontsize=7, color="#333333")
    ax.set_xlabel(f"premium, {UNIT}")
    ax.grid(alpha=0.3, axis="x")
    ax.legend(loc="lower right", fontsize=8, frameon=False)
    heading = title or "Cross-section of premia"
    ax.set_title(f"{heading} at {_day(date)} ({kind}; as of {_day(as_of)}; annualised %)", fontsize=10)
    fig.tight_layout()
    return fig


def vintage_frame(vintages, asset: str, date) -> pd.DataFrame:
    """Collect one asset's estimate at ``date`` from each vintage.

    ``vintages``: iterable of ``(as_of, estimates)`` (``PanelFit.estimates`` columns).  Returns
    ``as_of, filtered_mean, filtered_std, smoothed_mean, smoothed_std`` for the vintages whose
    estimates include ``(asset, date)``, oldest cut-off first.
    """
    stamp = pd.Timestamp(date)
    rows = []
    for as_of, est in vintages:
        hit = est[(est["asset"] == asset) & (pd.to_datetime(est["date"]) == stamp)]
        if len(hit):
            row = hit.iloc[0]
            rows.append({"as_of": pd.Timestamp(as_of), **{c: float(row[c]) for c in
                         ("filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std")}})
    columns = ["as_of", "filtered_mean", "filtered_std", "smoothed_mean", "smoothed_std"]
    return pd.DataFrame(rows, columns=columns).sort_values("as_of", kind="stable").reset_index(drop=True)


def vintage_chart(history: pd.DataFrame, asset: str, date, ppy: int, title: str | None = None,
                  reference: float | None = None, reference_label: str = "true premium") -> Figure:
    """How the estimate of ``asset``'s premium at ``date`` moved across vintages.

    ``history``: ``as_of, smoothed_mean, smoothed_std`` (and optionally ``filtered_*``) per vintage
    (per period), e.g. :func:`vintage_frame` or the ``revision_history`` query.  The first vintage
    at ``date`` itself is the real-time (filtered) estimate; later vintages revise it.
    ``reference``: optional per-period premium drawn as a dashed line (e.g. the simulated truth).
    """
    if len(history) == 0:
        raise ValueError(f"no vintage has an estimate for {asset} at {_day(date)}")
    frame = history.sort_values("as_of", kind="stable")
    as_of = pd.to_datetime(frame["as_of"])
    mean = _annual(frame["smoothed_mean"], ppy)
    std = _annual(frame["smoothed_std"], ppy)
    fig, ax = plt.subplots(figsize=(9.0, 4.2))
    ax.errorbar(as_of, mean, yerr=Z90 * std, fmt="o-", color=_SMOOTHED, ecolor=_SMOOTHED, capsize=4,
                lw=1.4, label="estimate in each vintage (smoothed), 90% interval")
    realtime = frame[pd.to_datetime(frame["as_of"]) == pd.Timestamp(date)]
    if len(realtime) and "filtered_mean" in frame:
        ax.plot(pd.to_datetime(realtime["as_of"]), _annual(realtime["filtered_mean"], ppy), "s",
                color=_FILTERED, ms=8, label="real-time (filtered) estimate")
    if reference is not None:
        ax.axhline(_annual([reference], ppy)[0], color="#222222", lw=1.1, ls="--", label=reference_label)
    ax.axhline(0.0, color="#555555", lw=0.8)
    ax.set_xlabel("vintage (data cut-off, as_of)")
    ax.set_ylabel(f"premium at {_day(date)}, {UNIT}")
    ax.grid(alpha=0.3)
    ax.legend(loc="best", fontsize=8, frameon=False)
    heading = title or "Revisions across vintages"
    last = _day(as_of.iloc[-1])
    ax.set_title(f"{heading}: {asset} at {_day(date)} (vintages to {last}; annualised %)", fontsize=10)
    fig.tight_layout()
    return fig


def save(fig: Figure, path) -> Path:
    """Write ``fig`` as PNG to ``path`` (folder must exist) and close it; returns the path."""
    target = Path(path)
    fig.savefig(target, dpi=110, format="png")
    plt.close(fig)
    return target
