"""benchmarks/cycle_slices.py: a scenario's figures from its slices' (seconds added, the peak the largest slice's)."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

from cycle_slices import combine  # noqa: E402


def _slice(seed: int, wall: float, own: float, sf: float, valid: float, peak: float, stage: float) -> dict:
    return {
        "parameters": {"seed": seed},
        "scenario": {"parents": 10, "lines": 100},
        "steps": [{"stage": "generate (not timed)", "wall_s": 2.0}, {"stage": "clean", "wall_s": own}],
        "total": {"wall_s": wall, "own_code_s": own, "statsforecast_s": sf, "validation_s": valid,
                  "rss_peak_mb": peak},
        "model_stage": {"model_stage_s": stage, "statsforecast_s": sf},
        "side_by_side": {"stages_s": 3.0, "duckdb_s": 1.0, "numpy_s": 2.0},
    }


def test_slices_add_their_seconds_and_keep_the_largest_peak():
    found = combine([_slice(7, 10.0, 8.0, 2.0, 1.0, 500.0, 3.0), _slice(8, 12.0, 9.0, 3.0, 2.0, 700.0, 4.0)], 200)
    t = found["total"]
    assert (t["wall_s"], t["own_code_s"], t["statsforecast_s"], t["validation_s"]) == (22.0, 17.0, 5.0, 3.0)
    assert t["rss_peak_mb"] == 700.0 and t["validation_share_of_own"] == 3.0 / 17.0
    assert found["generate_s_not_in_total"] == 4.0 and (found["parents"], found["lines"]) == (20, 200)
    assert found["model_stage"]["model_stage_over_statsforecast"] == 7.0 / 5.0
    assert found["side_by_side"]["stages_over_duckdb"] == 3.0 and found["side_by_side"]["stages_over_numpy"] == 1.5
    assert [s["seed"] for s in found["per_slice"]] == [7, 8]
