"""Parameter posteriors and convergence: the reported quantities per draw, split R-hat and bulk/tail
effective sample sizes (Vehtari, Gelman, Simpson, Carpenter & Burkner 2021, as implemented by
ArviZ), and the mixed / not mixed rule.

ArviZ is imported lazily (about 1.2 s on first import, measured): only a finished run pays it.
"""

from __future__ import annotations

import logging
import warnings

import numpy as np
import pandas as pd

from panel import units

#: Common practice (Vehtari et al. 2021): chains have mixed when every monitored quantity has
#: split R-hat below 1.01 and bulk and tail effective sample sizes above 400.
RHAT_MAX = 1.01
ESS_MIN = 400.0


def quantity_draws(draws: dict, assets, k: int, r: int, structure: str):
    """Reported quantities per draw: (rows, stack) with rows ``(name, row, col, annualise)``
    (names as in :class:`panel.model.result.PanelFit`'s parameters table; ``premium_cov`` and
    ``return_cov`` only on the diagonal unless H is full) and stack (chains, draws, P)."""
    N = len(assets)
    rows, cols = [], []

    def add(name, row, col, values, kind):
        rows.append((name, row, col, kind))
        cols.append(values)

    lam, q = draws["Lambda"], draws["q"]
    for i, a in enumerate(assets):
        for j in range(k):
            add("loading", a, f"f{j + 1}", lam[:, :, i, j], "premium_loading")
    for i, a in enumerate(assets):
        add("idio_premium_var", a, "", q[:, :, i], "premium_var")
    sigma_diag = q + (lam ** 2).sum(axis=-1)
    for i, a in enumerate(assets):
        add("premium_cov", a, a, sigma_diag[:, :, i], "premium_var")
    if structure == "full":
        H = draws["H"]
        for i in range(N):
            for j in range(i, N):
                add("return_cov", assets[i], assets[j], H[:, :, i, j],
                    "return_var" if i == j else "return_cov")
    else:
        psi = draws["psi"]
        h_diag = psi + ((draws["B"] ** 2).sum(axis=-1) if structure == "factor" else 0.0)
        for i, a in enumerate(assets):
            add("return_cov", a, a, h_diag[:, :, i], "return_var")
        if structure == "factor":
            for i, a in enumerate(assets):
                for j in range(r):
                    add("return_loading", a, f"g{j + 1}", draws["B"][:, :, i, j], "return_loading")
        for i, a in enumerate(assets):
            add("return_idio_var", a, "", psi[:, :, i], "return_var")
    for i, a in enumerate(assets):
        add("premium_last", a, "", draws["premium_last"][:, :, i], "premium")
    return rows, np.stack(cols, axis=-1)


def annualise(values: np.ndarray, kind: str, ppy: int) -> np.ndarray:
    """Per-period draws in the trade's annual units (:mod:`panel.units`)."""
    if kind == "premium_var":
        return units.premium_vol(values, ppy)
    if kind == "premium_loading":
        return units.premium_loading(values, ppy)
    if kind == "return_var":
        return units.return_vol(values, ppy)
    if kind == "return_loading":
        return values * np.sqrt(ppy)
    if kind == "return_cov":
        return values * ppy
    return units.annual_premium(values, ppy)


ANNUAL_UNITS = {"premium_var": "premium vol, decimal a year (q = V^2/ppy^3)",
                "premium_loading": "premium vol, decimal a year",
                "return_var": "return vol, decimal a year (sqrt(h ppy))",
                "return_loading": "return vol, decimal a year",
                "return_cov": "return covariance a year",
                "premium": "premium, decimal a year"}


def arviz():
    """The ``arviz`` module, imported without the notice about its coming refactor that ArviZ
    0.23 prints (a ``FutureWarning``) on import: our use of it (datasets, R-hat, ESS) is stable."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=FutureWarning, module="arviz")
        import arviz as az
    return az


def convergence(stack: np.ndarray):
    """(rhat, ess_bulk, ess_tail) (P,) of a (chains, draws, P) stack by ArviZ; NaN for a quantity
    that does not move (a fixed parameter)."""
    az = arviz()
    P = stack.shape[-1]
    moving = stack.reshape(-1, P).std(axis=0) > 0
    out = [np.full(P, np.nan) for _ in range(3)]
    if moving.any():
        ds = az.convert_to_dataset({"theta": stack[:, :, moving]})
        quiet = logging.getLogger("arviz")
        level = quiet.level
        quiet.setLevel(logging.ERROR)       # one chain: ArviZ logs a shape warning per call
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                if stack.shape[0] >= 2:     # split R-hat compares chains: undefined with one
                    out[0][moving] = az.rhat(ds)["theta"].values
                out[1][moving] = az.ess(ds, method="bulk")["theta"].values
                out[2][moving] = az.ess(ds, method="tail")["theta"].values
        finally:
            quiet.setLevel(level)
    return tuple(out)


def parameter_table(draws: dict, assets, k: int, r: int, structure: str, ppy: int) -> pd.DataFrame:
    """One row per reported quantity: posterior mean, std, 5/50/95% quantiles (per period), split
    R-hat, bulk and tail ESS, and the same mean and quantiles annualised (``annual_unit`` says how)."""
    rows, stack = quantity_draws(draws, assets, k, r, structure)
    flat = stack.reshape(-1, stack.shape[-1])
    rhat, ess_bulk, ess_tail = convergence(stack)
    q05, q50, q95 = np.quantile(flat, [0.05, 0.5, 0.95], axis=0)
    table = pd.DataFrame(rows, columns=["name", "row", "col", "kind"])
    table["mean"], table["std"] = flat.mean(axis=0), flat.std(axis=0, ddof=1) if len(flat) > 1 else 0.0
    table["q05"], table["q50"], table["q95"] = q05, q50, q95
    table["rhat"], table["ess_bulk"], table["ess_tail"] = rhat, ess_bulk, ess_tail
    ann = np.column_stack([annualise(flat[:, j], kind, ppy) for j, (*_, kind) in enumerate(rows)])
    table["annual_mean"] = ann.mean(axis=0)
    table["annual_q05"], table["annual_q95"] = np.quantile(ann, [0.05, 0.95], axis=0)
    table["annual_unit"] = table["kind"].map(ANNUAL_UNITS)
    return table.drop(columns="kind")


def mixing_numbers(table: pd.DataFrame) -> tuple[float, float]:
    """(max split R-hat, min of bulk and tail ESS) over the monitored quantities of a parameter
    table (this module's or a Bayesian PanelFit's); NaN when nothing was monitored."""
    ok = table["ess_bulk"].notna()
    if not ok.any():
        return float("nan"), float("nan")
    t = table[ok]
    return float(t["rhat"].max()), float(np.minimum(t["ess_bulk"], t["ess_tail"]).min())


def mixing_status(table: pd.DataFrame) -> tuple[str, str]:
    """("mixed" | "not mixed", one-line message naming the worst quantities)."""
    ok = table["ess_bulk"].notna()
    if not ok.any():
        return "mixed", "nothing to sample: every monitored quantity is fixed"
    if table.loc[ok, "rhat"].isna().all():
        return "not mixed", "one chain: split R-hat needs two or more chains to judge mixing"
    t = table[ok]
    ess = np.minimum(t["ess_bulk"], t["ess_tail"])
    worst_r = t.loc[t["rhat"].idxmax()]
    worst_e = t.loc[ess.idxmin()]
    summary = (f"max split R-hat {worst_r['rhat']:.3f} ({worst_r['name']} {worst_r['row']}), "
               f"min ESS {ess.min():.0f} ({worst_e['name']} {worst_e['row']}); rule: R-hat < "
               f"{RHAT_MAX} and ESS > {ESS_MIN:.0f} (common practice, Vehtari et al. 2021)")
    mixed = bool(t["rhat"].max() < RHAT_MAX and ess.min() > ESS_MIN)
    return ("mixed" if mixed else "not mixed"), summary
