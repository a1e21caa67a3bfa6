-- 0003 bayes posterior: what a Bayesian run (estimation = bayes) stores beside the ML columns.
--
-- Additive only.  estimates and factor_paths gain the 5% and 95% posterior quantiles of the
-- filtered and smoothed premium (NULL for ML runs), parameters the posterior quantiles and the
-- convergence statistics of each monitored quantity (split R-hat, bulk and tail effective sample
-- size; NULL for ML runs and for unmonitored rows).  posterior_draws holds, per Bayesian run, the
-- parameter draws its premium summaries mix over (the primitive parameters only), so that a stored
-- run's cross-section at any date is the same mixture as the fit's.

ALTER TABLE estimates ADD COLUMN filtered_q05 DOUBLE PRECISION;
ALTER TABLE estimates ADD COLUMN filtered_q95 DOUBLE PRECISION;
ALTER TABLE estimates ADD COLUMN smoothed_q05 DOUBLE PRECISION;
ALTER TABLE estimates ADD COLUMN smoothed_q95 DOUBLE PRECISION;

ALTER TABLE factor_paths ADD COLUMN filtered_q05 DOUBLE PRECISION;
ALTER TABLE factor_paths ADD COLUMN filtered_q95 DOUBLE PRECISION;
ALTER TABLE factor_paths ADD COLUMN smoothed_q05 DOUBLE PRECISION;
ALTER TABLE factor_paths ADD COLUMN smoothed_q95 DOUBLE PRECISION;

ALTER TABLE parameters ADD COLUMN q05 DOUBLE PRECISION;
ALTER TABLE parameters ADD COLUMN q50 DOUBLE PRECISION;
ALTER TABLE parameters ADD COLUMN q95 DOUBLE PRECISION;
ALTER TABLE parameters ADD COLUMN rhat DOUBLE PRECISION;
ALTER TABLE parameters ADD COLUMN ess_bulk DOUBLE PRECISION;
ALTER TABLE parameters ADD COLUMN ess_tail DOUBLE PRECISION;

CREATE TABLE posterior_draws (
    run_id BIGINT NOT NULL,
    draw INTEGER NOT NULL,
    name VARCHAR NOT NULL,
    row VARCHAR,
    col VARCHAR,
    value DOUBLE PRECISION
);
