-- purpose: The runs of one dataset, by cut-off then id: what was fitted, how it ended, how long it
--   took and which run it started from.
-- param dataset: dataset hash (run_query also accepts a dataset name or hash prefix)
-- columns: run_id, kind, label, as_of, status, converged, iterations, loglik, aic, bic, n_params, duration_s, started_utc, parent_run, backfill_key
SELECT id AS run_id, kind, label, as_of, status, converged, iterations, loglik, aic, bic, n_params,
       duration_s, started_utc, parent_run, backfill_key
FROM runs
WHERE dataset_hash = :dataset
ORDER BY as_of, id
