"""Benchmarks, one module per subject; each prints ratios against a peer measured in the same run.

- ``python -m panel.bench`` (:mod:`panel.bench.fit`): E-step, EM iteration and full fits against
  statsmodels' smoother and DynamicFactorMQ.
- ``python -m panel.bench.backfill``: a backfill with 1 and 2 workers (same vintages, speed-up).
- ``python -m panel.bench.store``: bulk writes of a run's tables.
"""
