"""Every fast E-step path equals the dense reference path (DESIGN §4: 1e-8), on balanced,
staircase, exit and scattered-gap panels, for diagonal, factor and full H, with and without the
volatility scale and with the informative initial prior.  Invented data, fixed seeds."""

import numpy as np
import pytest

from panel.kalman import impute, paths
from panel.kalman.chain import Basis, filter_chains, smooth_chains, spectral
from panel.kalman.dense import dense_filter, dense_smoother
from panel.kalman.stretch import final_stretch_start, stretch_smoother
from panel.model.mstep import impute_sum, seen_diagonal

T, N = 30, 5
REPORT_FIELDS = ("filtered_mean", "filtered_var", "smoothed_mean", "smoothed_var", "predicted_mean",
                 "predicted_var", "innovation", "innovation_var", "factor_filtered_mean",
                 "factor_filtered_var", "factor_smoothed_mean", "factor_smoothed_var")


def _model(rng, structure, k=1):
    lam = rng.normal(size=(N, k)) * 0.1
    Sigma = lam @ lam.T + np.diag(rng.uniform(0.01, 0.05, N))
    if structure == "diagonal":
        H = np.diag(rng.uniform(0.5, 2.0, N))
    elif structure == "factor":
        B = rng.normal(size=(N, 1))
        H = B @ B.T + np.diag(rng.uniform(0.5, 1.5, N))
    else:
        A = rng.normal(size=(N, N))
        H = A @ A.T / N + 0.3 * np.eye(N)
    return lam, Sigma, H


def _panel(rng, pattern):
    Y = rng.normal(size=(T, N)) * 0.7 + np.cumsum(rng.normal(size=(T, N)) * 0.1, axis=0)
    if pattern == "staircase":                      # entries spread over the first half
        for i in range(1, N):
            Y[: 2 * i + rng.integers(0, 3), i] = np.nan
    elif pattern == "exits":                        # late entries, two assets leave early
        Y[:3, 2] = np.nan
        Y[T - 7:, 1] = np.nan
        Y[T - 4:, 3] = np.nan
    elif pattern == "gaps":                         # scattered gaps, balanced last dates
        holes = rng.random((T - 8, N)) < 0.15
        holes[0] = False
        Y[: T - 8][holes] = np.nan
    return Y


def _close(a, b, tol=1e-8):
    assert np.array_equal(np.isnan(a), np.isnan(b))
    if a.size:
        assert np.nanmax(np.abs(a - b)) < tol


CASES = [(p, s, sc, ini) for p in ("balanced", "staircase", "exits", "gaps")
         for s in ("diagonal", "factor", "full") for sc in (False, True) for ini in (False, True)]


@pytest.mark.parametrize("pattern,structure,scaled,informative", CASES)
def test_stretch_path_equals_dense(pattern, structure, scaled, informative):
    rng = np.random.default_rng(CASES.index((pattern, structure, scaled, informative)))
    Y = _panel(rng, pattern)
    lam, Sigma, H = _model(rng, structure)
    s2 = rng.uniform(0.5, 2.0, T) if scaled else None
    init = (0.02, 0.3) if informative else None
    assert final_stretch_start(Y) < T - 3           # the fast part is really exercised
    ref = dense_smoother(Y, Sigma, H, s2, init=init)
    for method in ("stretch", "auto"):
        est = paths.estep(Y, Sigma, H, s2, init, method)
        assert est.loglik == pytest.approx(ref.loglik, rel=1e-8)
        for C, mine, theirs in ((Sigma, est.w_groups, ref.estep.w_groups),
                                (H, est.e_groups, ref.estep.e_groups)):
            a, na = impute_sum(mine, C)
            b, nb = impute_sum(theirs, C)
            assert na == nb
            _close(a, b)
        # same grouping as dense (masks and counts), so diagonal M-steps agree as well
        assert sorted((g.mask.tobytes(), g.count) for g in est.w_groups) == \
            sorted((g.mask.tobytes(), g.count) for g in ref.estep.w_groups)
    at = (0, T // 2, T - 1)
    rd = dense_smoother(Y, Sigma, H, s2, init=init, Lambda=lam, cov_at=at, want_estep=False)
    rf = paths.report(Y, Sigma, H, s2, init, Lambda=lam, cov_at=at, method="stretch")
    assert rf.loglik == pytest.approx(rd.loglik, rel=1e-8)
    for name in REPORT_FIELDS:
        _close(getattr(rf, name), getattr(rd, name))
    for t in at:
        for kind in ("filtered", "smoothed"):
            _close(rf.covariances[t][kind], rd.covariances[t][kind])


def test_balanced_two_factor_report_and_tiny_premium_variance():
    # k = 2 factor paths, and one premium innovation variance at the EM floor (d ~ 1e-14).
    rng = np.random.default_rng(7)
    Y = _panel(rng, "balanced")
    lam, Sigma, H = _model(rng, "factor", k=2)
    Sigma[0, :] = Sigma[:, 0] = 0.0
    Sigma[0, 0] = 1e-14
    rd = dense_smoother(Y, Sigma, H, Lambda=None)
    rf = stretch_smoother(Y, Sigma, H)
    assert rf.estep.loglik == pytest.approx(rd.loglik, rel=1e-8)
    _close(impute_sum(rf.estep.w_groups, Sigma)[0], impute_sum(rd.estep.w_groups, Sigma)[0])
    lam2 = rng.normal(size=(N, 2)) * 0.1
    S2 = lam2 @ lam2.T + np.diag(rng.uniform(0.01, 0.05, N))
    rd = dense_smoother(Y, S2, H, Lambda=lam2, want_estep=False)
    rf = stretch_smoother(Y, S2, H, Lambda=lam2, want_estep=False)
    for name in REPORT_FIELDS:
        _close(getattr(rf, name), getattr(rd, name))


def test_chain_kernel_matches_scalar_dense_filter():
    # Each decoupled chain is the classic local level model: smoothed, filtered and loglik agree.
    rng = np.random.default_rng(3)
    L = 40
    for s2 in (np.full(L, 1.7), rng.uniform(0.5, 2.0, L)):
        z = rng.normal(size=(L, 3))
        d = np.array([0.03, 1e-12, 0.5])
        basis = Basis(s2)
        cm = smooth_chains(basis, spectral(basis, z), d, want_g=True, want_var=True)
        mean = cm.path(basis, cm.coef)
        fc = filter_chains(z, s2, d)
        for i in range(3):
            ref = dense_smoother(z[:, [i]], d[[i]][:, None], np.eye(1), s2)
            assert cm.loglik[i] == pytest.approx(ref.loglik, rel=1e-10)
            _close(mean[:, i], ref.smoothed_mean[:, 0], 1e-10)
            assert cm.first_mean[i] == pytest.approx(ref.smoothed_mean[0, 0], rel=1e-10)
            assert cm.first_var[i] == pytest.approx(ref.smoothed_var[0, 0], rel=1e-10)
            _close(cm.var[:, i], ref.smoothed_var[:, 0], 1e-10)
            _close(fc.c[:, i] + fc.g[:, i] * fc.h[:, i] / fc.J[:, i], ref.filtered_mean[:, 0], 1e-10)
            _close(fc.p[:, i] + fc.g[:, i] ** 2 / fc.J[:, i], ref.filtered_var[:, 0], 1e-10)


def test_stretch_loglik_equals_statsmodels_exact_diffuse():
    # Source: statsmodels' general state-space module with its exact diffuse initialisation
    # (tests/ssm_reference.py), the log-likelihood convention fixed in DESIGN §2.
    from tests.ssm_reference import statsmodels_smoother

    rng = np.random.default_rng(11)
    for pattern in ("balanced", "staircase"):
        Y = _panel(rng, pattern)
        lam, Sigma, H = _model(rng, "factor")
        res = statsmodels_smoother(Y, Sigma, H)
        assert paths.estep(Y, Sigma, H, None, None, "stretch").loglik == pytest.approx(res.llf, rel=1e-8)


def test_stretch_start_and_auto_choice():
    rng = np.random.default_rng(5)
    Y = _panel(rng, "balanced")
    assert final_stretch_start(Y) == 0
    S = _panel(rng, "staircase")
    first = np.argmax(~np.isnan(S), axis=0)
    assert final_stretch_start(S) == first.max() + 1
    assert paths.choose(S, "auto") == "stretch"
    G = Y.copy()
    G[-1, 2] = np.nan                       # observed set changes at the last date
    G[-2, 1] = np.nan
    assert final_stretch_start(G) == T - 1
    # the final stretch is one date; the segment path decouples the long run before it
    assert paths.choose(G, "auto") == "segments"
    assert paths.choose(G, "auto") == min(("dense", "stretch", "segments"),
                                          key=lambda m: paths.estimated_cost(G, m))
    with pytest.raises(ValueError, match="balanced"):
        paths.choose(S, "balanced")
    with pytest.raises(ValueError, match="method must be"):
        paths.choose(Y, "fast")
    lam, Sigma, H = _model(rng, "factor")
    assert paths.estep(Y, Sigma, H, None, None, "balanced").loglik == pytest.approx(
        dense_smoother(Y, Sigma, H).loglik, rel=1e-8)


def test_singular_premium_covariance_with_dormant_assets_falls_back_exactly():
    # A premium volatility fixed at zero (k = 0) makes Sigma_OO singular; with dormant assets the
    # stretch path hands over to the dense path rather than failing.
    rng = np.random.default_rng(9)
    Y = _panel(rng, "exits")
    _, Sigma, H = _model(rng, "factor", k=1)
    Sigma = np.diag(np.diag(Sigma))
    Sigma[0, 0] = 0.0
    ref = dense_smoother(Y, Sigma, H)
    est = paths.estep(Y, Sigma, H, None, None, "stretch")
    assert est.loglik == pytest.approx(ref.loglik, rel=1e-8)
    _close(impute_sum(est.w_groups, Sigma + 1e-12 * np.eye(N))[0],
           impute_sum(ref.estep.w_groups, Sigma + 1e-12 * np.eye(N))[0])


@pytest.mark.parametrize("small", [1e-3, 1e-9])
@pytest.mark.parametrize("r", [0, 1, 2])
@pytest.mark.parametrize("pattern", ["balanced", "exits"])
def test_structured_return_covariance_reduction_equals_dense(pattern, r, small):
    # H = B B' + diag(psi) handed over as its parts: the O(n^2 r) reduction of the pencil must
    # give the dense path's E-step; one idiosyncratic variance small (1e-3: still reduced) or at
    # a floor-like 1e-9 (handed to the Cholesky route).
    from panel.kalman.stretch import simultaneous_diagonalisation

    rng = np.random.default_rng(20 + r)
    Y = _panel(rng, pattern)
    lam, Sigma, _ = _model(rng, "factor")
    B = rng.normal(size=(N, r)) * 0.8
    psi = rng.uniform(0.5, 1.5, N)
    psi[2] = small
    H = B @ B.T + np.diag(psi)
    d, V, W, logdet_v = simultaneous_diagonalisation(Sigma, H, (B, psi))
    _close(V.T @ H @ V, np.eye(N), 1e-10)
    _close(V.T @ Sigma @ V, np.diag(d), 1e-12 * d.max())
    _close(W, H @ V, 1e-10)
    assert logdet_v == pytest.approx(-0.5 * np.linalg.slogdet(H)[1], rel=1e-12)
    ref = dense_smoother(Y, Sigma, H)
    est = paths.Plan(Y, method="stretch").estep(Sigma, H, h_parts=(B, psi))
    assert est.loglik == pytest.approx(ref.loglik, rel=1e-8)
    for C, mine, theirs in ((Sigma, est.w_groups, ref.estep.w_groups),
                            (H, est.e_groups, ref.estep.e_groups)):
        a, b = impute_sum(mine, C)[0], impute_sum(theirs, C)[0]
        _close(a, b, 1e-8 * max(1.0, np.abs(b).max()))     # relative: psi = 1e-9 scales M up


# --------------------------------------------------------------- collapsed moments (bounded memory)
def _isolated_gaps(rng, rate=0.06):
    Y = _panel(rng, "balanced")
    holes = rng.random((T, N)) < rate
    holes[0] = False                                 # every asset enters at the first date
    Y[holes] = np.nan
    return Y


def _same_imputed(est, ref, Sigma, H):
    """Same imputed sums and counts under (Sigma, H) and same seen diagonals: all that the
    M-step and the score read from an E-step's groups."""
    for C, mine, theirs in ((Sigma, est.w_groups, ref.w_groups), (H, est.e_groups, ref.e_groups)):
        a, na = impute_sum(mine, C)
        b, nb = impute_sum(theirs, C)
        assert na == nb
        _close(a, b, 1e-12)
        for x, y in zip(seen_diagonal(mine, N), seen_diagonal(theirs, N)):
            _close(x, y, 1e-12)


@pytest.mark.parametrize("structure", ["diagonal", "factor", "full"])
def test_collapsed_estep_keeps_imputed_moments_and_seen_diagonal(structure, monkeypatch):
    """A Plan's E-step on a panel with more observed sets than MAX_GROUPS returns one imputed
    group per kind (O(N^2) memory), with the same imputed sums and seen diagonals (all the M-step
    and the score read) as the dense reference's uncollapsed groups."""
    rng = np.random.default_rng(41)
    Y = _isolated_gaps(rng)
    _, Sigma, H = _model(rng, structure)
    ref = dense_smoother(Y, Sigma, H).estep
    monkeypatch.setattr(impute, "MAX_GROUPS", 3)     # a small panel has few observed sets
    assert len(ref.e_groups) > impute.MAX_GROUPS      # the collapse is really exercised
    for method in ("dense", "auto"):
        est = paths.Plan(Y, method=method).estep(Sigma, H)
        assert est.loglik == pytest.approx(ref.loglik, rel=1e-12)
        assert len(est.e_groups) <= impute.MAX_GROUPS
        assert any(g.seen is not None and g.mask.all() for g in est.e_groups)     # collapsed
        _same_imputed(est, ref, Sigma, H)


@pytest.mark.parametrize("structure", ["diagonal", "factor"])
def test_fit_with_collapsed_moments_equals_fit_without(structure, monkeypatch):
    """The same fit (parameters, log-likelihood, E-steps) with and without the collapse."""
    import panel
    from panel.bench.fit import simulate

    frame, _, _ = simulate(4, 120, "balanced", seed=5)
    holes = np.random.default_rng(6).random(frame.shape) < 0.05
    holes[0] = False
    pan = panel.Panel.from_frame(frame.mask(holes))
    spec = panel.ModelSpec(premium_factors=1 if structure == "factor" else 0,
                           return_shocks=structure, return_factors=1,
                           std_errors="never", max_iter=60)
    monkeypatch.setattr(impute, "MAX_GROUPS", 3)       # collapse this small panel's groups
    got = panel.fit(pan, spec)
    monkeypatch.setattr(impute, "MAX_GROUPS", 10 ** 9)  # never collapse
    ref = panel.fit(pan, spec)
    assert got.n_iter == ref.n_iter
    assert got.loglik == pytest.approx(ref.loglik, rel=1e-10)
    for name in ("q", "psi"):
        _close(getattr(got.params, name), getattr(ref.params, name), 1e-7)


@pytest.mark.parametrize("pattern", ["staircase", "exits", "gaps"])
@pytest.mark.parametrize("scaled,informative", [(False, False), (True, True)])
def test_checkpointed_filter_recomputes_the_same_covariances(pattern, scaled, informative):
    """dense_filter(keep_every=K) gives bit for bit the covariances it no longer keeps."""
    rng = np.random.default_rng(7)
    Y = _panel(rng, pattern)
    _, Sigma, H = _model(rng, "factor")
    s2 = rng.uniform(0.5, 2.0, T) if scaled else np.ones(T)
    init = (0.02, 0.3) if informative else None
    ref = dense_filter(Y, Sigma, H, s2, init=init)
    for K in (1, 4, 7, T + 3):
        got = dense_filter(Y, Sigma, H, s2, init=init, keep_every=K)
        assert got.loglik == ref.loglik
        for t in range(T - 1, -1, -1):                # the backward pass's order
            assert np.array_equal(got.Pp[t], ref.Pp[t]) and np.array_equal(got.Pf[t], ref.Pf[t])


@pytest.mark.parametrize("structure", ["diagonal", "factor", "full"])
@pytest.mark.parametrize("pattern", ["staircase", "gaps"])
def test_bounded_dense_estep_equals_unbounded(structure, pattern, monkeypatch):
    """dense_smoother(bounded=True): same E-step as the unbounded reference; bit for bit while
    nothing is collapsed, to rounding (1e-12) once the moments are folded as they form."""
    rng = np.random.default_rng(11)
    Y = _isolated_gaps(rng, 0.15) if pattern == "gaps" else _panel(rng, pattern)
    _, Sigma, H = _model(rng, structure)
    s2 = rng.uniform(0.5, 2.0, T)
    ref = dense_smoother(Y, Sigma, H, s2).estep
    same = dense_smoother(Y, Sigma, H, s2, bounded=True).estep
    assert same.loglik == ref.loglik
    assert len(same.e_groups) == len(ref.e_groups)
    for mine, theirs in ((same.w_groups, ref.w_groups), (same.e_groups, ref.e_groups)):
        for a, b in zip(mine, theirs):
            assert np.array_equal(a.mask, b.mask) and a.count == b.count and np.array_equal(a.M, b.M)
    monkeypatch.setattr(impute, "MAX_GROUPS", 2)
    est = dense_smoother(Y, Sigma, H, s2, bounded=True).estep
    assert est.loglik == ref.loglik
    assert len(est.e_groups) <= 3 and len(ref.e_groups) > 3
    _same_imputed(est, ref, Sigma, H)


def test_filter_steps_kept_for_reuse_are_bounded(monkeypatch):
    """Dropping cached filter steps (MAX_STEPS) rebuilds them: the same filter bit for bit."""
    from panel.kalman import dense

    rng = np.random.default_rng(8)
    Y = _isolated_gaps(rng, 0.2)
    _, Sigma, H = _model(rng, "full")
    ref = dense_filter(Y, Sigma, H, np.ones(T))
    monkeypatch.setattr(dense, "MAX_STEPS", 1)
    got = dense_filter(Y, Sigma, H, np.ones(T), keep_every=4)
    assert got.loglik == ref.loglik
    assert all(np.array_equal(got.Pf[t], ref.Pf[t]) for t in range(T - 1, -1, -1))


@pytest.mark.parametrize("pattern", ["staircase", "gaps"])
def test_bounded_stretch_estep_equals_unbounded(pattern, monkeypatch):
    """stretch_smoother(bounded=True): the dense dates before the final stretch recomputed and
    folded, the same E-step as without (loglik bit for bit, moments to rounding)."""
    rng = np.random.default_rng(12)
    Y = _panel(rng, pattern)
    _, Sigma, H = _model(rng, "factor")
    init = (0.02, 0.3)
    assert 3 < final_stretch_start(Y) < T - 3
    ref = stretch_smoother(Y, Sigma, H, init=init, want_report=False).estep
    monkeypatch.setattr(impute, "MAX_GROUPS", 2)
    est = stretch_smoother(Y, Sigma, H, init=init, want_report=False, bounded=True).estep
    assert est.loglik == ref.loglik
    assert len(est.e_groups) < len(ref.e_groups)
    _same_imputed(est, ref, Sigma, H)
