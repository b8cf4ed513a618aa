"""`share_tables`: pooled and mean-of-ratios shares, fallbacks, window position, shortages,
and the lifecycle rules of new, phasing-in and phasing-out children.

Cycle date 2026-02-02. Ages count back from it: age 1 = week 2026-01-26,
age 2 = 01-19, age 3 = 01-12, age 4 = 01-05.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.engines.lifecycle_shares import find_new_customers_without_share, new_customers
from pipelines.engines.shares import compute_shares
from pipelines.schemas import ShareTable

CYCLE = pd.Timestamp("2026-02-02")
AGE = {1: "2026-01-26", 2: "2026-01-19", 3: "2026-01-12", 4: "2026-01-05"}


def history_rows(volumes, product="P1", site="S1"):
    """volumes: {customer: {age: quantity}} -> lifecycle history rows."""
    return [(product, site, c, AGE[a], q) for c, by_age in volumes.items() for a, q in by_age.items()]


def by_customer(shares, column="share"):
    return dict(zip(shares["customer"], shares[column], strict=False))


# Two children over a 3-week window (ages 3, 2, 1):
#   age 3: C1 1, C2 3 (parent 4)   age 2: C1 2, C2 2 (parent 4)   age 1: C1 6, C2 2 (parent 8)
TWO_CHILDREN = {"C1": {3: 1, 2: 2, 1: 6}, "C2": {3: 3, 2: 2, 1: 2}}


def test_pooled_share_is_child_volume_over_parent_volume(make_history, make_children, make_config):
    config = make_config({"a": {"window": 3, "method": "pooled"}})
    shares = compute_shares(
        make_history(history_rows(TWO_CHILDREN)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE
    )
    # C1: (1 + 2 + 6) / (4 + 4 + 8) = 9 / 16 = 0.5625; C2: 7 / 16 = 0.4375
    assert by_customer(shares) == pytest.approx({"C1": 0.5625, "C2": 0.4375})
    assert by_customer(shares, "child_volume") == pytest.approx({"C1": 9.0, "C2": 7.0})
    assert by_customer(shares, "parent_volume") == pytest.approx({"C1": 16.0, "C2": 16.0})
    assert set(shares["method"]) == {"pooled"}


def test_mean_of_ratios_share_averages_the_period_proportions(make_history, make_children, make_config):
    config = make_config({"a": {"window": 3, "method": "mean_of_ratios"}})
    shares = compute_shares(
        make_history(history_rows(TWO_CHILDREN)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE
    )
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
    shares = compute_shares(
        make_history(history_rows(volumes)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE
    )
    # age 3 has parent volume 0 -> no proportion; average over ages 2 and 1 only:
    # C1: (1/4 + 1/2) / 2 = 0.375 (not (0 + 1/4 + 1/2) / 3 = 0.25)
    # C2: (3/4 + 1/2) / 2 = 0.625
    assert by_customer(shares) == pytest.approx({"C1": 0.375, "C2": 0.625})


def test_parent_without_volume_falls_back_to_a_longer_window(make_history, make_children, make_config):
    config = make_config({"a": {"window": 2, "method": "pooled", "fallback_windows": [4]}})
    volumes = {"C1": {4: 2}, "C2": {3: 6}}  # nothing in ages 1-2
    shares = compute_shares(
        make_history(history_rows(volumes)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE
    )
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
        [
            ("P1", "S1", "C1"),
            ("P1", "S1", "C2"),
            ("P1", "S1", "C3"),
            ("P2", "S1", "C1"),
            ("P2", "S1", "C2"),
            ("P2", "S1", "C3"),
        ]
    )
    shares = compute_shares(make_history(rows), children, config, CYCLE)
    got = {(p, c): s for p, c, s in zip(shares["product"], shares["customer"], shares["share"], strict=False)}
    # P1: 1/8, 2/8, 5/8; P2: 3/6, 3/6 and C3 without volume 0
    assert got == pytest.approx(
        {
            ("P1", "C1"): 0.125,
            ("P1", "C2"): 0.25,
            ("P1", "C3"): 0.625,
            ("P2", "C1"): 0.5,
            ("P2", "C2"): 0.5,
            ("P2", "C3"): 0.0,
        }
    )
    sums = shares.groupby("product")["share"].sum()
    # 0.125 + 0.25 + 0.625 = 1; 0.5 + 0.5 + 0 = 1
    assert sums.to_dict() == pytest.approx({"P1": 1.0, "P2": 1.0})


def test_window_counts_back_from_the_cycle_date_and_ignores_older_history(make_history, make_children, make_config):
    config = make_config({"a": {"window": 2, "method": "pooled"}})
    volumes = {"C1": {3: 100, 2: 1}, "C2": {1: 3}}
    shares = compute_shares(
        make_history(history_rows(volumes)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE
    )
    # window 2 = ages 1 and 2 (weeks 01-26, 01-19); C1's 100 at age 3 (01-12) is outside:
    # C1 1/4 = 0.25, C2 3/4 = 0.75 (with the 100: 101/104)
    assert by_customer(shares) == pytest.approx({"C1": 0.25, "C2": 0.75})
    assert set(shares["window_start"]) == {pd.Timestamp("2026-01-19")}
    assert set(shares["fallback"]) == {"none"}


def test_history_of_a_customer_that_is_not_an_active_child_is_ignored(make_history, make_children, make_config):
    config = make_config({"a": {"window": 2, "method": "pooled"}})
    volumes = {"C1": {1: 1}, "C2": {1: 3}, "C9": {1: 96}}
    shares = compute_shares(
        make_history(history_rows(volumes)), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE
    )
    # C9 is not a child: parent volume 1 + 3 = 4 -> 0.25, 0.75
    assert by_customer(shares) == pytest.approx({"C1": 0.25, "C2": 0.75})
    assert by_customer(shares, "parent_volume") == pytest.approx({"C1": 4.0, "C2": 4.0})


# ------------------------------------------------------------------ lifecycle rules
# min_history_periods 3, 3-week horizon H1 = 02-02, H2 = 02-09, H3 = 02-16.
H1, H2, H3 = "2026-02-02", "2026-02-09", "2026-02-16"


def lifecycle_config(make_config, method="pooled", **lifecycle):
    return make_config(
        {"a": {"window": 4, "method": method}},
        calendar={"horizon": 3},
        lifecycle={"min_history_periods": 3} | lifecycle,
    )


def lifecycle_children(rows):
    """rows: (customer, own_periods, first, last, reference_customer, scale, initial_share) on P1/S1."""
    frame = pd.DataFrame(
        rows,
        columns=[
            "customer",
            "own_periods",
            "first_active_period",
            "last_active_period",
            "reference_customer",
            "scale",
            "initial_share",
        ],
    )
    frame.insert(0, "site", "S1")
    frame.insert(0, "product", "P1")
    frame["product_class"] = "a"
    frame["first_active_period"] = pd.to_datetime(frame["first_active_period"])
    frame["last_active_period"] = pd.to_datetime(frame["last_active_period"])
    return frame


def test_every_lifecycle_rule_on_one_parent(make_history, make_config):
    # established (>= 3 own periods), window 4 = ages 1-4:
    #   C1 3+3+3+3 = 12, C2 2+2+2+2 = 8, C6 5 x 4 = 20 (ends in H2), C7 1+2+3+4 = 10 (starts in H2)
    # new (< 3 own periods): C3 ages 2, 1: 9 + 9 with reference C1 and scale 0.5;
    #   C4 age 1: 4 with initial share 0.1; C5 ages 2, 1: 1 + 1 with neither
    volumes = {
        "C1": {4: 3, 3: 3, 2: 3, 1: 3}, "C2": {4: 2, 3: 2, 2: 2, 1: 2}, "C6": {4: 5, 3: 5, 2: 5, 1: 5},
        "C7": {4: 1, 3: 2, 2: 3, 1: 4}, "C3": {2: 9, 1: 9}, "C4": {1: 4}, "C5": {2: 1, 1: 1},
    }
    children = lifecycle_children(
        [
            ("C1", 4, H1, H3, None, None, None),
            ("C2", 4, H1, H3, None, None, None),
            ("C3", 2, H1, H3, "C1", 0.5, None),
            ("C4", 1, H1, H3, None, None, 0.1),
            ("C5", 2, H1, H3, None, None, None),
            ("C6", 4, H1, H2, None, None, None),
            ("C7", 4, H2, H3, None, None, None),
        ]
    )
    shares = ShareTable.validate(
        compute_shares(make_history(history_rows(volumes)), children, lifecycle_config(make_config), CYCLE)
    )
    # history shares over the established only, 12 + 8 + 20 + 10 = 50 (the new customers' 18 + 4 + 2 left out):
    #   C1 12/50 = 0.24, C2 8/50 = 0.16, C6 20/50 = 0.4, C7 10/50 = 0.2
    assert by_customer(shares, "history_share") == pytest.approx(
        {"C1": 0.24, "C2": 0.16, "C3": 0.0, "C4": 0.0, "C5": 0.0, "C6": 0.4, "C7": 0.2}
    )
    # C3 takes 0.5 x 0.24 = 0.12 from C1 (left with 0.12); C4's 0.1 scales the others by 0.9:
    #   C1 0.108, C2 0.144, C3 0.108, C4 0.1, C5 0, C6 0.36, C7 0.18 (sum 1)
    assert by_customer(shares) == pytest.approx(
        {"C1": 0.108, "C2": 0.144, "C3": 0.108, "C4": 0.1, "C5": 0.0, "C6": 0.36, "C7": 0.18}
    )
    assert by_customer(shares, "lifecycle_rule") == {
        "C1": "none", "C2": "none", "C3": "reference", "C4": "initial_share",
        "C5": "awaiting_history", "C6": "phase_out", "C7": "phase_in",
    }
    assert by_customer(shares, "parent_volume") == pytest.approx(dict.fromkeys(volumes, 50.0))
    # a new customer's own volume is still shown: C3 9 + 9 = 18
    assert by_customer(shares, "child_volume")["C3"] == 18.0
    row = shares.set_index("customer")
    assert row.loc["C3", "reference_customer"] == "C1" and row.loc["C3", "scale"] == 0.5
    assert row.loc["C4", "initial_share"] == 0.1 and pd.isna(row.loc["C4", "scale"])
    assert (
        row.loc["C3", "lifecycle_detail"]
        == "new customer (2 of 3 periods of own history): 0.5 x the share of reference C1, taken from it"
    )
    assert "no share until 3 periods" in row.loc["C5", "lifecycle_detail"]
    assert row.loc["C6", "lifecycle_detail"] == "share from history; active until 2026-02-09"
    assert row.loc["C7", "lifecycle_detail"] == "share from history; active from 2026-02-09"


def test_reference_scale_comes_from_config_when_the_span_has_none(make_history, make_config):
    volumes = {"C1": {4: 6, 3: 6, 2: 6, 1: 6}, "C2": {4: 2, 3: 2, 2: 2, 1: 2}}
    children = lifecycle_children(
        [("C1", 4, H1, H3, None, None, None), ("C2", 4, H1, H3, None, None, None), ("C3", 0, H1, H3, "C1", None, None)]
    )
    history = make_history(history_rows(volumes))
    default = compute_shares(history, children, lifecycle_config(make_config), CYCLE)
    # history C1 24/32 = 0.75, C2 0.25; default scale 0.5: C3 0.375, C1 0.375
    assert by_customer(default) == pytest.approx({"C1": 0.375, "C2": 0.25, "C3": 0.375})
    quarter = compute_shares(history, children, lifecycle_config(make_config, reference_scale=0.25), CYCLE)
    # scale 0.25: C3 0.75 x 0.25 = 0.1875, C1 0.75 - 0.1875 = 0.5625
    assert by_customer(quarter) == pytest.approx({"C1": 0.5625, "C2": 0.25, "C3": 0.1875})
    assert by_customer(quarter, "scale")["C3"] == 0.25


def test_reference_that_is_not_established_falls_back_to_initial_share_or_waits(make_history, make_config):
    volumes = {"C1": {4: 1, 3: 1, 2: 1, 1: 1}, "C2": {1: 5}}
    children = lifecycle_children(
        [
            ("C1", 4, H1, H3, None, None, None),
            ("C2", 1, H1, H3, None, None, None),  # new itself: cannot be a reference
            ("C3", 0, H1, H3, "C2", None, 0.2),  # reference new -> its initial share 0.2
            ("C4", 0, H1, H3, "C9", None, None),  # C9 is no child of P1/S1 -> waits
        ]
    )
    shares = compute_shares(make_history(history_rows(volumes)), children, lifecycle_config(make_config), CYCLE)
    # only C1 is established (history share 1); C3 0.2, C1 1 x 0.8 = 0.8; C2, C4 wait
    assert by_customer(shares) == pytest.approx({"C1": 0.8, "C2": 0.0, "C3": 0.2, "C4": 0.0})
    assert by_customer(shares, "lifecycle_rule") == {
        "C1": "none",
        "C2": "awaiting_history",
        "C3": "initial_share",
        "C4": "awaiting_history",
    }
    detail = by_customer(shares, "lifecycle_detail")
    assert "reference C2 is not an established customer" in detail["C3"]
    assert "reference C9 is not an established customer" in detail["C4"]
    assert pd.isna(by_customer(shares, "reference_customer")["C3"])


def test_new_customers_do_not_enter_an_even_fallback(make_history, make_config):
    config = make_config({"a": {"window": 2}}, calendar={"horizon": 3}, lifecycle={"min_history_periods": 3})
    volumes = {"C1": {4: 0, 3: 0, 2: 0, 1: 0}, "C2": {4: 0, 3: 0, 2: 0, 1: 0}, "C3": {1: 7}}
    children = lifecycle_children(
        [("C1", 4, H1, H3, None, None, None), ("C2", 4, H1, H3, None, None, None), ("C3", 1, H1, H3, None, None, None)]
    )
    shares = compute_shares(make_history(history_rows(volumes)), children, config, CYCLE)
    # the established C1, C2 have no volume in 2 weeks -> even split 1/2 each; C3's 7 does not count
    assert by_customer(shares) == pytest.approx({"C1": 0.5, "C2": 0.5, "C3": 0.0})
    assert set(shares["fallback"]) == {"even"}


@pytest.mark.parametrize("method", ["pooled", "mean_of_ratios"])
def test_shortage_periods_do_not_count_toward_shares(make_history, make_children, make_config, method):
    config = make_config({"a": {"window": 3, "method": method}})
    # ages 3, 2, 1: C1 1, 2, 6 and C2 3, 2, 2 (the TWO_CHILDREN case); age 1 is a shortage period,
    # recorded on C2's row only: the whole parent period leaves the window
    rows = [
        ("P1", "S1", c, AGE[a], q, "own", "P1", c, a == 1 and c == "C2")
        for c, v in TWO_CHILDREN.items()
        for a, q in v.items()
    ]
    shares = compute_shares(make_history(rows), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE)
    # ages 3 and 2 only: pooled C1 (1 + 2) / 8 = 0.375, C2 5 / 8 = 0.625;
    # mean of ratios C1 (1/4 + 2/4) / 2 = 0.375, C2 (3/4 + 2/4) / 2 = 0.625
    # (with age 1: pooled 0.5625 / 0.4375, mean of ratios 0.5 / 0.5)
    assert by_customer(shares) == pytest.approx({"C1": 0.375, "C2": 0.625})
    assert by_customer(shares, "parent_volume") == pytest.approx({"C1": 8.0, "C2": 8.0})


def test_filled_shortage_periods_count_like_any_other_period(make_history, make_children, make_config):
    # the same rows as above, but under `cleansing.shortages: fill_baseline` the cleansing stage has
    # already replaced the shortage values, so age 1 stays in the window:
    # pooled C1 (1 + 2 + 6) / 16 = 0.5625, C2 7 / 16 = 0.4375
    config = make_config({"a": {"window": 3, "method": "pooled"}}, cleansing={"shortages": "fill_baseline"})
    rows = [
        ("P1", "S1", c, AGE[a], q, "own", "P1", c, a == 1 and c == "C2")
        for c, v in TWO_CHILDREN.items()
        for a, q in v.items()
    ]
    shares = compute_shares(make_history(rows), make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]), config, CYCLE)
    assert by_customer(shares) == pytest.approx({"C1": 0.5625, "C2": 0.4375})
    assert by_customer(shares, "parent_volume") == pytest.approx({"C1": 16.0, "C2": 16.0})


def test_new_customers_are_listed_with_how_their_share_was_set(make_history, make_config):
    volumes = {"C1": {4: 3, 3: 3, 2: 3, 1: 3}, "C2": {2: 9, 1: 9}, "C4": {1: 4}}
    children = lifecycle_children(
        [
            ("C1", 4, H1, H3, None, None, None),
            ("C2", 2, H1, H3, "C1", None, None),
            ("C3", 0, H2, H3, None, None, 0.25),
            ("C4", 1, H1, H3, None, None, None),
        ]
    )
    shares = compute_shares(make_history(history_rows(volumes)), children, lifecycle_config(make_config), CYCLE)
    listed = new_customers(shares)
    # C1 is established; C2 reference (0.5 x 1 = 0.5), C3 initial share 0.25 from H2, C4 waits
    assert listed[["customer", "lifecycle_rule"]].values.tolist() == [
        ["C2", "reference"], ["C3", "initial_share"], ["C4", "awaiting_history"],
    ]
    # C2 takes 0.5 x C1's history share 1 = 0.5, then C3's 0.25 scales it by 0.75 -> 0.375
    assert listed["share"].tolist() == pytest.approx([0.375, 0.25, 0.0])
    waiting = find_new_customers_without_share(shares)
    assert waiting[["customer", "own_periods"]].values.tolist() == [["C4", 1]]
    assert "no share until 3 periods" in waiting.loc[0, "lifecycle_detail"]


def test_shortage_periods_flag_every_row_of_the_parent_period_in_any_row_order():
    # hand-worked: P1/S1 has a shortage recorded on C1's row of week 2, so C2's row of week 2 (same parent
    # and period) is left out too, week 1 of both is not; P2/S1 has none; P3/S1 has one in week 1.
    from pipelines.engines.share_rows import shortage_periods

    w1, w2 = pd.Timestamp("2026-01-05"), pd.Timestamp("2026-01-12")
    history = pd.DataFrame(
        {
            "product": ["P1", "P1", "P1", "P1", "P2", "P2", "P3"],
            "site": ["S1"] * 7,
            "customer": ["C1", "C1", "C2", "C2", "C1", "C1", "C1"],
            "period_start": [w1, w2, w1, w2, w1, w2, w1],
            "quantity": [1.0] * 7,
            "shortage": [False, True, False, False, False, False, True],
            "parent_id": np.array([0, 0, 0, 0, 1, 1, 2], dtype=np.int32),
        }
    )
    expected = [False, True, False, True, False, False, True]
    assert shortage_periods(history, True).tolist() == expected  # sorted by parent id: each parent's run
    order = [6, 3, 4, 0, 5, 2, 1]  # any other order: the same rows flagged
    shuffled = history.iloc[order].reset_index(drop=True)
    assert shortage_periods(shuffled, True).tolist() == [expected[i] for i in order]
    assert not shortage_periods(history, False).any()  # fill_baseline: nothing left out


def test_own_periods_count_a_period_held_twice_once_whatever_the_row_order():
    # hand-worked: C1 has week 1 twice (its own row and a successor's) and week 2: 2 periods; C2 week 2 alone:
    # 1; C3 has no history: 0. The history sorted by leaf id takes the runs' count, any other order the grid's.
    from pipelines.calendar import period_ordinal
    from pipelines.engines.children import own_periods
    from pipelines.engines.share_rows import share_rows
    from pipelines.keys import coded

    w1, w2, cycle = pd.Timestamp("2026-01-05"), pd.Timestamp("2026-01-12"), pd.Timestamp("2026-01-19")
    history = pd.DataFrame(
        {
            "product": ["P1"] * 4,
            "site": ["S1"] * 4,
            "customer": ["C1", "C1", "C1", "C2"],
            "period_start": [w1, w1, w2, w2],
            "quantity": [1.0, 2.0, 3.0, 4.0],
            "leaf_id": np.array([0, 0, 0, 1], dtype=np.int32),
            "parent_id": np.array([0, 0, 0, 0], dtype=np.int32),
        }
    )
    children = pd.DataFrame({"product": ["P1"] * 3, "site": ["S1"] * 3, "customer": ["C1", "C2", "C3"]})
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle]), "week")[0])
    for frame in (history, history.iloc[[3, 1, 2, 0]].reset_index(drop=True)):
        keys = coded(frame)
        rows = share_rows(frame, keys, "week", cycle_ord, False)
        assert own_periods(frame, children, "week", keys, rows).tolist() == [2, 1, 0]
