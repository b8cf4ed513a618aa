"""The command line as a platform team runs it, on a monthly cut of the demo with config/planning.monthly.yaml.

One `python -m pipelines cycle --json` run (a process of its own, as from a
shell) serves four tests: the monthly config runs, the JSON summary parses
and holds each class's result, the progress display prints a line per class
and stage, and Dagster's own log stays off the console. A rebuild of one step
with `--verbose` shows Dagster's lines.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from monthly_cut import monthly_config, monthly_cut

from pipelines.definitions import ASSETS
from pipelines.resources import read_table

pytestmark = pytest.mark.graph

ROOT = Path(__file__).resolve().parents[1]
CLASSES = ["consumables", "seasonal"]  # a split class and a seasonal one (season of 12 months)
# a line of Dagster's console log: "2026-12-02 10:16:31 +0000 - dagster - INFO - planning_cycle - <run> - ..."
CHECKS_PER_PARTITION = sum(len(list(a.check_specs)) for a in ASSETS)
DAGSTER_LINE = re.compile(r" - dagster - (DEBUG|INFO|WARNING|ERROR) - ")


def _command(args: list[str], home: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "DAGSTER_HOME": str(home)}
    return subprocess.run(
        [sys.executable, "-m", "pipelines", *args], cwd=ROOT, env=env, capture_output=True, text=True, timeout=1800
    )


@pytest.fixture(scope="module")
def monthly_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("monthly")
    config = monthly_config(tmp, monthly_cut(tmp / "inputs"))
    home = tmp / "dagster"
    home.mkdir()
    (home / "dagster.yaml").write_text("telemetry:\n  enabled: false\n")
    args = ["cycle", "--config", str(config), "--json"] + [a for c in CLASSES for a in ("--class", c)]
    return _command(args, home), tmp, config, home


def test_the_monthly_config_runs_a_monthly_cut_of_the_demo(monthly_run):
    done, tmp, _, _ = monthly_run
    assert done.returncode == 0, done.stderr[-3000:]
    # the cut ends with October 2026 (November is incomplete): the cycle is November, 12 months ahead
    forecast = read_table(tmp / "store", "parent_forecast", versions="complete")
    months = sorted(forecast["period_start"].dt.strftime("%Y-%m").unique())
    assert months == [f"{d:%Y-%m}" for d in pd.date_range("2026-11-01", periods=12, freq="MS")]
    # the backtest follows the month: origins 6 months apart, each forecasting 6 months
    accuracy = read_table(tmp / "store", "backtest_accuracy", versions="complete")
    assert set(accuracy["horizon"]) == {6} and set(accuracy["origins"]) == {3}
    cleaned = read_table(tmp / "store", "cleaned_history", versions="complete")
    assert (cleaned["period_start"].dt.day == 1).all()


def test_json_summary_parses_and_holds_each_class_result(monthly_run):
    done, _, _, _ = monthly_run
    summary = json.loads(done.stdout)  # stdout holds the JSON object and nothing else
    assert (summary["command"], summary["cycle"], summary["exit_code"], summary["result"]) == (
        "cycle",
        "2026-11-01",
        0,
        "ok",
    )
    assert sorted(summary["classes"]) == CLASSES and summary["earlier_cycles"] == {}
    for name, result in summary["classes"].items():
        assert result["success"] is True and result["failures"] == [], name
        stages = {s["stage"]: s for s in result["stages"]}
        assert len(stages) == 19 and all(s["status"] == "succeeded" for s in stages.values()), name
        assert stages["raw_history"]["rows"] > 0 and stages["statistical_forecast"]["series"] > 0, name
        assert stages["backtest_accuracy"]["series"] > stages["statistical_forecast"]["series"], name
        # every check of the graph ran for the class: passed and failed add up to the checks defined
        assert result["checks"]["passed"] + len(result["checks"]["failed"]) == CHECKS_PER_PARTITION, name
        # only WARN checks may fail in a run that exits 0
        assert all(f["severity"] == "WARN" for f in result["checks"]["failed"]), name
    assert summary["report"].endswith("cycle_report.html")


def test_the_display_prints_a_line_per_class_and_stage_and_no_dagster_log(monthly_run):
    done, _, _, _ = monthly_run
    lines = done.stderr.splitlines()  # with --json everything but the summary goes to stderr
    for i, name in enumerate(CLASSES, 1):
        header = f"[{i}/{len(CLASSES)}] cycle 2026-11-01, class {name}: whole cycle ..."
        assert header in lines
        ran = [line for line in lines if re.match(rf"^  {name} +\d+/19 \w+ ", line)]
        assert [int(re.search(r"(\d+)/19", line).group(1)) for line in ran] == list(range(1, 20)), ran
        forecast = next(line for line in ran if " statistical_forecast " in line)
        assert re.search(r"statistical_forecast +[\d,]+ rows +\d+\.\d s  \(\d+ series\)$", forecast), forecast
        assert any(re.match(rf"^    {name}: run [0-9a-f-]+: succeeded in \d+ s$", line) for line in lines)
    assert not any(DAGSTER_LINE.search(line) for line in lines)
    assert "STEP_START" not in done.stderr and "LOADED_INPUT" not in done.stderr


def test_verbose_shows_dagster_log_lines(monthly_run):
    done, _, config, home = monthly_run
    assert done.returncode == 0
    args = ["rebuild", "--config", str(config), "--class", "seasonal", "--from", "publication", "--verbose"]
    verbose = _command(args, home)
    assert verbose.returncode == 0, verbose.stderr[-3000:]
    output = verbose.stdout + verbose.stderr
    # Dagster's INFO lines, among them the publication step's own message
    assert any(DAGSTER_LINE.search(line) and " - publication - " in line for line in output.splitlines())
    # the display's own line is there too, without a live bar under Dagster's lines
    assert re.search(r"^  seasonal +1/1 publication ", verbose.stdout, re.MULTILINE)
