"""Model parameters in per-period data units, and their free-parameter vector for acceleration.

``Sigma = Lambda Lambda' + diag(q)`` (premium innovations), ``H`` (return shocks) with
``H = diag(psi)`` (diagonal), ``B B' + diag(psi)`` (factor) or a full matrix.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from panel.model.spec import ResolvedSpec


@dataclass(frozen=True, eq=False)
class Params:
    """Parameters of the premium panel (arrays are read-only copies).

    Lambda : (N, k) premium loadings; q : (N,) idiosyncratic premium innovation variances;
    H : (N, N) return-shock covariance; B : (N, r) return loadings or None; psi : (N,) idiosyncratic
    return-shock variances (the diagonal of H when diagonal; None when full).
    """

    Lambda: np.ndarray
    q: np.ndarray
    H: np.ndarray
    B: np.ndarray | None = None
    psi: np.ndarray | None = None

    def __post_init__(self):
        for name in ("Lambda", "q", "H", "B", "psi"):
            value = getattr(self, name)
            if value is not None:
                arr = np.array(value, dtype=float)
                arr.setflags(write=False)
                object.__setattr__(self, name, arr)

    @cached_property
    def Sigma(self) -> np.ndarray:
        """(N, N) premium innovation covariance ``Lambda Lambda' + diag(q)`` (read-only; built once:
        an EM iteration reads it several times)."""
        S = self.Lambda @ self.Lambda.T + np.diag(self.q)
        S.setflags(write=False)
        return S

    @property
    def n_assets(self) -> int:
        return self.q.shape[0]

    @classmethod
    def build(cls, Lambda, q, structure: str, B=None, psi=None, H=None) -> "Params":
        """Assemble ``H`` from its structure."""
        if structure == "diagonal":
            H = np.diag(psi)
        elif structure == "factor":
            H = B @ B.T + np.diag(psi)
        return cls(Lambda=Lambda, q=q, H=0.5 * (H + H.T), B=B, psi=psi if structure != "full" else None)

    def to_dict(self) -> dict:
        """JSON-able arrays (lists), for the store and warm starts."""
        return {k: (None if getattr(self, k) is None else getattr(self, k).tolist())
                for k in ("Lambda", "q", "H", "B", "psi")}

    @classmethod
    def from_dict(cls, data: dict) -> "Params":
        N = len(data["q"])
        lam = np.asarray(data["Lambda"], dtype=float).reshape(N, -1)
        B = None if data.get("B") is None else np.asarray(data["B"], dtype=float).reshape(N, -1)
        return cls(Lambda=lam, q=data["q"], H=data["H"], B=B, psi=data.get("psi"))


def canonical_loadings(L: np.ndarray) -> np.ndarray:
    """Rotate loadings ``L`` (N, m) to the identified form (``L L'`` unchanged).

    m = 1: sign such that the loadings sum to a positive number.  m > 1: lower-triangular top
    block with positive diagonal (from the QR decomposition of ``L'``).
    """
    if L.shape[1] == 0:
        return L
    if L.shape[1] == 1:
        return L if L.sum() >= 0 else -L
    Qm, R = np.linalg.qr(L.T)  # L' = Q R  ->  L = R' Q'; R' is lower-trapezoidal
    Lt = R.T
    signs = np.sign(np.diag(Lt))
    signs[signs == 0] = 1.0
    return Lt * signs


class Packer:
    """Map free parameters to a flat vector (log variances, raw loadings, log-Cholesky full H).

    Used by SQUAREM extrapolation and by the numerical observed information.  Fixed variances
    (from the spec) stay out of the vector.
    """

    def __init__(self, rs: ResolvedSpec, n_assets: int):
        self.rs = rs
        self.N = n_assets
        self.free_q = np.ones(n_assets, bool) if rs.fixed_q is None else np.isnan(rs.fixed_q)
        self.free_psi = np.ones(n_assets, bool) if rs.fixed_psi is None else np.isnan(rs.fixed_psi)
        self.tril = np.tril_indices(n_assets)
        # Loadings are packed in their identified (lower-trapezoidal) form: no rotation directions.
        self.lam_free = np.tril(np.ones((n_assets, rs.k), bool))
        self.b_free = np.tril(np.ones((n_assets, rs.r), bool))

    def log_power(self) -> np.ndarray:
        """Per packed entry: 0 for a raw value, a > 0 where the entry is ``a log s`` of a positive
        standard-deviation-like ``s`` (2 for a log variance, 1 for a log Cholesky diagonal)."""
        parts = [np.zeros(int(self.lam_free.sum())), np.full(int(self.free_q.sum()), 2.0)]
        if self.rs.structure == "full":
            rows, cols = self.tril
            parts.append(np.where(rows == cols, 1.0, 0.0))
        else:
            if self.rs.structure == "factor":
                parts.append(np.zeros(int(self.b_free.sum())))
            parts.append(np.full(int(self.free_psi.sum()), 2.0))
        return np.concatenate(parts)

    def step_scale(self, p: Params) -> np.ndarray:
        """Per packed entry, the size of a unit change: 1 for log entries (already relative), the
        row's standard deviation for raw loadings and Cholesky entries (``sqrt(Sigma_ii)`` for premium
        loadings, ``sqrt(H_ii)`` for return ones), so differencing steps scale with each parameter."""
        sd_sigma, sd_h = np.sqrt(np.diag(p.Sigma)), np.sqrt(np.diag(p.H))
        rows_lam = np.nonzero(self.lam_free)[0]
        parts = [sd_sigma[rows_lam], np.ones(int(self.free_q.sum()))]
        if self.rs.structure == "full":
            rows, cols = self.tril
            parts.append(np.where(rows == cols, 1.0, sd_h[rows]))
        else:
            if self.rs.structure == "factor":
                parts.append(sd_h[np.nonzero(self.b_free)[0]])
            parts.append(np.ones(int(self.free_psi.sum())))
        return np.concatenate(parts)

    def packed_variances(self, q_mask: np.ndarray, psi_mask: np.ndarray) -> np.ndarray:
        """Packed-entry mask of the free own premium variances in ``q_mask`` and the free own
        return variances in ``psi_mask`` (both (N,) over assets)."""
        parts = [np.zeros(int(self.lam_free.sum()), bool), q_mask[self.free_q]]
        if self.rs.structure == "full":
            parts.append(np.zeros(len(self.tril[0]), bool))
        else:
            if self.rs.structure == "factor":
                parts.append(np.zeros(int(self.b_free.sum()), bool))
            parts.append(psi_mask[self.free_psi])
        return np.concatenate(parts)

    def log_variance_mask(self) -> np.ndarray:
        """Which packed entries are log variances (for full H: log Cholesky diagonals)."""
        return self.log_power() > 0

    def pack(self, p: Params) -> np.ndarray:
        parts = [p.Lambda[self.lam_free], np.log(p.q[self.free_q])]
        if self.rs.structure == "full":
            C = np.linalg.cholesky(p.H)
            C[np.diag_indices(self.N)] = np.log(np.diag(C))
            parts.append(C[self.tril])
        else:
            if self.rs.structure == "factor":
                parts.append(p.B[self.b_free])
            parts.append(np.log(p.psi[self.free_psi]))
        return np.concatenate(parts)

    def unpack(self, theta: np.ndarray, like: Params) -> Params:
        N, r = self.N, self.rs.r
        lam = np.zeros(self.lam_free.shape)
        pos = int(self.lam_free.sum())
        lam[self.lam_free] = theta[:pos]
        q = like.q.copy()
        nq = int(self.free_q.sum())
        q[self.free_q] = np.exp(theta[pos:pos + nq])
        pos += nq
        if self.rs.structure == "full":
            C = np.zeros((N, N))
            C[self.tril] = theta[pos:]
            C[np.diag_indices(N)] = np.exp(np.diag(C))
            return Params.build(lam, q, "full", H=C @ C.T)
        B = None
        if self.rs.structure == "factor":
            B = np.zeros((N, r))
            nb = int(self.b_free.sum())
            B[self.b_free] = theta[pos:pos + nb]
            pos += nb
        psi = like.psi.copy()
        psi[self.free_psi] = np.exp(theta[pos:])
        return Params.build(lam, q, self.rs.structure, B=B, psi=psi)


def count_free(rs: ResolvedSpec, n_assets: int) -> int:
    """Number of free parameters (loadings net of rotations, free variances, H)."""
    N, k, r = n_assets, rs.k, rs.r
    n = N * k - k * (k - 1) // 2
    n += N if rs.fixed_q is None else int(np.isnan(rs.fixed_q).sum())
    if rs.structure == "full":
        n += N * (N + 1) // 2
    else:
        if rs.structure == "factor":
            n += N * r - r * (r - 1) // 2
        n += N if rs.fixed_psi is None else int(np.isnan(rs.fixed_psi).sum())
    return n
