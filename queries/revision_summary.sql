-- purpose: Mean absolute revision of the premium per asset across the vintages of one backfill (its
--   runs by backfill key, the newest run of each as_of; key NULL takes every run of the dataset).
--   For each asset and date covered by at least two vintages: revision = the newest vintage's
--   smoothed mean minus the first covering vintage's filtered mean (first release); then per asset
--   the number of such dates, their range, and the mean absolute, mean and largest absolute
--   revision.  Each asset's first :skip dates (a burn-in: the first estimates after an asset enters
--   rest on few returns and move most) are left out, and so are the dates after an asset's last
--   return in the dataset (it has left, or its latest returns are not yet published): its premium
--   there is the model's prediction from that return, the same at every later date, so it would
--   only repeat one revision.  Failed runs are ignored.  Per-period decimal units.
-- param dataset: dataset hash (run_query also accepts a dataset name or hash prefix)
-- param key: backfill key of the vintages (runs.backfill_key), or NULL for all runs of the dataset
-- param skip: dates left out at the start of each asset's estimates (0 or NULL: none)
-- columns: asset, n_dates, first_date, last_date, mean_abs_revision, mean_revision, max_abs_revision
WITH vintage AS (
    SELECT id AS run_id, as_of,
           ROW_NUMBER() OVER (PARTITION BY as_of ORDER BY id DESC) AS newest
    FROM runs
    WHERE dataset_hash = :dataset
      AND (CAST(:key AS VARCHAR) IS NULL OR backfill_key = CAST(:key AS VARCHAR))
      AND status <> 'failed'
),
paths AS (
    SELECT e.asset, e.date, e.filtered_mean, e.smoothed_mean,
           ROW_NUMBER() OVER (PARTITION BY e.asset, e.date ORDER BY v.as_of) AS first_rank,
           ROW_NUMBER() OVER (PARTITION BY e.asset, e.date ORDER BY v.as_of DESC) AS last_rank,
           COUNT(*) OVER (PARTITION BY e.asset, e.date) AS n_vintages
    FROM vintage v
    JOIN estimates e ON e.run_id = v.run_id
    WHERE v.newest = 1
),
last_return AS (
    SELECT asset, MAX(date) AS last_date
    FROM dataset_values
    WHERE hash = :dataset
    GROUP BY asset
),
per_date AS (
    SELECT asset, date,
           MAX(CASE WHEN first_rank = 1 THEN filtered_mean END) AS first_release,
           MAX(CASE WHEN last_rank = 1 THEN smoothed_mean END) AS latest,
           MAX(n_vintages) AS n_vintages,
           ROW_NUMBER() OVER (PARTITION BY asset ORDER BY date) AS period
    FROM paths
    GROUP BY asset, date
)
SELECT p.asset, COUNT(*) AS n_dates, MIN(p.date) AS first_date, MAX(p.date) AS last_date,
       AVG(ABS(p.latest - p.first_release)) AS mean_abs_revision,
       AVG(p.latest - p.first_release) AS mean_revision,
       MAX(ABS(p.latest - p.first_release)) AS max_abs_revision
FROM per_date p
JOIN last_return l ON l.asset = p.asset
WHERE p.n_vintages >= 2 AND p.period > COALESCE(CAST(:skip AS INTEGER), 0)
  AND p.date <= l.last_date
GROUP BY p.asset
ORDER BY p.asset
