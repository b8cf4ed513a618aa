"""benchmarks/cycle_slices.py: a scenario's figures from its slices' (seconds added, the peak the largest slice's;
run K at a time, the peaks of the slices running together) and the process sampler behind them."""

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
        "process_s": wall + 5.0,
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
    assert t["process_s"] == 32.0 and [s["outside_total_s"] for s in found["per_slice"]] == [5.0, 5.0]
    assert found["steps_summed"]["clean"] == {"wall_s": 17.0, "sf_s": 0.0}


def test_the_bound_adds_the_k_largest_slice_peaks_and_the_sampler_sums_what_runs_at_once():
    from cycle_slices import memory
    from process_memory import TreeSampler

    slices = [_slice(s, 1.0, 1.0, 0.0, 0.0, peak, 1.0) for s, peak in ((7, 500.0), (8, 900.0), (9, 700.0))]
    sampler = TreeSampler(3600)  # sampled by hand below, not by its thread
    sampler.samples = [(1.0, {"7": (500.0, 400.0), "8": (600.0, 500.0)}), (2.0, {"8": (900.0, 800.0)}),
                       (3.0, {"8": (800.0, 700.0), "9": (700.0, 650.0)})]
    found = memory(slices, 2, sampler)
    sampler.stop()
    assert found["peak_bound_mb"] == 900.0 + 700.0
    assert (found["peak_sum_rss_mb"], found["peak_sum_pss_mb"], found["most_slices_at_once"]) == (1500.0, 1350.0, 2)
    assert memory(slices, 1, sampler)["peak_bound_mb"] == 900.0


def test_the_sampler_counts_a_child_process_it_watches():
    """A child holding 200 MB shows in its tree's sample (RSS as /proc gives it; Linux only)."""
    import subprocess
    import sys as system

    from process_memory import TreeSampler

    code = ("import sys; b = bytearray(200 * 1024 * 1024); b[::4096] = b'x' * len(b[::4096]); "
            "print('ok', flush=True); sys.stdin.read()")
    child = subprocess.Popen([system.executable, "-c", code], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline().strip() == "ok"
        sampler = TreeSampler(3600)
        sampler.watch("child", child.pid)
        sampler.sample()
        sampler.forget("child")
        sampler.sample()  # nothing watched: no sample
        sampler.stop()
    finally:
        child.communicate("")
    assert len(sampler.samples) == 1
    assert 200 <= sampler.peak_mb("child") < 400 and sampler.peak_sum_mb("rss") == sampler.peak_mb("child")
    assert 0 < sampler.peak_sum_mb("pss") <= sampler.peak_sum_mb("rss")
