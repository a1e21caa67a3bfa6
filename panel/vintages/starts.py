"""Warm starts of backfill vintages from a stored parameter table (see :mod:`panel.vintages.backfill`).

Every warm start, in-session and on resume alike, is built here from the predecessor's
``parameters`` table (PanelFit columns), so both give the same float64 values.  When the vintage's
asset set differs from the predecessor's, :func:`start_for_vintage` merges: incumbents keep the
predecessor's parameters, entrants get the moment-based cold start computed on the vintage's own
data, assets that left are dropped.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from panel.data import Panel
from panel.model.params import Params, canonical_loadings
from panel.model.spec import ModelSpec


def start_from_parameters(parameters: pd.DataFrame, assets) -> Params | None:
    """:class:`Params` from a run's ``parameters`` table (PanelFit columns) for the assets
    ``assets`` in that order; None when the table does not hold exactly those assets.

    Used for every warm start, in-session and on resume alike, so both give the same float64 values.
    """
    assets = tuple(assets)
    if parameters is None or len(parameters) == 0:
        return None
    rows = parameters.assign(row=parameters["row"].fillna(""), col=parameters["col"].fillna(""))
    index = pd.Index(assets)

    def pos(names):  # positions of asset names, vectorised (a 500-asset H has 125,000 rows)
        return index.get_indexer(names)

    N = len(assets)
    groups = {name: frame for name, frame in rows.groupby("name", sort=False)}
    idio = groups.get("idio_premium_var")
    if idio is None or set(idio["row"]) != set(assets) or len(idio) != N:
        return None

    def vector(frame):
        out = np.full(N, np.nan)
        out[pos(frame["row"])] = frame["value"].to_numpy(dtype=float)
        return out

    def matrix(frame, prefix):
        if frame is None:
            return None
        cols = [int(str(c)[len(prefix):]) - 1 for c in frame["col"]]
        out = np.zeros((N, max(cols) + 1))
        out[pos(frame["row"]), cols] = frame["value"].to_numpy(dtype=float)
        return out

    Lambda = matrix(groups.get("loading"), "f")
    Lambda = np.zeros((N, 0)) if Lambda is None else Lambda
    cov = groups.get("return_cov")
    if cov is None:
        return None
    H = np.zeros((N, N))
    i, j = pos(cov["row"]), pos(cov["col"])
    values = cov["value"].to_numpy(dtype=float)
    H[i, j] = values
    H[j, i] = values
    psi = groups.get("return_idio_var")
    return Params(Lambda=Lambda, q=vector(idio), H=H, B=matrix(groups.get("return_loading"), "g"),
                  psi=None if psi is None else vector(psi))


def table_assets(parameters: pd.DataFrame) -> tuple[str, ...]:
    """The assets of a parameter table, in the order of the fit that wrote it."""
    if parameters is None or len(parameters) == 0:
        return ()
    rows = parameters.loc[parameters["name"] == "idio_premium_var", "row"]
    return tuple(dict.fromkeys(str(a) for a in rows.dropna()))


def start_for_vintage(parameters: pd.DataFrame, data: Panel, spec: ModelSpec) -> Params | None:
    """Warm start of a vintage estimated on ``data`` with ``spec`` from its predecessor's
    ``parameters`` table; None (a cold start) when the two share no asset, the spec resolves to
    another k or H structure for ``data``, or the table is unusable.

    The same asset set: the predecessor's parameters as they are (:func:`start_from_parameters`).
    A different one: :func:`merge_start` of the predecessor's parameters and the cold start that
    :func:`~panel.model.fit.fit` would compute on ``data``.
    """
    same = start_from_parameters(parameters, data.assets)
    if same is not None:
        return same
    before = table_assets(parameters)
    if not set(before) & set(data.assets):
        return None
    previous = start_from_parameters(parameters, before)
    if previous is None:
        return None
    from panel.model.fit import default_start  # the estimator loads only when a start is merged

    cold, structure = default_start(data, spec)          # exactly fit's cold start
    if not _same_form(previous, cold):
        return None          # the spec resolved to another k or H structure at this asset count
    return merge_start(previous, before, cold, data.assets, structure)


def merge_start(previous: Params, before, cold: Params, assets, structure: str) -> Params:
    """Start for ``assets`` from ``previous`` (for the assets ``before``) and ``cold`` (for
    ``assets``): incumbents' rows of Lambda, q, B, psi and their block of a full H from
    ``previous``, entrants' from ``cold``; assets of ``before`` not in ``assets`` are dropped.

    Cross terms between incumbents and entrants follow from the loadings (the cold loadings are
    first rotated onto the predecessor's factors over the incumbents, so the two sets of rows
    load on the same factors); a full H gets a block-diagonal start, positive definite as both
    blocks are.  Loadings are returned in the identified form :class:`~panel.model.params.Packer`
    packs.
    """
    assets = tuple(assets)
    at = {a: i for i, a in enumerate(before)}
    inc = np.array([a in at for a in assets])
    src = np.array([at[a] for a in assets if a in at], dtype=int)

    def rows(old, new):
        out = np.array(new, dtype=float)
        out[inc] = old[src]
        return out

    def loadings(old, new):
        if new.shape[1] == 0:
            return new
        # Orthogonal Procrustes: the rotation R taking the cold incumbents' rows closest to the
        # predecessor's; the cold factors are only defined up to rotation, the predecessor's are not.
        u, _, vt = np.linalg.svd(new[inc].T @ old[src])
        out = rows(old, new @ (u @ vt))
        return out if _identified(out) else canonical_loadings(out)

    Lambda = loadings(previous.Lambda, cold.Lambda)
    q = rows(previous.q, cold.q)
    if structure == "full":
        H = np.array(cold.H, dtype=float)
        H[inc, :] = 0.0
        H[:, inc] = 0.0
        H[np.ix_(inc, inc)] = previous.H[np.ix_(src, src)]
        return Params.build(Lambda, q, "full", H=H)
    B = loadings(previous.B, cold.B) if structure == "factor" else None
    return Params.build(Lambda, q, structure, B=B, psi=rows(previous.psi, cold.psi))


def _same_form(a: Params, b: Params) -> bool:
    """Whether ``a`` and ``b`` have the same premium factors and return-shock structure."""
    def width(m):
        return None if m is None else m.shape[1]
    return (a.Lambda.shape[1] == b.Lambda.shape[1] and width(a.B) == width(b.B)
            and (a.psi is None) == (b.psi is None))


def _identified(L: np.ndarray) -> bool:
    """Whether ``L`` already has the form :func:`canonical_loadings` gives (then it is kept bit for
    bit rather than re-rotated through a QR decomposition)."""
    m = L.shape[1]
    if m == 1:
        return L.sum() >= 0
    top = L[:m]
    return bool(np.all(np.triu(top, 1) == 0) and np.all(np.diag(top) > 0))
