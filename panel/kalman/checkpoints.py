"""Bounded memory for the dense filter's per-date covariances: keep the filter state every K dates
and recompute a block of K dates when a backward pass reads it.

Used by every dense pass whose per-date covariances would exceed
:data:`panel.kalman.paths.KEEP_ALL_BYTES` (the E-step and the final report alike): memory
O((T / K + 4 K) (k + N)^2) instead of O(2 T (k + N)^2), about one more forward pass of CPU, the
same numbers bit for bit (the recomputation repeats the same operations on the same inputs).
"""

from __future__ import annotations

import numpy as np


def checkpoint_interval(T: int) -> int:
    """Dates per block for :func:`panel.kalman.dense.dense_filter`'s ``keep_every``: about
    sqrt(T / 4), which minimises the T / K checkpoints plus the 4 K matrices of the two blocks
    held."""
    return max(1, round(np.sqrt(T / 4.0)))


class Recomputed:
    """Filtered and predicted covariances of dates ``0..stop-1``, kept as the filter state before
    every K-th date and recomputed a block of K dates at a time by ``redo(t0, t1, m, P, prev)``
    (the same operations on the same inputs: the same numbers).  Holds the last two blocks read,
    so a backward pass (which reads ``Pf[t-1]`` and ``Pp[t]`` across a block edge) reruns each
    block once: about one more forward pass in all."""

    def __init__(self, K, stop, redo):
        self.K, self.stop, self._redo = K, stop, redo
        self.starts = []                 # (m, P, alive) before dates 0, K, 2K, ...
        self._blocks = {}

    def read(self, t, which):
        t = t + self.stop if t < 0 else t
        if not 0 <= t < self.stop:
            raise IndexError(t)
        b = t // self.K
        block = self._blocks.get(b)
        if block is None:
            if len(self._blocks) >= 2:
                del self._blocks[max(self._blocks, key=lambda c: abs(c - b))]
            t0 = b * self.K
            block = self._blocks[b] = self._redo(t0, min(self.stop, t0 + self.K), *self.starts[b])
        return block[which][t - b * self.K]


class BlockView:
    """``view[t]``: one kind (0 filtered, 1 predicted) of a :class:`Recomputed`'s covariances."""

    def __init__(self, owner, which):
        self._owner, self._which = owner, which

    def __getitem__(self, t):
        return self._owner.read(t, self._which)

    def __len__(self):
        return self._owner.stop
