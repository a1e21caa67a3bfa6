"""Runs over time: everything about vintages once the estimator has done its work.

- :mod:`panel.vintages.inputs` — a stored run's inputs rebuilt from the store (data cut at its as-of
  date with its window, recorded spec and start); used by reproduce and by backfill.
- :mod:`panel.vintages.reproduce` — record a fit as a run, re-run a stored run and compare.
- :mod:`panel.vintages.backfill` — plan and run a backfill of vintages at past cut-offs (resumable).
- :mod:`panel.vintages.starts` — warm starts from a predecessor vintage (entries and exits merged).
- :mod:`panel.vintages.pools` — where vintage fits run: in process, local processes, Dask.
- :mod:`panel.vintages.evaluation` — revisions across vintages and out-of-sample statistics.

No printing and no SQL here: the store's API reads and writes, the CLI prints.
"""
