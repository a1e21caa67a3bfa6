-- purpose: The backfills of one dataset: one row per backfill key among its runs of kind 'backfill'
--   (failed runs ignored), with how many cut-offs it has stored, its first and last cut-off, and
--   the settings (JSON) of its newest run.  Oldest backfill first.
-- param dataset: dataset hash (run_query also accepts a dataset name or hash prefix)
-- columns: backfill_key, n_vintages, first_as_of, last_as_of, newest_run_id, settings
SELECT b.backfill_key, b.n_vintages, b.first_as_of, b.last_as_of, b.newest_run_id, r.settings
FROM (
    SELECT backfill_key, COUNT(DISTINCT as_of) AS n_vintages, MIN(as_of) AS first_as_of,
           MAX(as_of) AS last_as_of, MAX(id) AS newest_run_id, MIN(id) AS oldest_run_id
    FROM runs
    WHERE dataset_hash = :dataset
      AND kind = 'backfill'
      AND status <> 'failed'
      AND backfill_key IS NOT NULL
    GROUP BY backfill_key
) b
JOIN runs r ON r.id = b.newest_run_id
ORDER BY b.oldest_run_id
