"""The active-set finish's stopping rule (its estimate of the gain still to be had) and the
central-difference fallback of the standard errors."""

import numpy as np

from panel.model.em import _Curvature


def test_remaining_gain_is_exact_on_a_quadratic_after_conjugate_steps():
    # Source: Nocedal & Wright (2006), Numerical Optimization, 2nd ed., ch. 6 (quadratic
    # termination): on a quadratic with Hessian A, BFGS from steps that are A-conjugate recovers
    # A^{-1} exactly, so g' B^{-1} g / 2 is the exact gain of the Newton step, max f - f(x).
    rng = np.random.default_rng(3)
    n = 6
    Q, _ = np.linalg.qr(rng.normal(size=(n, n)))
    A = Q @ np.diag(np.logspace(-2, 3, n)) @ Q.T           # curvatures spanning five decades
    x_star = rng.normal(size=n)
    grad = lambda x: -A @ (x - x_star)                       # ascent gradient of f = -(x-x*)'A(x-x*)/2
    curv = _Curvature(most=10)
    x = np.zeros(n)
    curv.add(x, grad(x))
    for j in range(n):                                      # eigenvectors of A are A-conjugate
        x = x + Q[:, j] * rng.uniform(0.5, 2.0)
        curv.add(x, grad(x))
    g = grad(x)
    exact = 0.5 * g @ np.linalg.solve(A, g)
    assert abs(curv.remaining_gain(g) / exact - 1) < 1e-10


def test_remaining_gain_is_infinite_before_any_curvature_is_seen():
    curv = _Curvature(most=5)
    curv.add(np.zeros(3), np.ones(3))
    assert curv.remaining_gain(np.ones(3)) == np.inf


def test_forward_information_that_is_not_positive_definite_is_redone_centrally():
    # Analytic reference: f(x) = -x^2 / 2 has information 1 at x = 1.  A narrow bump in its score
    # just above x = 1 (inside the forward step of 1e-6, far inside the central step of 1e-4) gives
    # forward differences a negative information; the fallback's central differences see past it.
    from panel.model.inference import _inverse_information

    def score(theta):
        x = theta[0]
        bump = 50.0 if 1.0 < x < 1.0 + 2e-6 else 0.0
        return np.array([-x + bump])

    theta, scale = np.array([1.0]), np.array([1.0])
    kept = _inverse_information(theta, score, scale, 1e-6, score(theta), central_fallback=False)
    assert kept[0, 0] < 0                                    # forward: not positive definite
    cov = _inverse_information(theta, score, scale, 1e-6, score(theta))
    assert abs(cov[0, 0] - 1.0) < 1e-6                       # central: the exact information 1


def test_finish_coordinates_invert_the_parameter_map_with_and_without_the_cap_box():
    # The warm finish (panel.model.warm) resumes in an earlier finish's coordinates, so mapping a
    # packed vector into them must invert _Coords.theta, the cap's (x_t, rho) box included.
    import panel
    from panel.bench.fit import simulate
    from panel.model import mstep as ms
    from panel.model.em import _Coords
    from panel.model.fit import _quasi_newton_setup
    from panel.model.params import Params
    from panel.model.problem import Problem
    from panel.model.start import starting_values

    data = panel.Panel.from_frame(simulate(8, 120, "balanced")[0])
    for spec in (panel.ModelSpec(), panel.ModelSpec(premium_factors=1, max_premium_vol=0.05),
                 panel.ModelSpec(return_shocks="full")):
        prob = Problem(data, spec)
        p0 = starting_values(prob.Y, prob.rs)
        if prob.rs.max_sigma_diag is not None:
            lam, q = ms.cap_premium(p0.Lambda, p0.q, prob.rs.max_sigma_diag, prob.packer.free_q)
            p0 = Params(Lambda=lam, q=q, H=p0.H, B=p0.B, psi=p0.psi)
        setup = _quasi_newton_setup(prob, ms.VAR_FLOOR * np.diag(p0.H))
        theta = prob.packer.pack(p0)
        co = _Coords(theta, prob.packer, setup["bounds"], setup.get("cap"))
        assert (co.pairs is not None) == (spec.max_premium_vol is not None)
        x = np.clip(co.x0 + 0.05 * np.random.default_rng(1).normal(size=co.x0.size), co.lower, co.upper)
        np.testing.assert_allclose(co.coordinates(co.theta(x)), x, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(co.coordinates(theta), co.x0, rtol=1e-12, atol=1e-12)
