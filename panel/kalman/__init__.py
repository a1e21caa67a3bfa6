"""Kalman filter and smoother kernels: pure functions over arrays (no I/O, no printing, no store).

Shapes: ``Y`` (T, N) excess returns with NaN for missing; ``Sigma``, ``H`` (N, N) per-period
covariances; ``scale2`` (T,) the squared volatility scale ``s_t^2`` (ones when unused).
"""
