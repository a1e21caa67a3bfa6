-- purpose: Real-time one-step forecasts of every asset from the vintages of one backfill (its runs
--   by backfill key, the newest run of each as_of; key NULL takes every run of the dataset), paired
--   with the expanding historical-mean benchmark.  forecast = the vintage's filtered premium at its
--   last estimate date origin_date (the premium is a random walk: E[mu_{T+1} | data to T] is the
--   filtered mean at T); target_date = the first date of the dataset after origin_date; realized =
--   the return there (NULL when missing or not observed yet); benchmark = the mean of the asset's
--   returns up to and including origin_date (all of them, whatever the vintage's window), n_history
--   their number.  Failed runs are ignored.  Per-period decimal units.
-- param dataset: dataset hash (run_query also accepts a dataset name or hash prefix)
-- param key: backfill key of the vintages (runs.backfill_key), or NULL for all runs of the dataset
-- columns: asset, as_of, run_id, origin_date, target_date, forecast, premium_std, benchmark, n_history, realized
WITH vintage AS (
    SELECT id AS run_id, as_of,
           ROW_NUMBER() OVER (PARTITION BY as_of ORDER BY id DESC) AS newest
    FROM runs
    WHERE dataset_hash = :dataset
      AND (CAST(:key AS VARCHAR) IS NULL OR backfill_key = CAST(:key AS VARCHAR))
      AND status <> 'failed'
),
origin AS (
    SELECT v.run_id, v.as_of, e.asset, MAX(e.date) AS origin_date
    FROM vintage v
    JOIN estimates e ON e.run_id = v.run_id
    WHERE v.newest = 1
    GROUP BY v.run_id, v.as_of, e.asset
),
target AS (
    SELECT o.run_id, o.as_of, o.asset, o.origin_date,
           (SELECT MIN(d.date) FROM dataset_dates d
             WHERE d.hash = :dataset AND d.date > o.origin_date) AS target_date
    FROM origin o
),
history AS (
    SELECT t.run_id, t.asset, AVG(x.value) AS benchmark, COUNT(x.value) AS n_history
    FROM target t
    JOIN dataset_values x ON x.hash = :dataset AND x.asset = t.asset AND x.date <= t.origin_date
    GROUP BY t.run_id, t.asset
)
SELECT t.asset, t.as_of, t.run_id, t.origin_date, t.target_date,
       e.filtered_mean AS forecast,
       e.filtered_std AS premium_std,
       h.benchmark,
       h.n_history,
       x.value AS realized
FROM target t
JOIN estimates e ON e.run_id = t.run_id AND e.asset = t.asset AND e.date = t.origin_date
JOIN history h ON h.run_id = t.run_id AND h.asset = t.asset
LEFT JOIN dataset_values x ON x.hash = :dataset AND x.asset = t.asset AND x.date = t.target_date
ORDER BY t.asset, t.as_of
