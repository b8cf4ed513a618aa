"""`share_tables`: pooled and mean-of-ratios shares, fallbacks, window position.

Cycle date 2026-02-02. Ages count back from it: age 1 = week 2026-01-26,
age 2 = 01-19, age 3 = 01-12, age 4 = 01-05.
"""

from __future__ import annotations

import pandas as pd
import pytest

from pipelines.stages.share_tables import compute_shares

CYCLE = pd.Timestamp("2026-02-02")
AGE = {1: "2026-01-26", 2: "2026-01-19", 3: "2026-01-12", 4: "2026-01-05"}


def history_rows(volumes, product="P1", site="S1"):
    """volumes: {customer: {age: quantity}} -> lifecycle history rows."""
    return [(product, site, c, AGE[a], q) for c, by_age in volumes.items() for a, q in by_age.items()]


def by_customer(shares, column="share"):
    return dict(zip(shares["customer"], shares[column]))


# Two children over a 3-week window (ages 3, 2, 1):
#   age 3: C1 1, C2 3 (parent 4)   age 2: C1 2, C2 2 (parent 4)   age 1: C1 6, C2 2 (parent 8)
TWO_CHILDREN = {"C1": {3: 1, 2: 2, 1: 6}, "C2": {3: 3, 2: 2, 1: 2}}


def test_pooled_share_is_child_volume_over_parent_volume(make_history, make_children, make_config):
    config = make_config({"a": {"window": 3, "method": "pooled"}})
    shares = compute_shares(make_history(history_rows(TWO_CHILDREN)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE)
    # C1: (1 + 2 + 6) / (4 + 4 + 8) = 9 / 16 = 0.5625; C2: 7 / 16 = 0.4375
    assert by_customer(shares) == pytest.approx({"C1": 0.5625, "C2": 0.4375})
    assert by_customer(shares, "child_volume") == pytest.approx({"C1": 9.0, "C2": 7.0})
    assert by_customer(shares, "parent_volume") == pytest.approx({"C1": 16.0, "C2": 16.0})
    assert set(shares["method"]) == {"pooled"}


def test_mean_of_ratios_share_averages_the_period_proportions(make_history, make_children, make_config):
    config = make_config({"a": {"window": 3, "method": "mean_of_ratios"}})
    shares = compute_shares(make_history(history_rows(TWO_CHILDREN)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE)
    # C1: (1/4 + 2/4 + 6/8) / 3 = (0.25 + 0.5 + 0.75) / 3 = 0.5
    # C2: (3/4 + 2/4 + 2/8) / 3 = (0.75 + 0.5 + 0.25) / 3 = 0.5   (pooled gave 0.5625 / 0.4375)
    assert by_customer(shares) == pytest.approx({"C1": 0.5, "C2": 0.5})
    assert set(shares["method"]) == {"mean_of_ratios"}


def test_pooled_and_mean_of_ratios_on_three_children_over_four_periods(make_history, make_children, make_config):
    volumes = {"C1": {4: 2, 3: 0, 2: 1, 1: 5}, "C2": {4: 2, 3: 4, 2: 1, 1: 0}, "C3": {4: 0, 3: 4, 2: 2, 1: 5}}
    # parent per age: age 4: 4, age 3: 8, age 2: 4, age 1: 10 -> total 26
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2"), ("P1", "S1", "C3")])
    history = make_history(history_rows(volumes))
    pooled = compute_shares(history, children, make_config({"a": {"window": 4, "method": "pooled"}}), CYCLE)
    ratios = compute_shares(history, children, make_config({"a": {"window": 4, "method": "mean_of_ratios"}}), CYCLE)
    # pooled: C1 (2+0+1+5)/26 = 8/26, C2 (2+4+1+0)/26 = 7/26, C3 (0+4+2+5)/26 = 11/26
    assert by_customer(pooled) == pytest.approx({"C1": 8 / 26, "C2": 7 / 26, "C3": 11 / 26})
    # mean of ratios: C1 (2/4 + 0/8 + 1/4 + 5/10) / 4 = (0.5 + 0 + 0.25 + 0.5) / 4 = 0.3125
    #                 C2 (2/4 + 4/8 + 1/4 + 0/10) / 4 = (0.5 + 0.5 + 0.25 + 0) / 4 = 0.3125
    #                 C3 (0/4 + 4/8 + 2/4 + 5/10) / 4 = (0 + 0.5 + 0.5 + 0.5) / 4 = 0.375
    assert by_customer(ratios) == pytest.approx({"C1": 0.3125, "C2": 0.3125, "C3": 0.375})


def test_mean_of_ratios_leaves_out_a_period_without_parent_volume(make_history, make_children, make_config):
    config = make_config({"a": {"window": 3, "method": "mean_of_ratios"}})
    volumes = {"C1": {3: 0, 2: 1, 1: 1}, "C2": {3: 0, 2: 3, 1: 1}}
    shares = compute_shares(make_history(history_rows(volumes)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE)
    # age 3 has parent volume 0 -> no proportion; average over ages 2 and 1 only:
    # C1: (1/4 + 1/2) / 2 = 0.375 (not (0 + 1/4 + 1/2) / 3 = 0.25)
    # C2: (3/4 + 1/2) / 2 = 0.625
    assert by_customer(shares) == pytest.approx({"C1": 0.375, "C2": 0.625})


def test_parent_without_volume_falls_back_to_a_longer_window(make_history, make_children, make_config):
    config = make_config({"a": {"window": 2, "method": "pooled", "fallback_windows": [4]}})
    volumes = {"C1": {4: 2}, "C2": {3: 6}}  # nothing in ages 1-2
    shares = compute_shares(make_history(history_rows(volumes)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE)
    # window 2 is empty; window 4 holds 2 + 6 = 8 -> C1 2/8 = 0.25, C2 6/8 = 0.75
    assert by_customer(shares) == pytest.approx({"C1": 0.25, "C2": 0.75})
    assert set(shares["fallback"]) == {"longer_window"}
    assert shares["window"].tolist() == [2, 2]
    assert shares["window_used"].tolist() == [4, 4]
    # 4 weeks back from 2026-02-02 is 2026-01-05
    assert set(shares["window_start"]) == {pd.Timestamp("2026-01-05")}
    assert by_customer(shares, "parent_volume") == pytest.approx({"C1": 8.0, "C2": 8.0})


def test_parent_without_volume_in_any_window_splits_evenly(make_history, make_children, make_config):
    config = make_config({"a": {"window": 2, "method": "pooled", "fallback_windows": [3]}})
    volumes = {"C1": {4: 9}}  # only at age 4, outside both windows
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2"), ("P1", "S1", "C3")])
    shares = compute_shares(make_history(history_rows(volumes)), children, config, CYCLE)
    # three active children, no volume in 2 or 3 weeks -> 1/3 each, window_used 0
    assert shares["share"].tolist() == pytest.approx([1 / 3, 1 / 3, 1 / 3])
    assert set(shares["fallback"]) == {"even"}
    assert shares["window_used"].tolist() == [0, 0, 0]
    # window_start falls back to the configured window: 2 weeks back = 2026-01-19
    assert set(shares["window_start"]) == {pd.Timestamp("2026-01-19")}
    assert shares["parent_volume"].tolist() == [0.0, 0.0, 0.0]


def test_each_parent_shares_sum_to_one(make_history, make_children, make_config):
    config = make_config({"a": {"window": 2, "method": "pooled"}})
    rows = history_rows({"C1": {1: 1}, "C2": {1: 2}, "C3": {2: 5}}) + history_rows(
        {"C1": {1: 3}, "C2": {2: 3}}, product="P2"
    )
    children = make_children(
        [("P1", "S1", "C1"), ("P1", "S1", "C2"), ("P1", "S1", "C3"), ("P2", "S1", "C1"), ("P2", "S1", "C2"), ("P2", "S1", "C3")]
    )
    shares = compute_shares(make_history(rows), children, config, CYCLE)
    got = {(p, c): s for p, c, s in zip(shares["product"], shares["customer"], shares["share"])}
    # P1: 1/8, 2/8, 5/8; P2: 3/6, 3/6 and C3 without volume 0
    assert got == pytest.approx(
        {("P1", "C1"): 0.125, ("P1", "C2"): 0.25, ("P1", "C3"): 0.625, ("P2", "C1"): 0.5, ("P2", "C2"): 0.5, ("P2", "C3"): 0.0}
    )
    sums = shares.groupby("product")["share"].sum()
    # 0.125 + 0.25 + 0.625 = 1; 0.5 + 0.5 + 0 = 1
    assert sums.to_dict() == pytest.approx({"P1": 1.0, "P2": 1.0})


def test_window_counts_back_from_the_cycle_date_and_ignores_older_history(make_history, make_children, make_config):
    config = make_config({"a": {"window": 2, "method": "pooled"}})
    volumes = {"C1": {3: 100, 2: 1}, "C2": {1: 3}}
    shares = compute_shares(make_history(history_rows(volumes)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE)
    # window 2 = ages 1 and 2 (weeks 01-26, 01-19); C1's 100 at age 3 (01-12) is outside:
    # C1 1/4 = 0.25, C2 3/4 = 0.75 (with the 100: 101/104)
    assert by_customer(shares) == pytest.approx({"C1": 0.25, "C2": 0.75})
    assert set(shares["window_start"]) == {pd.Timestamp("2026-01-19")}
    assert set(shares["fallback"]) == {"none"}


def test_history_of_a_customer_that_is_not_an_active_child_is_ignored(make_history, make_children, make_config):
    config = make_config({"a": {"window": 2, "method": "pooled"}})
    volumes = {"C1": {1: 1}, "C2": {1: 3}, "C9": {1: 96}}
    shares = compute_shares(make_history(history_rows(volumes)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE)
    # C9 is not a child: parent volume 1 + 3 = 4 -> 0.25, 0.75
    assert by_customer(shares) == pytest.approx({"C1": 0.25, "C2": 0.75})
    assert by_customer(shares, "parent_volume") == pytest.approx({"C1": 4.0, "C2": 4.0})
