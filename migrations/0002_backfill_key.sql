-- 0002 backfill key: runs.backfill_key identifies "the same backfill step" for idempotent backfill.
--
-- The key is sha256 over the dataset hash and the run settings without as_of (see
-- panel.store.environment.backfill_key).  Portable SQL cannot compute it, so after this file the
-- runner fills the key of existing runs from their settings, in the same transaction.

ALTER TABLE runs ADD COLUMN backfill_key VARCHAR;
