"""The backfill benchmark's quick variant runs end to end (timings are reported, never checked)."""

import json

from panel.bench.backfill import QUICK, format_result, main


def test_quick_benchmark_reports_both_worker_counts_and_identical_vintages(tmp_path, capsys):
    path = tmp_path / "bench.json"
    assert main(["--quick", "--json", str(path)]) == 0
    printed = capsys.readouterr().out
    result = json.loads(path.read_text())
    assert result["config"] == QUICK and result["identical_vintages"] is True
    runs = {r["workers"]: r for r in result["runs"]}
    assert sorted(runs) == [1, 2] and runs[2]["where"] == "2 local processes"
    assert all(r["vintages"] == QUICK["cutoffs"] for r in runs.values())
    assert runs[2]["speedup"] == runs[1]["seconds"] / runs[2]["seconds"]      # a ratio of the same run
    assert printed.strip() == format_result(result)
    assert "identical vintages with 1 and 2 workers: yes" in printed
