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


def test_a_scenario_in_slices_cut_into_shards_runs_two_partitions_at_a_time(tmp_path):
    """`--slices 2 --shard-leaves L --parallel 2`: one input folder holding both slices (slice 1's products renamed),
    the class cut into ceil(leaves / L) shards, every shard a run of the whole graph in a process of its own."""
    out, folder = tmp_path / "figures.json", tmp_path / "run"
    done = subprocess.run(
        [sys.executable, str(ROOT / "benchmarks" / "cycle_dagster.py"), "--leaves", "400", "--slices", "2",
         "--shard-leaves", "40", "--classes", "slow", "--parallel", "2", "--folder", str(folder), "--json", str(out)],
        cwd=ROOT, capture_output=True, text=True, timeout=1800,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    figures = json.loads(out.read_text())
    facts = figures["scenario"]
    assert facts["leaves"] == 400 and facts["slices"] == 2 and sum(facts["leaves_per_class"].values()) == 400
    n = -(-facts["leaves_per_class"]["slow"] // 40)
    assert n > 1 and facts["shards"]["slow"] == n
    assert figures["partitions"] == [f"slow~{i}of{n}" for i in range(1, n + 1)]

    import pandas as pd

    products = pd.read_csv(folder / "inputs" / "products.csv")["product"]
    first, second = products[~products.str.endswith("-1")], products[products.str.endswith("-1")]
    # both slices draw the same codes; the suffix keeps their products (and so their parents) apart
    assert products.is_unique and set(second.str.removesuffix("-1")) & set(first)
    assert {p.name.split("_")[1] for p in (folder / "inputs").glob("history_*.csv")} == {"0", "1"}

    from pipelines.definitions import ASSETS

    assets = {a.node_def.name for a in ASSETS}
    assert sorted(r["class"] for r in figures["runs"]) == figures["partitions"] and all(
        r["success"] for r in figures["runs"])
    for key in figures["partitions"]:
        assert {r["step"] for r in figures["steps"] if r["class"] == key} == assets, key
    assert {r["step"]: r["runs"] for r in figures["per_step"]} == dict.fromkeys(assets, n)
    whole = figures["whole"]
    assert whole["parallel"] == 2 and 1 <= whole["most_runs_at_once"] <= 2
    assert whole["peak_mb"] > 100 and whole["peak_sum_pss_mb"] <= whole["peak_sum_rss_mb"]
    assert all(r["rss_peak_mb"] > 100 for r in figures["runs"])  # each run's processes sampled
