-- purpose: Real-time one-step-ahead forecasts of one asset's excess return, one per vintage (the
--   newest run of each as_of): the forecast is the filtered premium at the vintage's last estimate
--   date (origin_date), because the premium follows a random walk, E[mu_{T+1} | data to T] equals
--   the filtered mean at T.  The estimator only produces estimates up to its cut-off, so the next
--   date comes from the dataset: target_date is the first date of the dataset after origin_date and
--   realized the return there (NULL when there is none yet, or it is missing).  Runs record their
--   full dataset's hash and their cut-off as_of.  premium_std is the premium's filtered std (it
--   leaves out the return shock).  Failed runs are ignored.  Per-period decimal units.
-- param dataset: dataset hash (run_query also accepts a dataset name or hash prefix)
-- param asset: asset name
-- columns: as_of, run_id, origin_date, target_date, forecast, premium_std, realized, error
WITH vintage AS (
    SELECT id AS run_id, as_of,
           ROW_NUMBER() OVER (PARTITION BY as_of ORDER BY id DESC) AS newest
    FROM runs
    WHERE dataset_hash = :dataset
      AND status <> 'failed'
),
origin AS (
    SELECT v.run_id, v.as_of, MAX(e.date) AS origin_date
    FROM vintage v
    JOIN estimates e ON e.run_id = v.run_id
    WHERE v.newest = 1
      AND e.asset = :asset
    GROUP BY v.run_id, v.as_of
),
target AS (
    SELECT o.run_id, o.as_of, o.origin_date,
           (SELECT MIN(d.date) FROM dataset_dates d
             WHERE d.hash = :dataset AND d.date > o.origin_date) AS target_date
    FROM origin o
)
SELECT t.as_of, t.run_id, t.origin_date, t.target_date,
       e.filtered_mean AS forecast,
       e.filtered_std AS premium_std,
       x.value AS realized,
       x.value - e.filtered_mean AS error
FROM target t
JOIN estimates e ON e.run_id = t.run_id AND e.asset = :asset AND e.date = t.origin_date
LEFT JOIN dataset_values x ON x.hash = :dataset AND x.asset = :asset AND x.date = t.target_date
ORDER BY t.as_of, t.run_id
