"""A stored run's inputs, rebuilt from the store: the data it saw (its dataset cut at its as-of date
with its window), its recorded model spec and starting values.  Used by ``reproduce`` (any run) and
by backfill (vintages); no printing, no SQL (the store's API reads).
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import pandas as pd

from panel.data import Panel
from panel.model.params import Params
from panel.model.result import PanelFit
from panel.model.spec import ModelSpec
from panel.store import Store, get_run, load_panel
from panel.vintages.errors import BackfillError


@dataclass(frozen=True)
class Window:
    """Estimation window of a vintage: ``length=None`` expanding (all data up to the cut-off), else
    rolling over the last ``length`` periods up to and including the cut-off."""

    length: int | None = None

    @property
    def text(self) -> str:
        return "expanding" if self.length is None else f"rolling:{self.length}"

    @classmethod
    def parse(cls, value) -> "Window":
        """``"expanding"`` (or None) or ``"rolling:M"`` with ``M >= 2`` periods."""
        if isinstance(value, Window):
            return value
        text = "expanding" if value is None else str(value).strip().lower()
        if text == "expanding":
            return cls()
        kind, _, length = text.partition(":")
        if kind == "rolling" and length.strip().isdigit() and int(length) >= 2:
            return cls(int(length))
        raise BackfillError(f"window {value!r} is not understood; use 'expanding' or 'rolling:M' "
                            "with M >= 2 periods (e.g. rolling:120)")


def vintage_panel(panel: Panel, as_of, window="expanding") -> Panel:
    """The data a vintage at cut-off ``as_of`` is estimated on: ``panel`` up to ``as_of``, for a
    rolling window only its last ``M`` dates; assets without an observation there are dropped."""
    w = Window.parse(window)
    cut = panel.cut(as_of)
    if w.length is None or len(cut.dates) <= w.length:
        return cut
    frame = cut.values.iloc[-w.length:]
    frame = frame.loc[:, frame.notna().any(axis=0)]
    return Panel.from_frame(frame, panel.frequency, panel.returns, panel.warnings, panel.meta)


def parse_date(value, what: str) -> pd.Timestamp:
    """``value`` as a Timestamp, or :class:`BackfillError` naming ``what`` and the fix."""
    try:
        stamp = pd.Timestamp(value)
    except (TypeError, ValueError):
        stamp = pd.NaT
    if pd.isna(stamp):
        raise BackfillError(f"{what} {value!r} is not a date; give YYYY-MM-DD")
    return stamp


def vintage_inputs(store: Store, run_id: int) -> tuple[Panel, ModelSpec, Params | None]:
    """(data, spec, start) a stored vintage was estimated from, rebuilt from the store: the dataset
    cut at the run's ``as_of`` with its recorded window, the recorded spec and start values."""
    run = get_run(store, run_id)
    settings = run["settings"] if isinstance(run["settings"], dict) else json.loads(run["settings"])
    if "spec" not in settings:
        raise BackfillError(f"run {run_id} has no recorded model spec; it cannot be rebuilt")
    panel = load_panel(store, run["dataset_hash"])
    data = vintage_panel(panel, settings.get("as_of") or run["as_of"], settings.get("window"))
    start = settings.get("start")
    return data, ModelSpec.from_dict(settings["spec"]), None if start is None else Params.from_dict(start)


def rebuild_vintage(store: Store, run_id: int) -> PanelFit:
    """Re-estimate a stored vintage from its recorded inputs (:func:`vintage_inputs`)."""
    from panel.model.fit import fit

    data, spec, start = vintage_inputs(store, run_id)
    return fit(data, spec, start=start)
