"""`reinitialized_target`: target = share x parent baseline, per child and horizon period.

Cycle date 2026-02-02. Ages count back from it: age 1 = week 2026-01-26,
age 2 = 01-19, age 3 = 01-12, age 4 = 01-05, age 6 = 2025-12-22.
"""

from __future__ import annotations

import pandas as pd
import pytest

from pipelines.calendar import shift_periods
from pipelines.schemas import ReinitializedTarget, ShareTable
from pipelines.stages.reinitialized_target import reinitialize_target

CYCLE = pd.Timestamp("2026-02-02")
AGE = {1: "2026-01-26", 2: "2026-01-19", 3: "2026-01-12", 4: "2026-01-05", 6: "2025-12-22"}
HORIZON = ["2026-02-02", "2026-02-09", "2026-02-16"]


def share_table(rows):
    """rows: (product, site, customer, share, window_used) -> a share table."""
    out = []
    for product, site, customer, share, used in rows:
        fallback = "even" if used == 0 else "none"
        start = shift_periods(CYCLE, -(used or 4), "week")
        out.append((product, site, customer, CYCLE, "a", share, "pooled", 4, used, start, fallback, 0.0, 0.0))
    return ShareTable.validate(
        pd.DataFrame(
            out,
            columns=[
                "product", "site", "customer", "cycle_date", "product_class", "share", "method",
                "window", "window_used", "window_start", "fallback", "child_volume", "parent_volume",
            ],
        )
    )


@pytest.fixture
def config(make_config):
    return make_config(calendar={"horizon": 3})


def per_customer(target, column="target", product=None):
    t = target if product is None else target[target["product"] == product]
    return t.groupby("customer")[column].agg(lambda s: sorted(set(s))).to_dict()


def test_target_is_share_times_parent_mean_over_the_window_used(make_history, config):
    history = make_history(
        [("P1", "S1", "C1", AGE[a], q) for a, q in [(4, 6), (3, 10), (2, 14), (1, 18)]]
        + [("P1", "S1", "C2", AGE[a], q) for a, q in [(4, 4), (3, 10), (2, 16), (1, 22)]]
    )
    shares = share_table([("P1", "S1", "C1", 0.2, 4), ("P1", "S1", "C2", 0.8, 4)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # parent per week 10, 20, 30, 40 -> volume 100 over 4 weeks -> baseline 25
    # C1: 0.2 x 25 = 5; C2: 0.8 x 25 = 20 (in every horizon week)
    assert per_customer(target, "parent_baseline") == {"C1": [25.0], "C2": [25.0]}
    assert per_customer(target) == {"C1": [pytest.approx(5.0)], "C2": [pytest.approx(20.0)]}


def test_baseline_divides_by_fewer_periods_when_parent_history_starts_inside_the_window(make_history, config):
    history = make_history([("P1", "S1", "C1", AGE[2], 10), ("P1", "S1", "C2", AGE[1], 20)])
    shares = share_table([("P1", "S1", "C1", 0.5, 4), ("P1", "S1", "C2", 0.5, 4)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # history starts at age 2 inside the 4-week window -> 2 periods: (10 + 20) / 2 = 15
    # (not 30 / 4 = 7.5); target 0.5 x 15 = 7.5
    assert per_customer(target, "parent_baseline") == {"C1": [15.0], "C2": [15.0]}
    assert per_customer(target) == {"C1": [7.5], "C2": [7.5]}


def test_baseline_uses_the_full_window_when_history_is_older_than_it(make_history, config):
    history = make_history([("P1", "S1", "C1", AGE[6], 50), ("P1", "S1", "C1", AGE[2], 12)])
    shares = share_table([("P1", "S1", "C1", 1.0, 4)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # history starts at age 6, before the 4-week window: the 50 is outside it,
    # baseline 12 / 4 = 3
    assert per_customer(target, "parent_baseline") == {"C1": [3.0]}


def test_copied_reference_history_is_left_out_of_the_baseline(make_history, config):
    history = make_history(
        [("P1", "S1", "C1", AGE[a], 10) for a in (4, 3, 2, 1)]
        + [("P1", "S1", "C2", AGE[a], 10, "reference", "P1", "C1") for a in (4, 3)]
        + [("P1", "S1", "C2", AGE[a], 5) for a in (2, 1)]
    )
    shares = share_table([("P1", "S1", "C1", 0.6, 4), ("P1", "S1", "C2", 0.4, 4)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # real volume: C1 4 x 10 = 40, C2 own 2 x 5 = 10 -> 50 / 4 = 12.5
    # (with the copied 2 x 10: 70 / 4 = 17.5)
    assert per_customer(target, "parent_baseline") == {"C1": [12.5], "C2": [12.5]}
    # C1 0.6 x 12.5 = 7.5; C2 0.4 x 12.5 = 5
    assert per_customer(target) == {"C1": [pytest.approx(7.5)], "C2": [pytest.approx(5.0)]}


def test_even_fallback_parent_has_baseline_zero(make_history, config):
    history = make_history([("P1", "S1", "C1", AGE[6], 50)])
    shares = share_table([("P1", "S1", "C1", 0.5, 0), ("P1", "S1", "C2", 0.5, 0)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # window_used 0: no window had volume -> baseline 0, target 0.5 x 0 = 0
    assert per_customer(target, "parent_baseline") == {"C1": [0.0], "C2": [0.0]}
    assert per_customer(target) == {"C1": [0.0], "C2": [0.0]}
    assert per_customer(target, "share") == {"C1": [0.5], "C2": [0.5]}


def test_each_parent_uses_its_own_window_used(make_history, config):
    history = make_history(
        [("P1", "S1", "C1", AGE[a], q) for a, q in [(4, 8), (3, 8), (2, 2), (1, 4)]]
        + [("P2", "S1", "C1", AGE[a], q) for a, q in [(4, 8), (3, 8), (2, 2), (1, 4)]]
    )
    shares = share_table([("P1", "S1", "C1", 1.0, 2), ("P2", "S1", "C1", 1.0, 4)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # P1 window 2: (2 + 4) / 2 = 3; P2 window 4: (8 + 8 + 2 + 4) / 4 = 5.5
    assert per_customer(target, product="P1") == {"C1": [3.0]}
    assert per_customer(target, product="P2") == {"C1": [5.5]}


def test_one_row_per_child_and_horizon_period(make_history, config):
    history = make_history([("P1", "S1", "C1", AGE[1], 4)])
    shares = share_table([("P1", "S1", "C1", 0.25, 4), ("P1", "S1", "C2", 0.75, 4)])
    target = ReinitializedTarget.validate(reinitialize_target(shares, history, config, CYCLE))
    # 2 children x horizon 3 = 6 rows, each child on 02-02, 02-09, 02-16
    assert len(target) == 6
    assert target[["customer", "period_start"]].values.tolist() == [
        [c, pd.Timestamp(d)] for c in ("C1", "C2") for d in HORIZON
    ]
    assert set(target["cycle_date"]) == {CYCLE}
    # history starts at age 1 -> baseline 4 / 1 = 4; targets 0.25 x 4 = 1, 0.75 x 4 = 3
    assert target["target"].tolist() == [1.0, 1.0, 1.0, 3.0, 3.0, 3.0]
