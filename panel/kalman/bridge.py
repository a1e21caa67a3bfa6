"""Decoupled chains of a stretch seen through their two end values (DESIGN §4, information form).

Chain i over a stretch of L >= 3 dates (local dates 0..L-1, interior I = 1..L-2, m = L - 2)::

    z_t = alpha_t + e_t,  e_t ~ N(0, s_t^2);   alpha_t = alpha_{t-1} + u_t,  u_t ~ N(0, d)

Given both ends ``nu = (alpha_0, alpha_{L-1})`` the interior is a Brownian-bridge-like Gaussian
whose precision is ``K_D / d + S_I^{-1}`` (``K_D`` the Dirichlet path Laplacian of the interior).
With ``M_D = S_I^{1/2} K_D S_I^{1/2} = U diag(lam) U'`` (parameter-free; DST-I with a constant
scale) every quantity is a sum over the basis with the weights ``1 / (lam_j + d)``; ``lam_j > 0``
always, so nothing cancels as ``d -> 0`` (a variance at the EM floor).

* ``p(z | nu)`` is a Gaussian factor ``exp(const - nu' Om nu / 2 + h' nu)`` with a positive
  definite 2x2 ``Om`` per chain (:func:`end_factor`); the random-walk link of the ends,
  ``alpha_{L-1} - alpha_0 ~ N(0, (L-1) d)``, is *not* part of it (the caller's prior carries it).
* Interior moments given the ends are linear in them: coordinates
  ``X = (d zeta + a alpha_0 + b alpha_{L-1}) / (lam + d)`` plus independent noise of variance
  ``d / (lam + d)``, where ``zeta = U' S_I^{-1/2} z_I``, ``a = s_1 U[0]``, ``b = s_{m} U[m-1]``.
  The EM sums over the stretch are quadratic forms in ``(alpha_0, X, alpha_{L-1})``
  (:func:`stretch_moments`), so they need the ends' joint posterior only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import fft, linalg

from panel.kalman.chain import memoised
from panel.kalman.dense import LOG2PI

_CACHE: dict = {}
_CACHE_SIZE = 64


class EndBasis:
    """Interior eigenbasis of a stretch with squared scales ``s2`` (L,), L >= 3."""

    def __init__(self, s2: np.ndarray):
        s2 = np.asarray(s2, dtype=float)
        self.L = L = s2.size
        if L < 3:
            raise ValueError("a stretch seen through its ends needs at least 3 dates")
        self.m = m = L - 2
        self.s0, self.se = float(np.sqrt(s2[0])), float(np.sqrt(s2[-1]))
        sI = self.sI = np.sqrt(s2[1:-1])
        self.dst = bool(np.all(s2[1:-1] == s2[1])) and m > 1
        if self.dst:
            j = np.arange(1, m + 1)
            self.lam = 4.0 * s2[1] * np.sin(np.pi * j / (2.0 * (m + 1))) ** 2
            self._U = None
        elif m == 1:
            self.lam, self._U = np.array([2.0 * s2[1]]), np.ones((1, 1))
        else:
            self.lam, self._U = linalg.eigh_tridiagonal(2.0 * s2[1:-1], -sI[:-1] * sI[1:],
                                                        lapack_driver="stemr")
        ends = self.ut(np.eye(m)[:, [0, m - 1]])
        self.a = sI[0] * ends[:, 0]
        self.b = sI[-1] * ends[:, 1]
        self.a_over = self.a / self.lam
        self.b_over = self.b / self.lam

    def ut(self, x: np.ndarray) -> np.ndarray:
        """``U' x`` for x (m, n)."""
        if self.dst:
            return fft.dst(x, type=1, norm="ortho", axis=0)
        return self._U.T @ x

    def coords(self, z_interior: np.ndarray) -> np.ndarray:
        """``zeta = U' S_I^{-1/2} z_I`` (m, n): linear, so a fixed panel is transformed once."""
        return self.ut(z_interior / self.sI[:, None])


def end_basis_for(s2: np.ndarray) -> EndBasis:
    """:class:`EndBasis` memoised on ``s2`` (stretches of equal length and scale share one)."""
    return memoised(_CACHE, _CACHE_SIZE, EndBasis, s2)


@dataclass
class EndFactor:
    """``log p(z | nu) = const - nu' Om nu / 2 + h' nu`` per chain; arrays (n,) and ``inv`` (m, n)
    the weights ``1 / (lam + d)``."""

    o00: np.ndarray
    o0e: np.ndarray
    oee: np.ndarray
    h0: np.ndarray
    he: np.ndarray
    const: np.ndarray
    inv: np.ndarray

    @property
    def det(self) -> np.ndarray:
        return self.o00 * self.oee - self.o0e ** 2


def end_factor(eb: EndBasis, z0, ze, zeta, d) -> EndFactor:
    """The stretch data's factor on the chains' ends; ``z0, ze`` (n,) the end data, ``zeta``
    (m, n) the interior coordinates, ``d`` (n,) >= 0 the innovation variances."""
    lam = eb.lam
    den = lam[:, None] + d[None, :]
    inv = 1.0 / den
    s0s, ses = eb.s0 ** 2, eb.se ** 2
    o00 = 1.0 / s0s + (eb.a * eb.a_over) @ inv
    o0e = (eb.a * eb.b_over) @ inv
    oee = 1.0 / ses + (eb.b * eb.b_over) @ inv
    zi = zeta * inv
    h0 = z0 / s0s + eb.a @ zi
    he = ze / ses + eb.b @ zi
    const = (-0.5 * eb.m * LOG2PI + 0.5 * np.log(eb.L - 1.0) - 0.5 * np.log(den).sum(axis=0)
             - 0.5 * (lam @ (zeta * zi)) - 0.5 * (z0 ** 2 / s0s + ze ** 2 / ses)
             - LOG2PI - np.log(eb.s0 * eb.se))
    return EndFactor(o00, o0e, oee, h0, he, const, inv)


def diffuse_ends(ef: EndFactor, d, L: int):
    """Ends' posterior of chains with a flat start: ``(mu0, mue, c00, c0e, cee, loglik)``, each
    (n,), with the random-walk link included; the log-likelihood follows the exact diffuse
    convention (the flat level costs ``-0.5 log 2 pi``).  Written in ``(L - 1) d`` so that a
    chain with ``d -> 0`` stays exact."""
    kinv = (L - 1.0) * d
    q = ef.det * kinv + ef.o00 + ef.oee + 2.0 * ef.o0e
    c00 = (ef.oee * kinv + 1.0) / q
    c0e = (1.0 - ef.o0e * kinv) / q
    cee = (ef.o00 * kinv + 1.0) / q
    mu0 = c00 * ef.h0 + c0e * ef.he
    mue = c0e * ef.h0 + cee * ef.he
    loglik = ef.const - 0.5 * np.log(q) + 0.5 * (ef.h0 * mu0 + ef.he * mue)
    return mu0, mue, c00, c0e, cee, loglik


def pseudo_observation(ef: EndFactor):
    """The factor as an observation of ``nu``: ``(nu_hat0, nu_hate, n00, n0e, nee, const)`` with
    noise covariance ``Om^-1`` per chain and ``const`` such that ``log p(z | nu) = const +
    log N(nu_hat; nu, Om^-1)`` summed over chains (its ``log 2 pi`` terms left to the caller's
    Gaussian: ``const`` here omits ``+ log 2 pi`` per chain)."""
    det = ef.det
    n00, n0e, nee = ef.oee / det, -ef.o0e / det, ef.o00 / det
    v0 = n00 * ef.h0 + n0e * ef.he
    ve = n0e * ef.h0 + nee * ef.he
    const = ef.const + 0.5 * (ef.h0 * v0 + ef.he * ve) - 0.5 * np.log(det)
    return v0, ve, n00, n0e, nee, const


def stretch_moments(eb: EndBasis, ef: EndFactor, d, zeta, z0, ze, mu0, mue, P00, P0e, Pee):
    """EM sums of the chains over the stretch, in chain coordinates, given the ends' posterior
    (means ``mu0, mue`` (n,), covariances ``P00 = Cov(alpha_0)``, ``P0e = Cov(alpha_0,
    alpha_{L-1})``, ``Pee`` (n, n)).

    Returns ``(Mw, Me)``: ``Mw = sum_{t=1}^{L-1} E[du_t du_t']`` of the differences and ``Me =
    sum_t E[(z_t - alpha_t)(z_t - alpha_t)'] / s_t^2``, both (n, n).
    """
    lam, a, b, inv = eb.lam, eb.a, eb.b, ef.inv
    Ac = a[:, None] * inv                              # coefficient of alpha_0 in X
    Bc = b[:, None] * inv                              # coefficient of alpha_{L-1}
    Xb = d * zeta * inv + Ac * mu0 + Bc * mue          # mean coordinates
    lA, lB, lX = lam[:, None] * Ac, lam[:, None] * Bc, lam[:, None] * Xb
    aA, aB, aX = a @ Ac, a @ Bc, a @ Xb
    bA, bB, bX = b @ Ac, b @ Bc, b @ Xb
    # w: quadratic form with G = [[1, -a', 0], [-a, diag(lam), -b], [0, -b', 1]] in (alpha_0, X,
    # alpha_e); the path coefficients are YA = (1, Ac, 0), YB = (0, Bc, 1), Ybar = (mu0, Xb, mue).
    gAA = Ac.T @ lA - aA[:, None] - aA[None, :] + 1.0
    gAB = Ac.T @ lB - aB[None, :] - bA[:, None]
    gBB = Bc.T @ lB - bB[:, None] - bB[None, :] + 1.0
    Gm = Xb.T @ lX
    gX0 = aX[:, None] * mu0[None, :]
    gXe = bX[:, None] * mue[None, :]
    Gm += np.outer(mu0, mu0) + np.outer(mue, mue) - gX0 - gX0.T - gXe - gXe.T
    Mw = Gm + gAA * P00 + gAB * P0e + gAB.T * P0e.T + gBB * Pee
    Mw[np.diag_indices_from(Mw)] += d * (lam @ inv)
    # e: (z0 - alpha_0)/s0, zeta - X, (ze - alpha_e)/se
    R = zeta - Xb
    s0s, ses = eb.s0 ** 2, eb.se ** 2
    r0, re = z0 - mu0, ze - mue
    Me = R.T @ R + np.outer(r0, r0) / s0s + np.outer(re, re) / ses
    Me += ((Ac.T @ Ac) + 1.0 / s0s) * P00 + (Ac.T @ Bc) * P0e + (Bc.T @ Ac) * P0e.T
    Me += ((Bc.T @ Bc) + 1.0 / ses) * Pee
    Me[np.diag_indices_from(Me)] += d * inv.sum(axis=0)
    return Mw, Me
