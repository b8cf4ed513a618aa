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


def test_the_sampler_reads_pss_only_at_a_new_rss_high_or_after_pss_every(monkeypatch):
    """PSS (a walk of every page by the kernel) is read at a new high of the RSS sum or when `pss_every` has passed;
    the other samples hold None, and the PSS peak is taken over the samples that read it."""
    import os

    import process_memory

    rss = iter([100.0, 300.0, 300.0, 200.0, 250.0])
    walks = []
    monkeypatch.setattr(process_memory, "rss_mb", lambda pid: next(rss))
    monkeypatch.setattr(process_memory, "memory_mb", lambda pid: walks.append(pid) or (0.0, 50.0 * len(walks)))
    sampler = process_memory.TreeSampler(3600, pss_every=3600)
    sampler.watch("me", os.getpid())
    monkeypatch.setattr(process_memory, "children_of", lambda: {})
    for _ in range(4):
        sampler.sample()
    assert [taken["me"] for _, taken in sampler.samples] == [(100.0, 50.0), (300.0, 100.0), (300.0, None),
                                                             (200.0, None)]
    sampler.pss_every = 0.0  # every sample reads it again
    sampler.sample()
    sampler.stop()
    assert sampler.samples[-1][1]["me"] == (250.0, 150.0) and len(walks) == 3
    assert sampler.peak_sum_mb("pss") == 150.0 and sampler.peak_sum_mb("rss") == 300.0
    assert sampler.peak_mb("me", kind="pss") == 150.0


def test_class_slices_picks_what_isin_picks_in_row_order():
    """The benchmark's class rows (one factorize per frame) are the rows a per-class `isin` picks, in their order and
    with their index; a frame without products goes to every class whole; a product without a class (NaN too) to
    none."""
    import numpy as np
    import pandas as pd
    from class_slices import class_slices

    shares = pd.DataFrame({"product": ["p1", "p2", "p3", "p1"], "product_class": ["a", "b", "a", "a"]})
    rows = pd.DataFrame({"product": ["p3", "p2", None, "p1", "p9", "p2", np.nan], "v": range(7)},
                        index=[10, 11, 12, 13, 14, 15, 16])
    calendar = pd.DataFrame({"cycle": ["c"]})
    got = dict(class_slices({"rows": rows, "calendar": calendar}, shares, ["a", "b"]))
    for c in ("a", "b"):
        products = set(shares.loc[shares["product_class"] == c, "product"])
        pd.testing.assert_frame_equal(got[c]["rows"], rows[rows["product"].isin(products)])
        assert got[c]["calendar"] is calendar
    assert list(got["a"]["rows"]["v"]) == [0, 3] and list(got["b"]["rows"]["v"]) == [1, 5]
