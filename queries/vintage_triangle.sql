-- purpose: Vintage triangle of one asset: for every cut-off as_of (its newest run) and every date up
--   to it, the filtered and smoothed premium, in long form (pivot as_of x date for display).
--   Failed runs are ignored.  Per-period decimal units.
-- param dataset: dataset hash (run_query also accepts a dataset name or hash prefix)
-- param asset: asset name
-- columns: as_of, date, run_id, filtered_mean, smoothed_mean
SELECT v.as_of, e.date, v.run_id, e.filtered_mean, e.smoothed_mean
FROM (
    SELECT id AS run_id, as_of,
           ROW_NUMBER() OVER (PARTITION BY as_of ORDER BY id DESC) AS newest
    FROM runs
    WHERE dataset_hash = :dataset
      AND status <> 'failed'
) v
JOIN estimates e ON e.run_id = v.run_id
WHERE v.newest = 1
  AND e.asset = :asset
ORDER BY v.as_of, e.date
