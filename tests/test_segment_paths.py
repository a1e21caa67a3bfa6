"""The segment E-step path (every long stretch decoupled, dense steps elsewhere) equals the dense
reference path (DESIGN §4: 1e-8 in relative log-likelihood and in the EM moments) on ragged
panels: entries, exits, isolated gaps, a block gap (dormant assets that return), cells missing at
the last date and a mix; diagonal, factor and full H; with and without the volatility scale and
the informative initial prior.  The dense path itself equals statsmodels' exact diffuse filter
(tests/test_engine_reference.py, test_fast_paths.py), so it is the oracle here.  Invented data,
fixed seeds."""

import numpy as np
import pytest

from panel.kalman import bridge, impute, paths, segments
from panel.kalman.checkpoints import checkpoint_interval
from panel.kalman.dense import dense_smoother
from panel.model.mstep import impute_sum, seen_diagonal

T, N = 40, 6
PATTERNS = ("balanced", "staircase", "exits", "gaps05", "gaps2", "block", "last", "mixed")


def _model(rng, structure):
    lam = rng.normal(size=(N, 1)) * 0.1
    Sigma = lam @ lam.T + np.diag(rng.uniform(0.01, 0.05, N))
    B = rng.normal(size=(N, 1))
    psi = rng.uniform(0.5, 1.5, N)
    if structure == "diagonal":
        H, parts = np.diag(psi), (B[:, :0], psi)
    elif structure == "factor":
        H, parts = B @ B.T + np.diag(psi), (B, psi)
    else:
        A = rng.normal(size=(N, N))
        H, parts = A @ A.T / N + 0.3 * np.eye(N), None
    return Sigma, H, parts


def _panel(rng, pattern):
    Y = rng.normal(size=(T, N)) * 0.7 + np.cumsum(rng.normal(size=(T, N)) * 0.1, axis=0)
    if pattern == "staircase":
        for i in range(1, N):
            Y[: 4 * i, i] = np.nan
    elif pattern == "exits":
        Y[:5, 2] = np.nan
        Y[22:, 1] = np.nan
        Y[31:, 4] = np.nan
    elif pattern in ("gaps05", "gaps2"):
        holes = rng.random((T, N)) < (0.005 if pattern == "gaps05" else 0.02)
        holes[0] = False
        holes[rng.integers(1, T), rng.integers(N)] = True      # at least one isolated gap
        Y[holes] = np.nan
    elif pattern == "block":                                   # dormant assets that come back
        Y[8:15, 1] = np.nan
        Y[12:24, 3] = np.nan
    elif pattern == "last":
        Y[-1, [2, 5]] = np.nan
    elif pattern == "mixed":
        Y[:6, 0] = np.nan
        Y[14:19, 2] = np.nan
        Y[25, 1] = np.nan
        Y[-4:, 4] = np.nan
        Y[-1, 3] = np.nan
    return Y


def _assert_same(est, ref, Sigma, H):
    assert est.loglik == pytest.approx(ref.loglik, rel=1e-8)
    for C, mine, theirs in ((Sigma, est.w_groups, ref.w_groups), (H, est.e_groups, ref.e_groups)):
        a, na = impute_sum(mine, C)
        b, nb = impute_sum(theirs, C)
        assert na == nb
        assert np.abs(a - b).max() < 1e-8 * max(1.0, np.abs(b).max())
    # same grouping as the dense path, so the diagonal M-steps agree too
    for mine, theirs in ((est.w_groups, ref.w_groups), (est.e_groups, ref.e_groups)):
        assert sorted((g.mask.tobytes(), g.count) for g in mine) == \
            sorted((g.mask.tobytes(), g.count) for g in theirs)


CASES = [(p, s, sc, ini) for p in PATTERNS for s in ("diagonal", "factor", "full")
         for sc in (False, True) for ini in (False, True)]


@pytest.mark.parametrize("pattern,structure,scaled,informative", CASES)
def test_segment_path_equals_dense(pattern, structure, scaled, informative):
    rng = np.random.default_rng(100 + CASES.index((pattern, structure, scaled, informative)))
    Y = _panel(rng, pattern)
    Sigma, H, parts = _model(rng, structure)
    s2 = rng.uniform(0.5, 2.0, T) if scaled else None
    init = (0.02, 0.3) if informative else None
    ref = dense_smoother(Y, Sigma, H, s2, init=init).estep
    plan = paths.Plan(Y, s2, init, method="segments")          # stretches chosen by cost
    _assert_same(plan.estep(Sigma, H, h_parts=parts), ref, Sigma, H)
    every = segments.SegmentPlan(Y, plan.s2, init, by_cost=False)   # every run of 3+ dates
    assert every.n_stretch >= 1                         # the fast part is really exercised
    _assert_same(segments.segment_estep(every, Sigma, H, h_parts=parts), ref, Sigma, H)


def test_layout_covers_dormant_returns_and_last_date():
    rng = np.random.default_rng(1)
    segs = segments.layout(_panel(rng, "block"), by_cost=False)
    dormant_back = [s for s in segs if s[0] == "stretch" and s[4].size > s[3].size and s[2] < 23]
    assert dormant_back                                 # a stretch whose dormant asset returns
    dates = [t for s in segs for t in ([s[1]] if s[0] == "dense" else range(s[1], s[2] + 1))]
    assert dates == list(range(T))                      # every date exactly once, in order
    last = segments.layout(_panel(rng, "last"))
    assert last[0][0] == "stretch" and last[0][1:3] == (0, T - 2) and last[1] == ("dense", T - 1)


@pytest.mark.parametrize("d_small", [1e-14, 0.0])
def test_end_factor_matches_scalar_local_level(d_small):
    # A chain with both ends free (flat start) is the classic local level model; its ends, its
    # log-likelihood and its EM sums from the bridge equal the dense path's, also at d -> 0.
    rng = np.random.default_rng(4)
    for L, s2 in ((3, np.full(3, 1.3)), (12, np.full(12, 0.8)), (12, rng.uniform(0.5, 2.0, 12))):
        z = rng.normal(size=(L, 3))
        d = np.array([0.04, d_small, 0.7])
        eb = bridge.EndBasis(s2)
        zeta = eb.coords(z[1:-1])
        ef = bridge.end_factor(eb, z[0], z[-1], zeta, d)
        mu0, mue, c00, c0e, cee, ll = bridge.diffuse_ends(ef, d, L)
        for i in range(3):
            ref = dense_smoother(z[:, [i]], d[[i]][:, None], np.eye(1), s2)
            assert ll[i] == pytest.approx(ref.loglik, rel=1e-10)
            assert mu0[i] == pytest.approx(ref.smoothed_mean[0, 0], rel=1e-10, abs=1e-12)
            assert cee[i] == pytest.approx(ref.smoothed_var[-1, 0], rel=1e-10)
            efi = bridge.end_factor(eb, z[0, [i]], z[-1, [i]], zeta[:, [i]], d[[i]])
            Mw, Me = bridge.stretch_moments(eb, efi, d[[i]], zeta[:, [i]], z[0, [i]], z[-1, [i]],
                                            mu0[[i]], mue[[i]], c00[[i], None], c0e[[i], None],
                                            cee[[i], None])
            assert Mw[0, 0] == pytest.approx(ref.estep.w_groups[0].M[0, 0], rel=1e-9, abs=1e-13)
            assert Me[0, 0] == pytest.approx(ref.estep.e_groups[0].M[0, 0], rel=1e-10)


def test_segment_path_singular_premium_covariance_falls_back_exactly():
    # A premium variance fixed at zero makes Sigma_OO singular; with dormant assets the segment
    # path hands over to the dense path rather than failing.
    rng = np.random.default_rng(9)
    Y = _panel(rng, "block")
    Sigma, H, _ = _model(rng, "factor")
    Sigma = np.diag(np.diag(Sigma))
    Sigma[1, 1] = 0.0
    ref = dense_smoother(Y, Sigma, H).estep
    plan = paths.Plan(Y, method="segments")
    plan.segments = segments.SegmentPlan(Y, plan.s2, by_cost=False)
    with pytest.raises(np.linalg.LinAlgError):
        segments.segment_estep(plan.segments, Sigma, H)
    assert plan.estep(Sigma, H).loglik == pytest.approx(ref.loglik, rel=1e-8)


@pytest.mark.parametrize("structure", ["diagonal", "factor", "full"])
def test_segment_moments_collapsed_as_they_form(structure, monkeypatch):
    """With more component sets than MAX_GROUPS the segment path folds its moments as they form
    (imputed under Sigma and H): same imputed sums and seen diagonals as the dense reference."""
    rng = np.random.default_rng(77)
    Y = _panel(rng, "mixed")
    Sigma, H, parts = _model(rng, structure)
    ref = dense_smoother(Y, Sigma, H).estep
    monkeypatch.setattr(impute, "MAX_GROUPS", 2)
    plan = segments.SegmentPlan(Y, np.ones(T), None, by_cost=False)
    assert plan.n_stretch >= 1 and len(ref.e_groups) > 3
    est = segments.segment_estep(plan, Sigma, H, h_parts=parts)
    assert est.loglik == pytest.approx(ref.loglik, rel=1e-10)
    assert len(est.e_groups) <= 3
    for C, mine, theirs in ((Sigma, est.w_groups, ref.w_groups), (H, est.e_groups, ref.e_groups)):
        a, na = impute_sum(mine, C)
        b, nb = impute_sum(theirs, C)
        assert na == nb
        assert np.abs(a - b).max() < 1e-10 * max(1.0, np.abs(b).max())
        for x, y in zip(seen_diagonal(mine, N), seen_diagonal(theirs, N)):
            assert np.abs(x - y).max() < 1e-10 * max(1.0, np.abs(y).max())


@pytest.mark.parametrize("pattern", ["mixed", "gaps2", "block"])
@pytest.mark.parametrize("scaled,informative", [(False, False), (True, True)])
def test_bounded_segment_estep_equals_unbounded(pattern, scaled, informative):
    """segment_estep(bounded=True) keeps the forward records only every few segments and
    recomputes them in blocks: the same E-step bit for bit (log-likelihood, groups, sums)."""
    rng = np.random.default_rng(31)
    Y = _panel(rng, pattern)
    Sigma, H, parts = _model(rng, "factor")
    s2 = rng.uniform(0.5, 2.0, T) if scaled else np.ones(T)
    init = (0.02, 0.3) if informative else None
    plan = segments.SegmentPlan(Y, s2, init, by_cost=False)
    n_seg = len(plan.segments)
    assert plan.n_stretch >= 1 and n_seg >= 3 * checkpoint_interval(n_seg)   # several blocks
    ref = segments.segment_estep(plan, Sigma, H, h_parts=parts)
    got = segments.segment_estep(plan, Sigma, H, h_parts=parts, bounded=True)
    assert got.loglik == ref.loglik
    for mine, theirs in ((got.w_groups, ref.w_groups), (got.e_groups, ref.e_groups)):
        assert len(mine) == len(theirs)
        for a, b in zip(mine, theirs):
            assert np.array_equal(a.mask, b.mask) and a.count == b.count and np.array_equal(a.M, b.M)


@pytest.mark.parametrize("method", ["stretch", "segments"])
def test_a_numerically_singular_sigma_with_dormant_assets_falls_back_to_the_dense_path(method):
    # A premium covariance whose observed block is singular to machine precision (equal loadings,
    # own variances of a few units in the last place: positive definite, condition estimate below
    # machine precision), as a finish's trial point can propose, makes the dormant assets'
    # regression meaningless: the fast paths hand the E-step to the dense one (the oracle) instead
    # of going on with a LAPACK warning.
    import warnings

    from panel.kalman.stretch import regression_on

    rng = np.random.default_rng(11)
    Y = _panel(rng, "exits")
    _, H, _ = _model(rng, "factor")
    Sigma = np.full((N, N), 0.01) + np.diag(np.full(N, 4e-18))
    with warnings.catch_warnings(), pytest.raises(np.linalg.LinAlgError, match="ill-conditioned"):
        warnings.simplefilter("ignore")         # whatever the caller's filters: it raises
        regression_on(Sigma[:3, :3], Sigma[:3, 3:])
    ref = paths.Plan(Y, method="dense").estep(Sigma, H)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        got = paths.Plan(Y, method=method).estep(Sigma, H)
    assert got.loglik == pytest.approx(ref.loglik, rel=1e-10)


@pytest.mark.parametrize("pattern", PATTERNS)
def test_score_terms_of_every_path_equal_the_moments_formula_when_it_is_well_conditioned(pattern):
    # The disturbance smoother's terms (MomentGroup.score) are C^{-1} (M - n C) C^{-1} formed without
    # inverting C: where C is well conditioned the formula from the imputed moments is exact to
    # rounding too, so the two must agree — the stretch path's chains (dormant assets, coupled
    # head), the dense dates' RTS identity and the segment path's stretches alike.
    from panel.kalman.impute import score_sum

    rng = np.random.default_rng(5)
    Y = _panel(rng, pattern)
    Sigma, H, parts = _model(rng, "factor")
    Si = np.linalg.inv(Sigma)
    terms = {}
    for method in ("dense", "stretch", "segments"):
        est = paths.Plan(Y, method=method, terms=True).estep(Sigma, H, h_parts=parts)
        total, n = impute_sum(est.w_groups, Sigma)
        formula = Si @ (total - n * Sigma) @ Si
        terms[method] = score_sum(est.w_groups, N)
        assert terms[method] is not None
        np.testing.assert_allclose(terms[method], formula, atol=1e-10 * np.abs(formula).max())
    for method in ("stretch", "segments"):
        np.testing.assert_allclose(terms[method], terms["dense"], atol=1e-12 * np.abs(terms["dense"]).max())


@pytest.mark.parametrize("pattern", PATTERNS)
def test_an_unscored_estep_has_the_same_loglik_and_moments_bit_for_bit(pattern):
    # EM steps never take the score, so their E-steps skip its terms (Plan.estep(scored=False));
    # the stretch path's final stretch keeps them, since its moments are built from them.  Same
    # numbers to the last bit, so a fit's path does not move (stored runs reproduce).
    rng = np.random.default_rng(11)
    Y = _panel(rng, pattern)
    Sigma, H, parts = _model(rng, "factor")
    for method in ("dense", "stretch", "segments"):
        plan = paths.Plan(Y, method=method, terms=True)
        full = plan.estep(Sigma, H, h_parts=parts)
        bare = plan.estep(Sigma, H, h_parts=parts, scored=False)
        assert bare.loglik == full.loglik
        for mine, theirs in ((bare.w_groups, full.w_groups), (bare.e_groups, full.e_groups)):
            assert [(g.mask.tobytes(), g.count) for g in mine] == \
                [(g.mask.tobytes(), g.count) for g in theirs]
            for a, b in zip(mine, theirs):
                assert np.array_equal(a.M, b.M)
        assert all(g.score is not None for g in full.w_groups)
        # the terms are skipped where they do not build the moments
        kept = [g.score is not None for g in bare.w_groups]
        assert not any(kept) or (method == "stretch" and pattern == "balanced")
