-- purpose: Latest-vintage cross-section of one dataset at one date: for each asset, the estimate at
--   that date from the newest run that has that asset and date (largest as_of, then largest run id).
--   Failed runs are ignored.  Per-period decimal units.
-- param dataset: dataset hash (run_query also accepts a dataset name or hash prefix)
-- param date: date of the cross-section, YYYY-MM-DD (a date of the panel)
-- columns: asset, run_id, as_of, filtered_mean, filtered_std, smoothed_mean, smoothed_std, predictive_mean, predictive_std
SELECT asset, run_id, as_of, filtered_mean, filtered_std, smoothed_mean, smoothed_std,
       predictive_mean, predictive_std
FROM (
    SELECT e.asset, e.run_id, r.as_of, e.filtered_mean, e.filtered_std, e.smoothed_mean,
           e.smoothed_std, e.predictive_mean, e.predictive_std,
           ROW_NUMBER() OVER (PARTITION BY e.asset ORDER BY r.as_of DESC, r.id DESC) AS newest
    FROM estimates e
    JOIN runs r ON r.id = e.run_id
    WHERE r.dataset_hash = :dataset
      AND e.date = CAST(:date AS DATE)
      AND r.status <> 'failed'
) ranked
WHERE newest = 1
ORDER BY asset
