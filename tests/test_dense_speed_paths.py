"""The dense path's fast kernels (direct LAPACK calls, slice-or-array indexing, moment sums) and
its index bookkeeping: relabelling the assets must relabel every output, whichever of the slice
(contiguous positions) or array (scattered positions, out-of-order entries) branches runs.
Invented data, fixed seeds."""

import numpy as np
import pytest

from panel.kalman.dense import _compact, _MomentSum, _solve_right_pd, _sub, dense_smoother

FIELDS = ("filtered_mean", "filtered_var", "smoothed_mean", "smoothed_var", "predicted_mean",
          "predicted_var", "innovation", "innovation_var")


def test_compact_gives_slices_only_for_contiguous_runs():
    A = np.arange(36.0).reshape(6, 6)
    run, scattered = np.array([2, 3, 4]), np.array([0, 2, 5])
    assert _compact(run) == slice(2, 5)
    assert _compact(np.array([4])) == slice(4, 5)
    assert _compact(scattered) is scattered
    assert _compact(np.array([], dtype=int)).size == 0
    for rows in (run, scattered):
        for cols in (run, scattered):
            np.testing.assert_array_equal(_sub(A, _compact(rows), _compact(cols)),
                                          A[np.ix_(rows, cols)])


def test_solve_right_pd_definite_singular_and_empty():
    rng = np.random.default_rng(0)
    X = rng.normal(size=(5, 8))
    A = X @ X.T
    B = rng.normal(size=(3, 5))
    np.testing.assert_allclose(_solve_right_pd(B, A), np.linalg.solve(A, B.T).T, rtol=1e-10)
    S = X[:, :2] @ X[:, :2].T                              # rank 2: Cholesky fails
    np.testing.assert_allclose(_solve_right_pd(B, S), B @ np.linalg.pinv(S, hermitian=True),
                               rtol=1e-8, atol=1e-12)
    assert _solve_right_pd(np.zeros((0, 0)), np.zeros((0, 0))).shape == (0, 0)


def test_moment_sum_equals_direct_sum():
    rng = np.random.default_rng(1)
    acc = _MomentSum(np.array([True, False, True, True]))
    direct = np.zeros((3, 3))
    for _ in range(4):
        mean, C, L = rng.normal(size=3), rng.normal(size=(3, 3)), rng.normal(size=(3, 3))
        cov = C @ C.T
        direct += np.outer(mean, mean) + cov - L - L.T
        acc.add(mean, cov.copy(), L.copy())
    g = acc.group()
    assert g.count == 4
    np.testing.assert_allclose(g.M, direct, rtol=1e-12, atol=1e-12)


def _panel(rng, T=40, N=7):
    Y = rng.normal(size=(T, N)) * 0.7 + np.cumsum(rng.normal(size=(T, N)) * 0.1, axis=0)
    for i, start in enumerate((0, 3, 3, 9, 5, 14, 20)):   # late entries, two on one date
        Y[:start, i] = np.nan
    Y[0] = np.nan                                          # nobody observed on the first date
    Y[0, 0] = 0.3
    Y[T - 6:, 2] = np.nan                                  # an exit
    Y[rng.random((T, N)) < 0.1] = np.nan                   # scattered gaps
    Y[T // 2] = np.nan                                     # an all-missing date
    Y[-1] = rng.normal(size=N)
    return Y


@pytest.mark.parametrize("k,informative,scaled", [(0, False, False), (0, True, True),
                                                   (1, False, True), (2, True, False)])
def test_relabelled_assets_give_relabelled_results(k, informative, scaled):
    rng = np.random.default_rng(10 + 4 * k + 2 * informative + scaled)
    Y = _panel(rng)
    T, N = Y.shape
    lam = rng.normal(size=(N, k)) * 0.1
    Sigma = lam @ lam.T + np.diag(rng.uniform(0.01, 0.05, N))
    B = rng.normal(size=(N, 1))
    H = B @ B.T + np.diag(rng.uniform(0.5, 1.5, N))
    s2 = rng.uniform(0.5, 2.0, T) if scaled else None
    init = (0.02, 0.3) if informative else None
    perm = np.array([5, 2, 6, 0, 3, 1, 4])                 # entries out of asset order
    kw = dict(init=init, Lambda=lam if k else None, cov_at=(7, T - 1))
    ref = dense_smoother(Y, Sigma, H, s2, **kw)
    got = dense_smoother(Y[:, perm], Sigma[np.ix_(perm, perm)], H[np.ix_(perm, perm)], s2,
                         **dict(kw, Lambda=lam[perm] if k else None))
    assert got.loglik == pytest.approx(ref.loglik, rel=1e-12)
    for f in FIELDS:
        a, b = getattr(got, f), getattr(ref, f)[:, perm]
        assert np.array_equal(np.isnan(a), np.isnan(b)), f
        np.testing.assert_allclose(a, b, rtol=1e-9, atol=1e-12, err_msg=f)
    for t in (7, T - 1):
        for kind in ("filtered", "smoothed"):
            np.testing.assert_allclose(got.covariances[t][kind],
                                       ref.covariances[t][kind][np.ix_(perm, perm)],
                                       rtol=1e-9, atol=1e-12)
    for kind in ("w_groups", "e_groups"):
        theirs = {g.mask.tobytes(): g for g in getattr(ref.estep, kind)}
        mine = getattr(got.estep, kind)
        assert len(mine) == len(theirs)
        for g in mine:
            members = perm[g.mask]                         # original labels, in relabelled order
            mask = np.zeros(N, bool)
            mask[members] = True
            h = theirs[mask.tobytes()]
            assert g.count == h.count
            pos = np.searchsorted(np.flatnonzero(mask), members)
            np.testing.assert_allclose(g.M, h.M[np.ix_(pos, pos)], rtol=1e-9, atol=1e-12)
