-- purpose: Revision history of one asset's premium at one date: its estimate in every vintage of
--   the dataset that covers the date, oldest cut-off first.  revision = smoothed_mean minus the
--   filtered_mean of the first vintage (the real-time estimate), i.e. how far later data moved it.
--   Failed runs are ignored.  Per-period decimal units.  smoothed_q05 and smoothed_q95 are a
--   Bayesian vintage's posterior 5% and 95% quantiles (NULL for maximum likelihood).
-- param dataset: dataset hash (run_query also accepts a dataset name or hash prefix)
-- param asset: asset name
-- param date: the date whose premium is followed, YYYY-MM-DD
-- columns: as_of, run_id, kind, filtered_mean, filtered_std, smoothed_mean, smoothed_std,
--   smoothed_q05, smoothed_q95, revision
SELECT r.as_of, r.id AS run_id, r.kind, e.filtered_mean, e.filtered_std, e.smoothed_mean,
       e.smoothed_std, e.smoothed_q05, e.smoothed_q95,
       e.smoothed_mean - FIRST_VALUE(e.filtered_mean) OVER (ORDER BY r.as_of, r.id) AS revision
FROM estimates e
JOIN runs r ON r.id = e.run_id
WHERE r.dataset_hash = :dataset
  AND e.asset = :asset
  AND e.date = CAST(:date AS DATE)
  AND r.status <> 'failed'
ORDER BY r.as_of, r.id
