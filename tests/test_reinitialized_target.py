"""`reinitialized_target`: target = period share x parent baseline, per child and horizon period.

Cycle date 2026-02-02. Ages count back from it: age 1 = week 2026-01-26,
age 2 = 01-19, age 3 = 01-12, age 4 = 01-05, age 6 = 2025-12-22.
Horizon (3 weeks): H1 = 2026-02-02, H2 = 02-09, H3 = 02-16.
"""

from __future__ import annotations

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipelines.engines.children import active_children
from pipelines.engines.proofs import find_shares_not_summing_to_one
from pipelines.engines.shares import compute_shares
from pipelines.keys import LEAF
from pipelines.schemas import ReinitializedTarget
from pipelines.stages.reinitialized_target import parents_with_mix_change, reinitialize_target

CYCLE = pd.Timestamp("2026-02-02")
AGE = {1: "2026-01-26", 2: "2026-01-19", 3: "2026-01-12", 4: "2026-01-05", 6: "2025-12-22"}
HORIZON = ["2026-02-02", "2026-02-09", "2026-02-16"]
H1, H2, H3 = HORIZON


@pytest.fixture
def config(make_config):
    return make_config(calendar={"horizon": 3})


def per_customer(target, column="target", product=None):
    t = target if product is None else target[target["product"] == product]
    return t.groupby("customer")[column].agg(lambda s: sorted(set(s))).to_dict()


def by_period(target, column="share"):
    """{customer: [value in H1, H2, H3]}"""
    t = target.sort_values(["customer", "period_start"])
    return {c: g[column].tolist() for c, g in t.groupby("customer")}


def reasons(target):
    """[reason in H1, H2, H3] of a one-parent target (None = shares sum to 1)."""
    first = target.drop_duplicates("period_start").sort_values("period_start")
    return [None if pd.isna(r) else r for r in first["zero_reason"]]


def one_week_history(make_history):
    return make_history([("P1", "S1", "C1", AGE[1], 10)])


# ------------------------------------------------------------------ baseline


def test_target_is_share_times_parent_mean_over_the_window_used(make_history, make_share_table, config):
    history = make_history(
        [("P1", "S1", "C1", AGE[a], q) for a, q in [(4, 6), (3, 10), (2, 14), (1, 18)]]
        + [("P1", "S1", "C2", AGE[a], q) for a, q in [(4, 4), (3, 10), (2, 16), (1, 22)]]
    )
    shares = make_share_table([("P1", "S1", "C1", 0.2), ("P1", "S1", "C2", 0.8)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # parent per week 10, 20, 30, 40 -> volume 100 over 4 weeks -> baseline 25
    # C1: 0.2 x 25 = 5; C2: 0.8 x 25 = 20 (in every horizon week)
    assert per_customer(target, "parent_baseline") == {"C1": [25.0], "C2": [25.0]}
    assert per_customer(target) == {"C1": [pytest.approx(5.0)], "C2": [pytest.approx(20.0)]}
    assert target["zero_reason"].isna().all()


def test_baseline_divides_by_fewer_periods_when_parent_history_starts_inside_the_window(
    make_history, make_share_table, config
):
    history = make_history([("P1", "S1", "C1", AGE[2], 10), ("P1", "S1", "C2", AGE[1], 20)])
    shares = make_share_table([("P1", "S1", "C1", 0.5), ("P1", "S1", "C2", 0.5)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # history starts at age 2 inside the 4-week window -> 2 periods: (10 + 20) / 2 = 15
    # (not 30 / 4 = 7.5); target 0.5 x 15 = 7.5
    assert per_customer(target, "parent_baseline") == {"C1": [15.0], "C2": [15.0]}
    assert per_customer(target) == {"C1": [7.5], "C2": [7.5]}


def test_baseline_uses_the_full_window_when_history_is_older_than_it(make_history, make_share_table, config):
    history = make_history([("P1", "S1", "C1", AGE[6], 50), ("P1", "S1", "C1", AGE[2], 12)])
    shares = make_share_table([("P1", "S1", "C1", 1.0)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # history starts at age 6, before the 4-week window: the 50 is outside it,
    # baseline 12 / 4 = 3
    assert per_customer(target, "parent_baseline") == {"C1": [3.0]}


def test_baseline_leaves_out_shortage_periods_and_divides_by_the_others(make_history, make_share_table, config):
    # parent P1/S1 per week: age 4: 10, age 3: 20 (shortage), age 2: 30, age 1: 40;
    # the shortage is flagged on C1's row only, yet it is the parent's period
    history = make_history(
        [("P1", "S1", "C1", AGE[a], q, "own", "P1", "C1", a == 3) for a, q in [(4, 6), (3, 4), (2, 14), (1, 18)]]
        + [("P1", "S1", "C2", AGE[a], q) for a, q in [(4, 4), (3, 16), (2, 16), (1, 22)]]
    )
    shares = make_share_table([("P1", "S1", "C1", 0.5), ("P1", "S1", "C2", 0.5)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # without age 3: (10 + 30 + 40) / 3 non-shortage periods = 80 / 3 = 26.667
    # (counting it: 100 / 4 = 25; dropping the volume only: 80 / 4 = 20)
    assert per_customer(target, "parent_baseline") == {"C1": [pytest.approx(80 / 3)], "C2": [pytest.approx(80 / 3)]}


def test_even_fallback_parent_has_baseline_zero(make_history, make_share_table, config):
    history = make_history([("P1", "S1", "C1", AGE[6], 50)])
    shares = make_share_table([("P1", "S1", "C1", 0.5, 0), ("P1", "S1", "C2", 0.5, 0)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # window_used 0: no window had volume -> baseline 0, target 0.5 x 0 = 0
    assert per_customer(target, "parent_baseline") == {"C1": [0.0], "C2": [0.0]}
    assert per_customer(target) == {"C1": [0.0], "C2": [0.0]}
    assert per_customer(target, "share") == {"C1": [0.5], "C2": [0.5]}


def test_each_parent_uses_its_own_window_used(make_history, make_share_table, config):
    history = make_history(
        [("P1", "S1", "C1", AGE[a], q) for a, q in [(4, 8), (3, 8), (2, 2), (1, 4)]]
        + [("P2", "S1", "C1", AGE[a], q) for a, q in [(4, 8), (3, 8), (2, 2), (1, 4)]]
    )
    shares = make_share_table([("P1", "S1", "C1", 1.0, 2), ("P2", "S1", "C1", 1.0, 4)])
    target = reinitialize_target(shares, history, config, CYCLE)
    # P1 window 2: (2 + 4) / 2 = 3; P2 window 4: (8 + 8 + 2 + 4) / 4 = 5.5
    assert per_customer(target, product="P1") == {"C1": [3.0]}
    assert per_customer(target, product="P2") == {"C1": [5.5]}


def test_one_row_per_child_and_horizon_period(make_history, make_share_table, config):
    history = make_history([("P1", "S1", "C1", AGE[1], 4)])
    shares = make_share_table([("P1", "S1", "C1", 0.25), ("P1", "S1", "C2", 0.75)])
    target = ReinitializedTarget.validate(reinitialize_target(shares, history, config, CYCLE))
    # 2 children x horizon 3 = 6 rows, each child on 02-02, 02-09, 02-16
    assert len(target) == 6
    assert target[["customer", "period_start"]].values.tolist() == [
        [c, pd.Timestamp(d)] for c in ("C1", "C2") for d in HORIZON
    ]
    assert set(target["cycle_date"]) == {CYCLE}
    # history starts at age 1 -> baseline 4 / 1 = 4; targets 0.25 x 4 = 1, 0.75 x 4 = 3
    assert target["target"].tolist() == [1.0, 1.0, 1.0, 3.0, 3.0, 3.0]


# ------------------------------------------------------------------ per-period shares


def test_customer_ending_mid_horizon_keeps_its_share_until_then_and_the_others_renormalise(
    make_history, make_share_table, config
):
    shares = make_share_table(
        [
            ("P1", "S1", "C1", 0.2),
            ("P1", "S1", "C2", 0.5),
            ("P1", "S1", "C3", 0.3, 4, {"rule": "phase_out", "last": H2}),
        ]
    )
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE)
    # H1, H2: base shares 0.2, 0.5, 0.3; H3 without C3: 0.2 / 0.7 = 0.285714, 0.5 / 0.7 = 0.714286, 0
    assert by_period(target) == {
        "C1": pytest.approx([0.2, 0.2, 0.2 / 0.7]),
        "C2": pytest.approx([0.5, 0.5, 0.5 / 0.7]),
        "C3": pytest.approx([0.3, 0.3, 0.0]),
    }
    # baseline 10 / 1 = 10: targets follow the shares and still sum to 10 in H3
    assert target.groupby("period_start")["target"].sum().tolist() == pytest.approx([10.0, 10.0, 10.0])
    assert reasons(target) == [None, None, None]


def test_initial_share_customer_phases_in_and_scales_the_others(make_history, make_share_table, config):
    # history shares 0.6, 0.4; C3 new from H2 with initial share 0.2
    # base: C1 0.6 x 0.8 = 0.48, C2 0.4 x 0.8 = 0.32, C3 0.2
    shares = make_share_table(
        [
            ("P1", "S1", "C1", 0.48, 4, {"history_share": 0.6}),
            ("P1", "S1", "C2", 0.32, 4, {"history_share": 0.4}),
            (
                "P1",
                "S1",
                "C3",
                0.2,
                4,
                {"rule": "initial_share", "history_share": 0.0, "initial_share": 0.2, "first": H2, "own_periods": 0},
            ),
        ]
    )
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE)
    # H1 without C3: 0.48 / 0.8 = 0.6, 0.32 / 0.8 = 0.4 (back to history); H2, H3: 0.48, 0.32, 0.2
    assert by_period(target) == {
        "C1": pytest.approx([0.6, 0.48, 0.48]),
        "C2": pytest.approx([0.4, 0.32, 0.32]),
        "C3": pytest.approx([0.0, 0.2, 0.2]),
    }


def test_reference_keeps_its_whole_share_until_the_new_customer_starts(make_history, make_share_table, config):
    # C1 (history 0.6) is C3's reference, scale 0.5, C3 active from H2: base C1 0.3, C2 0.4, C3 0.3
    shares = make_share_table(
        [
            ("P1", "S1", "C1", 0.3, 4, {"history_share": 0.6}),
            ("P1", "S1", "C2", 0.4, 4, {"history_share": 0.4}),
            (
                "P1",
                "S1",
                "C3",
                0.3,
                4,
                {
                    "rule": "reference",
                    "history_share": 0.0,
                    "reference_customer": "C1",
                    "scale": 0.5,
                    "first": H2,
                    "own_periods": 0,
                },
            ),
        ]
    )
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE)
    # H1: C1 0.6, C2 0.4 (not 0.3 / 0.7 = 0.43 and 0.4 / 0.7 = 0.57: nothing is taken yet)
    # H2, H3: C3 takes 0.5 x 0.6 = 0.3 from C1 -> 0.3, 0.4, 0.3
    assert by_period(target) == {
        "C1": pytest.approx([0.6, 0.3, 0.3]),
        "C2": pytest.approx([0.4, 0.4, 0.4]),
        "C3": pytest.approx([0.0, 0.3, 0.3]),
    }


def test_like_for_like_replacement_takes_the_share_of_a_reference_that_ends(make_history, make_share_table, config):
    # C1 (0.6) ends after H1; C3 replaces it from H2 with scale 1: base C1 0, C2 0.4, C3 0.6
    shares = make_share_table(
        [
            ("P1", "S1", "C1", 0.0, 4, {"rule": "phase_out", "history_share": 0.6, "last": H1}),
            ("P1", "S1", "C2", 0.4, 4, {"history_share": 0.4}),
            (
                "P1",
                "S1",
                "C3",
                0.6,
                4,
                {
                    "rule": "reference",
                    "history_share": 0.0,
                    "reference_customer": "C1",
                    "scale": 1.0,
                    "first": H2,
                    "own_periods": 0,
                },
            ),
        ]
    )
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE)
    # H1: C1 0.6, C2 0.4; H2, H3: C3 1 x 0.6 = 0.6 (C1 inactive, nothing left to take), C2 0.4
    assert by_period(target) == {
        "C1": pytest.approx([0.6, 0.0, 0.0]),
        "C2": pytest.approx([0.4, 0.4, 0.4]),
        "C3": pytest.approx([0.0, 0.6, 0.6]),
    }


def test_new_customers_asking_more_than_the_reference_has_share_it(make_history, make_share_table, config):
    # reference C1 history 0.5; C3 asks 0.8 of it, C4 0.6 -> 1.4 > 1, cut to 0.8 / 1.4 and 0.6 / 1.4
    new = {"rule": "reference", "history_share": 0.0, "reference_customer": "C1", "own_periods": 0}
    shares = make_share_table(
        [
            ("P1", "S1", "C1", 0.0, 4, {"history_share": 0.5}),
            ("P1", "S1", "C2", 0.5, 4, {"history_share": 0.5}),
            ("P1", "S1", "C3", 0.5 * 0.8 / 1.4, 4, new | {"scale": 0.8}),
            ("P1", "S1", "C4", 0.5 * 0.6 / 1.4, 4, new | {"scale": 0.6, "first": H3}),
        ]
    )
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE)
    # H1, H2 (C4 not yet active): C3 takes 0.8 x 0.5 = 0.4 -> C1 0.1, C2 0.5, C3 0.4
    # H3: C3 0.5 x 0.8 / 1.4 = 0.285714, C4 0.5 x 0.6 / 1.4 = 0.214286, C1 0, C2 0.5
    assert by_period(target) == {
        "C1": pytest.approx([0.1, 0.1, 0.0], abs=1e-12),
        "C2": pytest.approx([0.5, 0.5, 0.5]),
        "C3": pytest.approx([0.4, 0.4, 0.4 / 1.4]),
        "C4": pytest.approx([0.0, 0.0, 0.3 / 1.4]),
    }


def test_initial_shares_above_one_are_renormalised_and_leave_nothing_to_the_others(
    make_history, make_share_table, config
):
    new = {"rule": "initial_share", "history_share": 0.0, "own_periods": 0}
    shares = make_share_table(
        [
            ("P1", "S1", "C1", 0.0, 4, {"history_share": 1.0}),
            ("P1", "S1", "C2", 0.7 / 1.3, 4, new | {"initial_share": 0.7}),
            ("P1", "S1", "C3", 0.6 / 1.3, 4, new | {"initial_share": 0.6, "first": H2}),
        ]
    )
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE)
    # H1: C2 0.7, C1 1 x (1 - 0.7) = 0.3; H2, H3: 0.7 + 0.6 = 1.3 > 1 -> C2 0.7 / 1.3 = 0.538462,
    # C3 0.6 / 1.3 = 0.461538, C1 0
    assert by_period(target) == {
        "C1": pytest.approx([0.3, 0.0, 0.0]),
        "C2": pytest.approx([0.7, 0.7 / 1.3, 0.7 / 1.3]),
        "C3": pytest.approx([0.0, 0.6 / 1.3, 0.6 / 1.3]),
    }


# ------------------------------------------------------------------ all-zero periods and their reasons


def test_product_ending_mid_horizon_has_zero_shares_with_reason_after_its_end(
    make_history, make_share_table, make_products, config
):
    products = make_products([("P1", "a", None, "2026-02-11")])  # ends Wed 02-11 -> last week H2
    shares = make_share_table([("P1", "S1", "C1", 0.25, 4, {"last": H2}), ("P1", "S1", "C2", 0.75, 4, {"last": H2})])
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE, products)
    # H1, H2: 0.25, 0.75; H3: the product is over -> 0 and 0, reason product_not_active
    assert by_period(target) == {"C1": [0.25, 0.25, 0.0], "C2": [0.75, 0.75, 0.0]}
    assert reasons(target) == [None, None, "product_not_active"]
    # baseline 10 / 1 = 10 -> targets 2.5, 7.5 then 0
    assert by_period(target, "target") == {"C1": [2.5, 2.5, 0.0], "C2": [7.5, 7.5, 0.0]}
    # without the product master the same period reads as no active child
    assert reasons(reinitialize_target(shares, one_week_history(make_history), config, CYCLE)) == [
        None,
        None,
        "no_active_child",
    ]


def test_product_launched_mid_horizon_has_shares_only_from_its_start(
    make_history, make_share_table, make_products, config
):
    products = make_products([("P1", "a", "2026-02-10")])  # from Tue 02-10 -> first week H2
    shares = make_share_table([("P1", "S1", "C1", 0.5, 4, {"first": H2}), ("P1", "S1", "C2", 0.5, 4, {"first": H2})])
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE, products)
    # H1: before the product -> 0, 0 with reason; H2, H3: 0.5, 0.5
    assert by_period(target) == {"C1": [0.0, 0.5, 0.5], "C2": [0.0, 0.5, 0.5]}
    assert reasons(target) == ["product_not_active", None, None]


def test_zero_reasons_for_awaiting_history_and_no_share_among_active(make_history, make_share_table, config):
    shares = make_share_table(
        [
            # P1: C1 carries everything until H1; then only C2, whose history share is 0
            ("P1", "S1", "C1", 1.0, 4, {"rule": "phase_out", "last": H1}),
            ("P1", "S1", "C2", 0.0),
            # P2: its only customer is new without reference or initial share
            ("P2", "S1", "C3", 0.0, 4, {"rule": "awaiting_history", "own_periods": 2}),
        ]
    )
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE)
    # P1: H1 sums to 1 + 0 = 1; H2, H3 all 0 (C2 holds no weight)
    assert reasons(target[target["product"] == "P1"]) == [None, "no_share_among_active", "no_share_among_active"]
    assert reasons(target[target["product"] == "P2"]) == ["awaiting_history"] * 3
    assert target.loc[target["product"] == "P2", "share"].tolist() == [0.0, 0.0, 0.0]


def test_parents_with_mix_change_lists_when_and_who(make_history, make_share_table, config):
    shares = make_share_table(
        [
            ("P1", "S1", "C1", 0.2),
            ("P1", "S1", "C2", 0.5),
            ("P1", "S1", "C3", 0.3, 4, {"rule": "phase_out", "last": H2}),
            ("P2", "S1", "C1", 1.0),  # no change
        ]
    )
    target = reinitialize_target(shares, one_week_history(make_history), config, CYCLE)
    mix = parents_with_mix_change(target, shares)
    # only P1 changes, once, in H3 when C3 leaves
    assert mix[
        ["product", "first_change", "periods_with_change", "phasing_in", "phasing_out", "zero_periods"]
    ].values.tolist() == [["P1", pd.Timestamp(H3), 1, "", "C3", 0]]


# ------------------------------------------------------------------ property (hypothesis)
# Random spans, products, history and new-customer inputs on up to 3 parents, through the real
# stages (active_children -> compute_shares -> reinitialize_target): per parent and period the
# shares sum to 1 or are all 0 with a recorded reason, and no inactive or waiting child holds any.

WEEK = pd.Timedelta(days=7)
PROPERTY_HORIZON = 5


@st.composite
def lifecycle_inputs(draw):
    products, spans, history = [], [], []
    for p in range(draw(st.integers(1, 3))):
        product = f"P{p + 1}"
        start = draw(st.one_of(st.none(), st.integers(-3, PROPERTY_HORIZON)))
        end = draw(st.one_of(st.none(), st.integers(max(start or -3, -1), PROPERTY_HORIZON + 1)))
        products.append((product, "a", None if start is None else CYCLE + start * WEEK,
                         None if end is None else CYCLE + end * WEEK + pd.Timedelta(days=6)))
        customers = [f"C{c + 1}" for c in range(draw(st.integers(1, 5)))]
        for c in customers:
            first = draw(st.one_of(st.none(), st.integers(-8, PROPERTY_HORIZON)))
            last = draw(
                st.one_of(st.none(), st.integers(max(first if first is not None else -2, -2), PROPERTY_HORIZON + 1))
            )
            others = [o for o in customers if o != c]
            reference = draw(st.one_of(st.none(), st.sampled_from(others))) if others else None
            scale = draw(st.one_of(st.none(), st.floats(0.05, 1.0)))
            initial = draw(st.one_of(st.none(), st.floats(0.0, 0.95)))
            spans.append(
                (
                    product,
                    "S1",
                    c,
                    None if first is None else CYCLE + first * WEEK,
                    None if last is None else CYCLE + last * WEEK + pd.Timedelta(days=6),
                    reference,
                    scale,
                    initial,
                )
            )
            for age in range(1, draw(st.integers(0, 6)) + 1):
                history.append((product, "S1", c, CYCLE - age * WEEK, draw(st.integers(0, 9)),
                                "own", product, c, draw(st.booleans()) and draw(st.booleans())))
    method = draw(st.sampled_from(["pooled", "mean_of_ratios"]))
    return products, spans, history, method


def _frame(rows, columns, dates=()):
    """A stage input built directly (the pandera builders cost ~0.1 s per frame, too slow for many examples)."""
    frame = pd.DataFrame(rows, columns=columns).astype({c: object for c in columns if c not in dates})
    for c in dates:
        frame[c] = pd.to_datetime(frame[c])
    return frame


# the config fixture is a pure builder function, so sharing it across examples is safe
@settings(
    max_examples=100, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture]
)
@given(lifecycle_inputs())
def test_property_shares_sum_to_one_per_parent_and_period_or_are_all_zero_with_a_reason(make_config, case):
    product_rows, span_rows, history_rows, method = case
    config = make_config(
        {"a": {"window": 4, "method": method, "fallback_windows": [6]}},
        calendar={"horizon": PROPERTY_HORIZON},
        lifecycle={"min_history_periods": 3},
    )
    products = _frame(
        [r + (None,) for r in product_rows],
        ["product", "product_class", "active_from", "active_to", "successor"],
        ("active_from", "active_to"),
    )
    spans = _frame(
        span_rows,
        ["product", "site", "customer", "active_from", "active_to", "reference_customer", "scale", "initial_share"],
        ("active_from", "active_to"),
    )
    spans[["scale", "initial_share"]] = spans[["scale", "initial_share"]].astype(float)
    history = _frame(
        history_rows,
        [
            "product",
            "site",
            "customer",
            "period_start",
            "quantity",
            "origin",
            "source_product",
            "source_customer",
            "shortage",
        ],
        ("period_start",),
    )
    history = history.astype({"quantity": float, "shortage": bool})
    children = active_children(spans, products, history, config, CYCLE)
    shares = compute_shares(history, children, config, CYCLE)
    target = reinitialize_target(shares, history, config, CYCLE, products)

    assert find_shares_not_summing_to_one(target).empty
    assert len(target) == len(shares) * PROPERTY_HORIZON
    assert target["share"].between(0, 1).all() and shares["share"].between(0, 1).all()
    merged = target.merge(shares[LEAF + ["first_active_period", "last_active_period", "lifecycle_rule"]], on=LEAF)
    inactive = (merged["period_start"] < merged["first_active_period"]) | (
        merged["period_start"] > merged["last_active_period"]
    )
    assert (merged.loc[inactive | (merged["lifecycle_rule"] == "awaiting_history"), "share"] == 0).all()
