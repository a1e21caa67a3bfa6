"""``riskprem fit --bayes`` and the commands that read its run: show, estimates, cross-section,
reproduce --rtol 0, --save-draws, profiles and backfill (short chains on the CLI test panel)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from tests.backends import BOTH

QUICK = ("--bayes", "--draws", "20", "--chains", "2", "--warmup", "10", "--seed", "4",
         "--premium-factors", "0")


def _json(result) -> dict:
    assert result.exit_code == 0, result.output
    return json.loads(result.stdout)


@BOTH
def test_bayes_round_trip_through_the_commands(cli_store):
    fitted = _json(cli_store.invoke("fit", "--data", "trees", *QUICK, "--prior", "premium_vol=3",
                                    "--json"))
    run = fitted["run_id"]
    assert fitted["status"] in ("mixed", "not mixed")
    assert fitted["mixing"]["chains"] == 2 and fitted["mixing"]["max_split_rhat"] > 0.9
    spec = fitted["settings"]["spec"]
    assert spec["estimation"] == "bayes" and spec["priors"]["premium_vol"] == pytest.approx(0.03)
    latest = fitted["latest"]["rows"][0]
    assert latest["filtered_q05"] < latest["filtered_mean"] < latest["filtered_q95"]

    shown = cli_store.invoke("show", str(run))
    assert shown.exit_code == 0, shown.output
    assert "Parameter posterior" in shown.stdout and "split R-hat" in shown.stdout
    assert "chains mixed" in shown.stdout or "chains have NOT mixed" in shown.stdout

    rows = _json(cli_store.invoke("estimates", str(run), "--json", "--last", "1"))["rows"]
    assert {"filtered_q05", "filtered_q95", "smoothed_q05", "smoothed_q95"} <= set(rows[0])
    table = cli_store.invoke("estimates", str(run), "--last", "1")
    assert "posterior 5% and 95% quantiles" in table.stdout

    cs = _json(cli_store.invoke("cross-section", str(run), "--json", "--kind", "filtered"))
    matrix = np.array(cs["prob_greater"]["matrix"], dtype=float)
    off = ~np.eye(len(matrix), dtype=bool)
    np.testing.assert_allclose(matrix[off] + matrix.T[off], 1.0, atol=1e-12)  # P(i>j) + P(j>i) = 1
    assert {"q05", "q95"} <= set(cs["ranked"][0])

    again = _json(cli_store.invoke("reproduce", str(run), "--rtol", "0", "--json"))
    assert again["reproduced"] and "posterior_draws" in [t["table"] for t in again["tables"]]

    # diff against an ML fit says which run is Bayesian and what its numbers are
    ml = _json(cli_store.invoke("fit", "--data", "trees", "--json"))["run_id"]
    assert _json(cli_store.invoke("diff", str(ml), str(run), "--json"))["bayesian_runs"] == [run]
    shown = cli_store.invoke("diff", str(ml), str(run))
    assert shown.exit_code == 0, shown.output
    assert f"run {run} is Bayesian: premia and parameters below are posterior means" in " ".join(shown.stdout.split())


def test_save_draws_writes_netcdf_and_refuses_without_bayes(cli_store):
    import arviz as az

    path = cli_store.folder / "draws.nc"
    done = cli_store.invoke("fit", "--data", "trees", *QUICK, "--save-draws", path)
    assert done.exit_code == 0, done.output
    assert "draws written to" in done.stdout and "chains" in done.stdout
    posterior = az.from_netcdf(path).posterior
    assert posterior.sizes["chain"] == 2 and posterior.sizes["draw"] == 20
    before = cli_store.digest()
    refused = cli_store.invoke("fit", "--data", "trees", "--save-draws", path)
    assert refused.exit_code == 2 and "--save-draws goes with --bayes" in refused.output
    refused = cli_store.invoke("fit", "--data", "trees", "--draws", "50")
    assert refused.exit_code == 1 and "add estimation='bayes' (--bayes)" in refused.output
    assert cli_store.digest() == before


def test_profile_sets_bayes_options_and_backfill_takes_them(cli_store):
    config = cli_store.folder / "riskprem.toml"
    config.write_text('[profiles.posterior]\nbayes = true\ndraws = 12\nchains = 2\nwarmup = 6\n'
                      'premium_factors = 0\nprior = { premium_vol = 2.5 }\n')
    done = _json(cli_store.invoke("backfill", "--data", "trees", "--start", "2019-11-30",
                                  "--profile", "posterior", "--config", config, "--json"))
    assert done["n_cutoffs"] == 2
    runs = _json(cli_store.invoke("runs", "--json"))["runs"][-2:]
    seeds = {r["settings"]["sampler_seed"] for r in runs}
    assert len(seeds) == 2 and all(r["settings"]["spec"]["draws"] == 12 for r in runs)
    bad = cli_store.folder / "bad.toml"
    bad.write_text('[profiles.p]\nbayes = "yes"\n')
    refused = cli_store.invoke("fit", "--data", "trees", "--profile", "p", "--config", bad)
    assert refused.exit_code == 1 and "is not true or false" in refused.output


def test_arviz_loads_without_printing_to_the_users_terminal(tmp_path):
    # ArviZ 0.23 prints a FutureWarning about its coming refactor on its first import of the day
    # (a stamp in the user's cache folder, here an empty one); a Bayesian run's only output on
    # stderr must be ours
    import os
    import subprocess
    import sys

    code = "from panel.bayes.diagnostics import arviz; print(arviz().__name__)"
    out = subprocess.run([sys.executable, "-W", "default", "-c", code], capture_output=True,
                         text=True, check=True, env={**os.environ, "XDG_CACHE_HOME": str(tmp_path)})
    assert out.stdout.strip() == "arviz" and out.stderr == ""
