-- purpose: How one asset's premium estimate for one date moved across the vintages of one backfill
--   (its runs by backfill key, the newest run of each as_of; key NULL takes every run of the
--   dataset), oldest cut-off first.  first_release = the filtered mean in the first vintage that
--   covers the date (the real-time estimate); revision = smoothed_mean - first_release (how far
--   later data moved it); change = smoothed_mean minus the previous vintage's smoothed_mean.
--   Failed runs are ignored.  Per-period decimal units.
-- param dataset: dataset hash (run_query also accepts a dataset name or hash prefix)
-- param key: backfill key of the vintages (runs.backfill_key), or NULL for all runs of the dataset
-- param asset: asset name
-- param date: the date whose premium is followed, YYYY-MM-DD
-- columns: as_of, run_id, filtered_mean, filtered_std, smoothed_mean, smoothed_std, first_release, revision, change
WITH vintage AS (
    SELECT id AS run_id, as_of,
           ROW_NUMBER() OVER (PARTITION BY as_of ORDER BY id DESC) AS newest
    FROM runs
    WHERE dataset_hash = :dataset
      AND (CAST(:key AS VARCHAR) IS NULL OR backfill_key = CAST(:key AS VARCHAR))
      AND status <> 'failed'
)
SELECT v.as_of, v.run_id, e.filtered_mean, e.filtered_std, e.smoothed_mean, e.smoothed_std,
       FIRST_VALUE(e.filtered_mean) OVER (ORDER BY v.as_of) AS first_release,
       e.smoothed_mean - FIRST_VALUE(e.filtered_mean) OVER (ORDER BY v.as_of) AS revision,
       e.smoothed_mean - LAG(e.smoothed_mean) OVER (ORDER BY v.as_of) AS change
FROM vintage v
JOIN estimates e ON e.run_id = v.run_id
WHERE v.newest = 1
  AND e.asset = :asset
  AND e.date = CAST(:date AS DATE)
ORDER BY v.as_of
