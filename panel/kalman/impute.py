"""Second moments of partly seen components, filled in by their conditional distribution.

The E-step sees, at each date, only some components (an asset not yet active, a missing return).
The M-step and the Fisher score both need the full moment of every component, the unseen part
filled in by its conditional distribution given the seen part under the parameters the E-step ran
at (Banbura & Modugno 2014).  That filling is linear in each group's moment, so a list of groups
(one per observed set) can be replaced by one imputed total as soon as it is formed
(:func:`collapse`): one N x N matrix per E-step result instead of one per observed set.

Cost for large N: the imputation shares one Cholesky factor across nested masks (a staircase of
entries or exits) instead of one solve per group.
"""

from __future__ import annotations

import numpy as np
from scipy import linalg
from scipy.linalg import blas, lapack

from panel.kalman.types import MomentGroup

PER_GROUP_FLOPS = 5e5   # Python overhead of one group in impute_sum's per-group route, in flops
MAX_CHAINS = 8          # masks that fit none of this many chains take the per-group route


def impute_sum(groups: list[MomentGroup], C: np.ndarray) -> tuple[np.ndarray, int]:
    """Sum of full second moments over all groups, unseen components filled in under ``C`` (N, N).

    For seen set A and unseen U: ``E[x_U | x_A] = G x_A`` with ``G = C_UA C_AA^{-1}``, so a group's
    full moment is ``[[M, M G'], [G M, G M G' + n C_{U|A}]]``.  Returns the (N, N) sum and the
    total count.

    Exact routes, all for the same sum: groups with the same mask are merged first (the moment is
    linear in ``M`` and ``n``); a diagonal ``C`` needs no regression; chains of nested masks (assets
    entering one by one, or leaving) share one Cholesky factor (:func:`_nested_sum`); other masks
    are done one by one (:func:`_add_group`).
    """
    N = C.shape[0]
    merged: dict[bytes, list] = {}
    for g in groups:
        mask = np.asarray(g.mask, bool)
        key = mask.tobytes()
        if key in merged:
            merged[key][1] += g.count
            merged[key][2] = merged[key][2] + g.M
        else:
            merged[key] = [mask, g.count, np.asarray(g.M, float)]
    n = sum(v[1] for v in merged.values())
    total = np.zeros((N, N))
    partial = []
    for mask, count, M in merged.values():
        if mask.all():
            total += M
        elif not mask.any():
            total += count * C
        else:
            partial.append((mask, count, M))
    if not partial:
        return 0.5 * (total + total.T), n
    if not np.any(C - np.diag(np.diag(C))):
        # C_UA = 0: nothing to regress, an unseen component contributes n C_ii on the diagonal
        cdiag = np.diag(C)
        for mask, count, M in partial:
            _add_square(total, np.flatnonzero(mask), M)
            total[np.diag_indices(N)] += np.where(mask, 0.0, count * cdiag)
        return 0.5 * (total + total.T), n
    rest = []
    for chain in _chains(partial):
        if len(chain) >= 2 and _nested_cheaper(chain, N):
            try:
                total += _nested_sum(chain, C)
                continue
            except np.linalg.LinAlgError:    # C not positive definite: the per-group route copes
                pass
        rest.extend(chain)
    precision = None                         # C^{-1}, computed once if a group can use it
    for mask, count, M in rest:
        few_unseen = 2 * (~mask).sum() < mask.sum()
        if few_unseen and precision is None:
            try:
                precision = linalg.cho_solve(linalg.cho_factor(C, lower=True), np.eye(N))
            except np.linalg.LinAlgError:
                precision = False
        use = precision if few_unseen and precision is not False else None
        _add_group(total, mask, count, M, C, use)
    return 0.5 * (total + total.T), n


def _chains(partial: list) -> list[list]:
    """Greedy partition of masks into chains ``A_1 ⊂ A_2 ⊂ ...`` (each returned smallest first).

    Masks are taken largest first and appended to the first chain whose smallest mask contains
    them; beyond ``MAX_CHAINS`` chains a mask becomes a chain of its own (per-group route)."""
    chains: list[list] = []
    singles = []
    for item in sorted(partial, key=lambda it: -int(it[0].sum())):
        for chain in chains:
            if not (item[0] & ~chain[-1][0]).any():
                chain.append(item)
                break
        else:
            (chains if len(chains) < MAX_CHAINS else singles).append([item])
    return [chain[::-1] for chain in chains] + singles


def _nested_cheaper(chain: list, N: int) -> bool:
    """Rough flop model (both routes are exact; this only picks the faster): the nested route
    costs ~4 N^3 plus a little per level; one group with s seen and u unseen components costs
    ~min(2 s^3 / 3, u^3) + 4 u s^2 (solve or partitioned precision, then G M and G M G') plus
    Python overhead worth ~PER_GROUP_FLOPS."""
    sizes = np.array([item[0].sum() for item in chain], float)
    unseen = N - sizes
    one_by_one = np.minimum(2 * sizes ** 3 / 3, unseen ** 3) + 4 * unseen * sizes ** 2
    return 4.0 * N ** 3 + 0.3 * PER_GROUP_FLOPS * len(chain) < (one_by_one + PER_GROUP_FLOPS).sum()


def _nested_sum(chain: list, C: np.ndarray) -> np.ndarray:
    """Full moments of groups with nested seen sets ``A_1 ⊂ ... ⊂ A_c`` from one Cholesky factor.

    Order the components by entry (``A_1``, then ``A_2 \\ A_1``, ..., then never seen) so that
    each seen set is a leading block, and let ``C = L L'`` there, ``x = L z`` with ``z ~ N(0, I)``.
    A group seeing the first ``s`` components knows ``z_{:s} = L_s^{-1} x_{:s}`` and nothing about
    ``z_{s:}``, so its full moment is ``L blockdiag(X, n I) L'`` with ``X = L_s^{-1} M L_s^{-T}``:
    the sum is ``L (K + diag(e)) L'`` with ``K`` the padded sum of the ``X`` and ``e_p`` the count
    of groups not seeing component p.  As ``L_s^{-1}`` is the leading block of ``W = L^{-1}``,
    ``K_ij = (W Q W')_ij`` with ``Q`` the padded sum of the ``M`` of the groups seeing both i and
    j; for ``max(i, j)`` in the block ``[s_{l-1}, s_l)`` that is ``Q_l = sum_{l' >= l} M_{l'}``.  So
    one pass from the largest set down, accumulating ``Q_l``, gives ``Y = Q_l W'`` on each column
    block, and ``K`` is the upper triangle of ``L^{-1} Y``: O(N^3 + sum s^2) in all, against
    O(s^3 + N^2 s) per group one by one.  ``Q_l`` is kept in the sorted order of ``A_l`` (the order
    of the M's), so that shrinking it to the next set is a copy of a few slices, not a gather.
    """
    N = C.shape[0]
    masks = [item[0] for item in chain]
    sizes = [int(m.sum()) for m in masks]
    seen_before = np.zeros(N, bool)
    blocks = []
    for m in masks:
        blocks.append(np.flatnonzero(m & ~seen_before))
        seen_before = m
    blocks.append(np.flatnonzero(~seen_before))
    perm = np.concatenate(blocks)
    L = np.linalg.cholesky(C[np.ix_(perm, perm)])
    W, info = lapack.dtrtri(L, lower=1)           # L^{-1}
    if info != 0:
        raise np.linalg.LinAlgError("singular Cholesky factor")
    Y = np.zeros((N, N))
    e = np.zeros(N)
    Q, prev = None, None
    for l in range(len(chain) - 1, -1, -1):
        mask, count, M = chain[l]
        s, lo = sizes[l], (sizes[l - 1] if l else 0)
        seen = np.flatnonzero(mask)
        Q = M.copy() if Q is None else _take_square(Q, np.searchsorted(prev, seen)) + M
        pos = np.searchsorted(seen, perm[:s])         # entry order -> sorted order of A_l
        w = np.zeros((s, s - lo))
        w[pos] = W[lo:s, :s].T                         # columns [lo, s) of W', rows sorted
        Y[:s, lo:s] = (Q @ w)[pos]
        e[s:] += count
        prev = seen
    Kc = linalg.solve_triangular(L, Y, lower=True, check_finite=False)
    K = np.triu(Kc)
    K += np.triu(Kc, 1).T
    K[np.diag_indices(N)] += e
    LK = blas.dtrmm(1.0, L, K, lower=1)
    part = blas.dtrmm(1.0, L, LK, side=1, lower=1, trans_a=1)
    out = np.empty((N, N))
    out[np.ix_(perm, perm)] = part
    return out


def _runs(idx: np.ndarray, most: int = 5):
    """Runs of consecutive values in sorted ``idx`` as (start, stop, first, last + 1), or None
    when there are more than ``most``."""
    cuts = np.flatnonzero(np.diff(idx) != 1) + 1
    if cuts.size >= most:
        return None
    ends = np.concatenate([[0], cuts, [idx.size]])
    return [(a, b, idx[a], idx[b - 1] + 1) for a, b in zip(ends[:-1], ends[1:])]


def _take_square(Q: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """``Q[idx][:, idx]`` for sorted ``idx`` (a view when ``idx`` is one run)."""
    runs = _runs(idx)
    if runs is None:
        return Q[np.ix_(idx, idx)]
    if len(runs) == 1:
        _, _, i0, i1 = runs[0]
        return Q[i0:i1, i0:i1]
    out = np.empty((idx.size, idx.size))
    for a0, a1, i0, i1 in runs:
        for b0, b1, j0, j1 in runs:
            out[a0:a1, b0:b1] = Q[i0:i1, j0:j1]
    return out


def _add_square(total: np.ndarray, idx: np.ndarray, M: np.ndarray) -> None:
    """``total[idx, idx] += M`` for sorted ``idx``, by slices when ``idx`` has few runs (a mask
    with a few gaps): fancy indexing is several times slower."""
    runs = _runs(idx)
    if runs is None:
        total[np.ix_(idx, idx)] += M
        return
    for a0, a1, i0, i1 in runs:
        for b0, b1, j0, j1 in runs:
            total[i0:i1, j0:j1] += M[a0:a1, b0:b1]


def _add_group(total, mask, count, M, C, precision) -> None:
    """Add one group's full moment (seen ``mask`` (N,), ``M`` (s, s)) to ``total`` (N, N) in place.

    Given ``precision = P = C^{-1}`` (for groups with few unseen components),
    ``G = -P_UU^{-1} P_UA`` and ``C_{U|A} = P_UU^{-1}`` (partitioned inverse) cost O(u s^2) instead
    of an s x s solve."""
    A, U = mask, ~mask
    if precision is not None:
        PUU = precision[np.ix_(U, U)]
        G = -np.linalg.solve(PUU, precision[np.ix_(U, A)])
        cond = np.linalg.inv(PUU)
    else:
        CUA = C[np.ix_(U, A)]
        G = np.linalg.solve(C[np.ix_(A, A)], CUA.T).T
        cond = C[np.ix_(U, U)] - G @ CUA.T
    GM = G @ M
    _add_square(total, np.flatnonzero(A), M)
    total[np.ix_(U, A)] += GM
    total[np.ix_(A, U)] += GM.T
    total[np.ix_(U, U)] += GM @ G.T + count * cond


def seen_diagonal(groups: list[MomentGroup], N: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-component sum of seen second moments and the number of dates each was seen."""
    sums = np.zeros(N)
    counts = np.zeros(N)
    for g in groups:
        if g.seen is not None:           # a collapsed group keeps its seen part apart
            sums += g.seen[0]
            counts += g.seen[1]
        else:
            sums[g.mask] += np.diag(g.M)
            counts[g.mask] += g.count
    return sums, counts


def score_sum(groups: list[MomentGroup], N: int) -> np.ndarray | None:
    """(N, N) sum of the groups' disturbance-smoother score terms (:class:`MomentGroup`'s
    ``score``), each in its components' rows and columns; None unless every group has them (a
    collapsed group's terms must cover all of its groups)."""
    if not groups or any(g.score is None for g in groups):
        return None
    total = np.zeros((N, N))
    for g in groups:
        if g.mask.all():
            total += g.score
        else:
            idx = np.flatnonzero(g.mask)
            total[np.ix_(idx, idx)] += g.score
    return total


def add_groups(a: MomentGroup, b: MomentGroup) -> MomentGroup:
    """The sum of two groups with the same mask, keeping the seen part of a collapsed one."""
    seen = None
    if a.seen is not None or b.seen is not None:
        N = a.mask.size
        seen = tuple(x + y for x, y in zip(seen_diagonal([a], N), seen_diagonal([b], N)))
    score = None if a.score is None or b.score is None else a.score + b.score
    return MomentGroup(a.mask, a.count + b.count, a.M + b.M, seen=seen, score=score)


MAX_GROUPS = 16         # more groups than this in an E-step result are collapsed (memory O(N^2))


def collapse(groups: list[MomentGroup], C: np.ndarray, most: int | None = None) -> list[MomentGroup]:
    """``groups`` as at most ``most`` groups with the same :func:`impute_sum` under ``C`` (N, N)
    and the same :func:`seen_diagonal`: beyond ``most`` (default :data:`MAX_GROUPS`), one full-mask group holding the imputed
    total, with the per-component seen sums and counts kept in its ``seen`` (O(N) more).

    Only valid for consumers that impute under this same ``C`` (the M-step and the score at the
    parameters of the E-step).  Left as they are when ``C`` cannot be used to impute (singular)."""
    if len(groups) <= (MAX_GROUPS if most is None else most) or not groups:
        return groups
    try:
        total, n = impute_sum(groups, C)
    except np.linalg.LinAlgError:
        return groups
    N = C.shape[0]
    return [MomentGroup(np.ones(N, bool), n, total, seen=seen_diagonal(groups, N),
                        score=score_sum(groups, N))]


class Folding:
    """Groups collapsed under ``C`` (N, N) while an E-step forms them, so that it never holds more
    than about :data:`MAX_GROUPS` of them: the caller passes its live groups to :meth:`fold` once
    there are too many, and drops them when it returns True; :attr:`done` holds the one collapsed
    group so far (empty before the first fold).  If ``C`` cannot impute (singular), folding stops
    and the caller keeps its groups (exact, unbounded)."""

    def __init__(self, C: np.ndarray):
        self.C, self.done, self.failed = np.asarray(C, dtype=float), [], False

    def fold(self, groups: list[MomentGroup]) -> bool:
        if self.failed:
            return False
        every = groups + self.done
        out = collapse(every, self.C, most=0)
        if out is every:
            self.failed = True
            return False
        self.done = out
        return True
