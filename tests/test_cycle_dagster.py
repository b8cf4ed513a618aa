"""benchmarks/cycle_dagster.py on a small scenario: every step of the asset graph reported, its parts inside it.

The benchmark runs in a process of its own (it wraps the stages, the IO manager
and statsforecast in the process it measures). No figure is judged here
(speed lives in benchmarks/, never in a test); what is checked is that the
report covers the real graph and that its parts add up: each step's wrapped
parts (the stage's run, validation, store reads and writes) lie inside its
wall time, as the event log's timestamps give it.
"""

import json
import subprocess
import sys
from pathlib import Path

import pytest

pytestmark = pytest.mark.graph
ROOT = Path(__file__).resolve().parents[1]


def test_the_dagster_benchmark_reports_every_step_of_the_graph(tmp_path):
    out = tmp_path / "figures.json"
    done = subprocess.run(
        [sys.executable, str(ROOT / "benchmarks" / "cycle_dagster.py"), "--leaves", "150", "--classes", "slow",
         "--folder", str(tmp_path / "run"), "--json", str(out)],
        cwd=ROOT, capture_output=True, text=True, timeout=1200,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    figures = json.loads(out.read_text())
    assert figures["complete"] and [r["class"] for r in figures["runs"]] == ["slow"]

    from pipelines.definitions import ASSETS

    steps = {r["step"]: r for r in figures["steps"]}
    assert set(steps) == {a.node_def.name for a in ASSETS}
    for name, row in steps.items():
        assert row["success"], name
        parts = row["run_s"] + row["validate_s"] + row["read_s"] + row["write_s"]
        assert 0 < parts <= row["wall_s"] + 0.05, (name, parts, row["wall_s"])
        assert row["statsforecast_s"] <= row["run_s"] + 1e-6, name
        assert row["rss_peak_mb"] and row["rss_peak_mb"] > 100, name
    assert steps["raw_history"]["rows"] > 0 and steps["lifecycle_history"]["validate_s"] > 0
    assert steps["statistical_forecast"]["statsforecast_s"] > 0  # the wrapper sees statsforecast's calls
    total = figures["total"]
    assert total["wall_s"] == pytest.approx(sum(r["wall_s"] for r in figures["steps"]))
    assert 0 < total["validation_share_of_own"] < 1
    assert (tmp_path / "run" / "var" / "store" / "tables" / "plan_measures").is_dir()  # the real store was written
