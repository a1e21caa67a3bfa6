"""Smoke test of the side-by-side benchmark (``python -m panel.bench --quick``): it runs, writes
the expected JSON and our log-likelihood equals statsmodels' exact diffuse one on the identical
model (outside source: statsmodels' MLEModel smoother).  Timings are reported, never asserted."""

import json
import subprocess
import sys


def test_quick_benchmark_json(tmp_path):
    out = tmp_path / "bench.json"
    proc = subprocess.run([sys.executable, "-m", "panel.bench", "--quick", "--json", str(out)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "E-step vs statsmodels smoother" in proc.stdout
    res = json.loads(out.read_text())
    assert set(res) == {"meta", "compare", "scale", "ragged", "ragged_fit"}
    assert {r["pattern"] for r in res["compare"]} == {"balanced", "staircase"}
    for row in res["compare"]:
        assert "error" not in row, row
        for key in ("estep_true_s", "sm_smoother_s", "smoother_ratio", "loglik", "sm_loglik",
                    "dfmq_iter_s", "em_iter_s", "em_ratio", "estep_s", "report_s", "fit_s",
                    "fit_esteps", "fit_loglik", "fit_status", "method", "peak_rss_mb"):
            assert key in row
        assert row["method"] == "stretch"
        assert row["loglik_rel_diff"] < 1e-8
    for row in res["scale"] + res["ragged_fit"]:
        assert "error" not in row, row
        assert row["peak_rss_mb"] > 0 and row["fit_esteps"] >= 1
    gaps = [r for r in res["ragged_fit"] if r["pattern"] == "gaps_2"]
    assert gaps and {gaps[0]["finish"], gaps[0]["alt_finish"]} == {"filled", "direct"}
    assert abs(gaps[0]["fit_loglik"] - gaps[0]["alt_fit_loglik"]) < 1e-4   # both within loglik_tol
    assert "the other route on the same panel" in proc.stdout
    assert {r["pattern"] for r in res["ragged"]} == {"balanced", "staircase", "exits", "last_cell",
                                                     "gaps_0.5", "gaps_2"}
    for row in res["ragged"]:
        assert "error" not in row, row
        assert row["loglik_rel_diff"] < 1e-8          # statsmodels' exact diffuse smoother
        assert row["missing_cells"] > 0 or row["pattern"] == "balanced"
