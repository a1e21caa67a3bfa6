"""Charts: file formats by ending, a readable grid for many assets, shared scale, titles that name the
data, no title/legend overlap, period-end date ticks, and a clear refusal when there is nothing to draw.

The estimates are invented (a deterministic table shaped like ``PanelFit.estimates``)."""

from __future__ import annotations

import matplotlib.dates as mdates
import numpy as np
import pandas as pd
import pytest

from panel import plots


def _estimates(n_assets: int = 12, months: int = 72) -> pd.DataFrame:
    rng = np.random.default_rng(7)
    dates = pd.date_range("2015-01-31", periods=months, freq="ME")
    rows = []
    for i in range(n_assets):
        level = 0.003 + 0.0005 * i + np.cumsum(rng.normal(0, 0.0002, months))
        rows.append(pd.DataFrame({"date": dates, "asset": f"sleeve {i + 1:02d}", "filtered_mean": level,
                                  "filtered_std": 0.003, "smoothed_mean": level * 0.9,
                                  "smoothed_std": 0.002}))
    return pd.concat(rows, ignore_index=True)


def _boxes_overlap(a, b) -> bool:
    return not (a.x1 <= b.x0 or b.x1 <= a.x0 or a.y1 <= b.y0 or b.y1 <= a.y0)


def test_many_assets_make_a_grid_not_a_strip_with_title_and_legend_apart():
    est = _estimates()
    assets = sorted(est["asset"].unique())
    fig = plots.premium_paths(est, assets, 12, "2020-12-31",
                              title=plots.heading("Premium paths", "sleeves", "monthly review"))
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert len(visible) == 12
    columns = {round(ax.get_position().x0, 3) for ax in visible}
    assert len(columns) == 3                       # 12 assets: 3 columns x 4 rows
    width, height = fig.get_size_inches()
    assert height < 1.5 * width                    # a grid, not a tall strip
    assert fig._suptitle.get_text().startswith("Premium paths: sleeves (monthly review)\nas of 2020-12-31")
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    title = fig._suptitle.get_window_extent(renderer)
    legend = fig.legends[0].get_window_extent(renderer)
    assert not _boxes_overlap(title, legend)
    assert all(not _boxes_overlap(legend, ax.get_window_extent(renderer)) for ax in visible)
    # one filled band per panel (smoothed); the filtered band is drawn as edges, so nothing blends
    assert all(len(ax.collections) == 1 for ax in visible)
    plots.render(fig)


def test_shared_scale_puts_every_panel_on_one_range():
    est = _estimates(5)
    assets = sorted(est["asset"].unique())
    own = plots.premium_paths(est, assets, 12, "2020-12-31")
    shared = plots.premium_paths(est, assets, 12, "2020-12-31", shared_scale=True)
    own_limits = {ax.get_ylim() for ax in own.axes if ax.get_visible()}
    shared_limits = {ax.get_ylim() for ax in shared.axes if ax.get_visible()}
    assert len(own_limits) == 5 and len(shared_limits) == 1
    assert "one scale for all panels" in shared._suptitle.get_text()
    plots.render(own), plots.render(shared)


def test_an_asset_whose_returns_end_early_is_titled_and_marked_at_its_last_return():
    est = _estimates(3, months=72)                 # 2015-01 to 2020-12
    assets = sorted(est["asset"].unique())
    last = pd.Series({assets[0]: pd.Timestamp("2018-06-30"), assets[1]: pd.Timestamp("2020-12-31"),
                      assets[2]: pd.Timestamp("2020-11-30")})
    fig = plots.premium_paths(est, assets, 12, "2020-12-31", last_return=last)
    axes = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title(loc="left") for ax in axes] == [
        f"{assets[0]} (to 2018-06-30)", assets[1], f"{assets[2]} (to 2020-11-30)"]
    dotted = [[line for line in ax.lines if line.get_linestyle() == ":"] for ax in axes]
    assert [len(d) for d in dotted] == [1, 0, 1]
    assert mdates.date2num(dotted[0][0].get_xdata()[0]) == mdates.date2num(pd.Timestamp("2018-06-30"))
    assert "last return (then: prediction)" in [t.get_text() for t in fig.legends[0].get_texts()]
    plain = plots.premium_paths(est, assets, 12, "2020-12-31")
    assert [ax.get_title(loc="left") for ax in plain.axes if ax.get_visible()] == assets
    plots.render(fig)


def test_date_ticks_sit_on_the_period_end_they_name():
    # Monthly data over six years: year-end ticks labelled by the month they end in.
    dates = pd.date_range("2015-01-31", periods=72, freq="ME")
    positions, labels = plots.period_ticks(dates, max_ticks=7)
    assert labels == ["2015-12", "2016-12", "2017-12", "2018-12", "2019-12", "2020-12"]
    assert positions[-1] == pd.Timestamp("2020-12-31")
    # Few vintages: every one, labelled in full; the 2020-12-31 vintage sits at 2020-12-31.
    vintages = pd.to_datetime(["2020-12-31", "2021-12-31", "2022-12-31"])
    positions, labels = plots.period_ticks(vintages)
    assert labels == ["2020-12-31", "2021-12-31", "2022-12-31"] and positions[0] == vintages[0]
    history = pd.DataFrame({"as_of": vintages, "filtered_mean": 0.004, "filtered_std": 0.002,
                            "smoothed_mean": [0.004, 0.0045, 0.005], "smoothed_std": 0.0015})
    fig = plots.vintage_chart(history, "sleeve 01", "2020-12-31", 12)
    ax = fig.axes[0]
    ticks = [pd.Timestamp(plots.matplotlib.dates.num2date(t)).tz_localize(None) for t in ax.get_xticks()]
    assert ticks == list(vintages)
    assert [t.get_text() for t in ax.get_xticklabels()] == ["2020-12-31", "2021-12-31", "2022-12-31"]
    plots.render(fig)


def test_formats_follow_the_file_ending(tmp_path):
    est = _estimates(2, 36)
    magic = {".png": b"\x89PNG\r\n\x1a\n", ".svg": b"<?xml", ".pdf": b"%PDF"}
    for ending, head in magic.items():
        fig = plots.premium_paths(est, ["sleeve 01", "sleeve 02"], 12, "2017-12-31")
        path = plots.save(fig, tmp_path / f"chart{ending.upper()}")
        assert path.read_bytes()[: len(head)] == head
    # reproducible bytes: no creation date in SVG or PDF
    for fmt in ("svg", "pdf"):
        one = plots.render(plots.premium_paths(est, ["sleeve 01"], 12, "2017-12-31"), fmt)
        two = plots.render(plots.premium_paths(est, ["sleeve 01"], 12, "2017-12-31"), fmt)
        assert one == two
    with pytest.raises(plots.ChartError, match=r"give a file name ending in \.png, \.svg, \.pdf"):
        plots.save(plots.premium_paths(est, ["sleeve 01"], 12, "2017-12-31"), tmp_path / "chart.jpg")
    assert not (tmp_path / "chart.jpg").exists()


def test_nothing_to_show_is_one_clear_line():
    one = pd.DataFrame({"as_of": [pd.Timestamp("2020-12-31")], "smoothed_mean": [0.004], "smoothed_std": [0.001]})
    for history, fragment in ((one.iloc[:0], "no vintage has an estimate"), (one, "only one vintage")):
        with pytest.raises(plots.ChartError, match=fragment) as caught:
            plots.vintage_chart(history, "sleeve 01", "2020-12-31", 12)
        assert "\n" not in str(caught.value)
    lines = one.assign(asset="sleeve 01")
    with pytest.raises(plots.ChartError, match="only one vintage"):
        plots.vintage_lines(lines, "2020-12-31", 12)
    with pytest.raises(plots.ChartError, match="at least one asset"):
        plots.premium_paths(_estimates(1, 12), [], 12, "2015-12-31")


def test_vintage_lines_draw_one_line_per_asset():
    rows = [{"asset": a, "as_of": pd.Timestamp(d), "smoothed_mean": 0.001 * i + 0.0001 * j}
            for i, a in enumerate(["<b>north</b>", "south"]) for j, d in enumerate(["2021-12-31", "2022-12-31"])]
    fig = plots.vintage_lines(pd.DataFrame(rows), "2021-12-31", 12, title="Revisions")
    ax = fig.axes[0]
    assert [t.get_text() for t in ax.get_legend().get_texts()] == ["<b>north</b>", "south"]
    assert np.allclose(ax.get_lines()[0].get_ydata(), [0.0, 0.12])
    plots.render(fig)


def test_asset_names_are_drawn_literally():
    # "$x^$" would be broken math markup; names are user data and must be drawn as written
    est = _estimates(2, 24)
    est["asset"] = est["asset"].map({"sleeve 01": "$x^$ carry", "sleeve 02": "50% $ bonds $"})
    fig = plots.premium_paths(est, ["$x^$ carry", "50% $ bonds $"], 12, "2016-12-31")
    assert [ax.get_title(loc="left") for ax in fig.axes[:2]] == ["$x^$ carry", "50% $ bonds $"]
    assert plots.render(fig, "svg").startswith(b"<?xml")
