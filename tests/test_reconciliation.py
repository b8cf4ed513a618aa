"""`reconciliation`: the leaves against the parent forecast the strategy produced, and each `find_*` rule.

Tolerances: children sum to the parent when |difference| <= 1e-9 x max(|expected|, 1), expected being the
strategy's parent forecast (0 in a period the lifecycle set to 0); shares sum to 1 within 1e-9, per parent
and period (or are all 0 with a recorded reason).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.engines.compensated import first_appearance_sums
from pipelines.engines.proofs import (
    find_active_parents_without_children,
    find_negative,
    find_shares_not_summing_to_one,
    find_volume_after_phase_out,
    find_volume_outside_active_span,
)
from pipelines.schemas_forecast import ParentForecast, Reconciliation, StatisticalForecast
from pipelines.stages.reconciliation import find_incoherent, reconcile

CYCLE = pd.Timestamp("2026-02-02")
H1, H2, H3 = pd.Timestamp("2026-02-02"), pd.Timestamp("2026-02-09"), pd.Timestamp("2026-02-16")


def parents(rows):
    """rows: (product, site, period_start, forecast[, strategy_forecast[, zero_reason]]); the strategy's value
    defaults to the forecast, the reason to blank."""
    full = [tuple(r) + (r[3], None)[len(r) - 4:] for r in rows]
    frame = pd.DataFrame(
        full, columns=["product", "site", "period_start", "forecast", "strategy_forecast", "zero_reason"]
    )
    frame.insert(0, "product_class", "a")
    frame.insert(0, "cycle_date", CYCLE)
    frame["model"] = "ses"
    frame["demand_class"] = "smooth"
    frame["model_grain"] = "parent"
    frame["zero_reason"] = frame["zero_reason"].astype(object)
    return ParentForecast.validate(frame)


def leaves(rows):
    """rows: (product, site, customer, period_start, forecast)."""
    frame = pd.DataFrame(rows, columns=["product", "site", "customer", "period_start", "forecast"])
    frame["cycle_date"] = CYCLE
    frame["product_class"] = "a"
    frame["parent_forecast"] = 0.0
    frame["basis"] = "reinitialized_target"
    return StatisticalForecast.validate(frame)


def share_rows(rows):
    """rows: (product, site, customer, period_start, share[, zero_reason]) - the columns the share check reads."""
    full = [tuple(r) + (None,) * (6 - len(r)) for r in rows]
    frame = pd.DataFrame(full, columns=["product", "site", "customer", "period_start", "share", "zero_reason"])
    frame["zero_reason"] = frame["zero_reason"].astype(object)
    return frame


def keyed(frame, *cols):
    return [tuple(r) for r in frame[list(cols)].itertuples(index=False)]


# ------------------------------------------------------------------ reconcile


def test_reconcile_sums_children_and_measures_the_difference():
    parent = parents([("P1", "S1", H1, 10.0), ("P1", "S1", H2, 10.0), ("P2", "S1", H1, 0.5), ("P3", "S1", H1, 2.0)])
    leaf = leaves(
        [
            ("P1", "S1", "C1", H1, 4.0), ("P1", "S1", "C2", H1, 6.0),
            ("P1", "S1", "C1", H2, 4.0), ("P1", "S1", "C2", H2, 5.0),
            ("P2", "S1", "C1", H1, 0.2), ("P2", "S1", "C2", H1, 0.2),
        ]
    )
    rc = Reconciliation.validate(reconcile(parent, leaf))
    got = {(p, d): (s, n, diff, rel) for p, d, s, n, diff, rel in keyed(
        rc, "product", "period_start", "children_sum", "children", "difference", "relative_difference")}
    assert rc["expected"].tolist() == rc["strategy_forecast"].tolist()  # no period set to 0 here
    # P1 wk1: 4 + 6 = 10, diff 0; wk2: 4 + 5 = 9, diff -1, rel 1/10 = 0.1
    assert got[("P1", H1)] == pytest.approx((10.0, 2, 0.0, 0.0))
    assert got[("P1", H2)] == pytest.approx((9.0, 2, -1.0, 0.1))
    # P2: 0.2 + 0.2 = 0.4, diff -0.1, rel 0.1 / max(0.5, 1) = 0.1 (floor of one unit)
    assert got[("P2", H1)] == pytest.approx((0.4, 2, -0.1, 0.1))
    # P3 has no child: sum 0, 0 children, diff -2, rel 2 / 2 = 1
    assert got[("P3", H1)] == pytest.approx((0.0, 0, -2.0, 1.0))


# ------------------------------------------------------------------ find_incoherent


def _rc_for(parent_value, children_values):
    parent = parents([("P1", "S1", H1, parent_value)])
    leaf = leaves([("P1", "S1", f"C{i + 1}", H1, v) for i, v in enumerate(children_values)])
    return reconcile(parent, leaf)


def test_coherent_parents_are_not_flagged():
    rc = reconcile(parents([("P1", "S1", H1, 10.0), ("P1", "S1", H2, 0.0)]), leaves([
        ("P1", "S1", "C1", H1, 2.5), ("P1", "S1", "C2", H1, 7.5), ("P1", "S1", "C1", H2, 0.0)]))
    # 2.5 + 7.5 = 10; 0 = 0
    assert find_incoherent(rc).empty


def test_relative_difference_of_1e_10_passes():
    # parent 1000, children 600 + (400 + 1e-7): difference 1e-7, relative 1e-7 / 1000 = 1e-10 <= 1e-9
    rc = _rc_for(1000.0, [600.0, 400.0 + 1e-7])
    assert rc["relative_difference"].iloc[0] == pytest.approx(1e-10, rel=1e-3)
    assert find_incoherent(rc).empty


def test_relative_difference_of_1e_8_fails():
    # parent 1000, children 600 + (400 + 1e-5): difference 1e-5, relative 1e-5 / 1000 = 1e-8 > 1e-9
    rc = _rc_for(1000.0, [600.0, 400.0 + 1e-5])
    bad = find_incoherent(rc)
    assert keyed(bad, "product", "period_start") == [("P1", H1)]
    assert bad["relative_difference"].iloc[0] == pytest.approx(1e-8, rel=1e-3)


def test_zero_parent_is_judged_on_an_absolute_scale():
    # parent 0: relative = |diff| / max(0, 1) = |diff|; 5e-10 passes, 1e-8 fails
    assert find_incoherent(_rc_for(0.0, [5e-10])).empty
    assert len(find_incoherent(_rc_for(0.0, [1e-8]))) == 1


def test_only_the_incoherent_period_is_returned():
    rc = reconcile(
        parents([("P1", "S1", H1, 10.0), ("P1", "S1", H2, 10.0), ("P2", "S1", H1, 4.0)]),
        leaves([("P1", "S1", "C1", H1, 10.0), ("P1", "S1", "C1", H2, 9.0), ("P2", "S1", "C1", H1, 4.0)]),
    )
    # only P1 week 2: 9 vs 10
    assert keyed(find_incoherent(rc), "product", "period_start", "difference") == [("P1", H2, -1.0)]


# ------------------------------------------------------------------ shares


def test_shares_summing_to_one_are_not_flagged():
    # 0.25 + 0.75 = 1; 1/3 x 3 = 1 within rounding; 1 + 1e-10 is inside 1e-9
    shares = share_rows(
        [("P1", "S1", "C1", H1, 0.25), ("P1", "S1", "C2", H1, 0.75)]
        + [("P2", "S1", c, H1, 1 / 3) for c in ("C1", "C2", "C3")]
        + [("P3", "S1", "C1", H1, 0.5), ("P3", "S1", "C2", H1, 0.5 + 1e-10)]
    )
    assert find_shares_not_summing_to_one(shares).empty


def test_shares_are_judged_per_parent_and_period():
    shares = share_rows(
        # P1: H1 0.25 + 0.75 = 1; H2 C2 has left and C1 was renormalised to 1 -> fine
        [
            ("P1", "S1", "C1", H1, 0.25),
            ("P1", "S1", "C2", H1, 0.75),
            ("P1", "S1", "C1", H2, 1.0),
            ("P1", "S1", "C2", H2, 0.0),
        ]
        # P2: H1 fine; H2 C2 left but C1 kept its 0.5 -> 0.5, not renormalised
        + [
            ("P2", "S1", "C1", H1, 0.5),
            ("P2", "S1", "C2", H1, 0.5),
            ("P2", "S1", "C1", H2, 0.5),
            ("P2", "S1", "C2", H2, 0.0),
        ]
        # P3: 1 + 1e-8, off by more than 1e-9
        + [("P3", "S1", "C1", H1, 0.5), ("P3", "S1", "C2", H1, 0.5 + 1e-8)]
    )
    bad = find_shares_not_summing_to_one(shares)
    assert keyed(bad, "product", "period_start", "children") == [("P2", H2, 2), ("P3", H1, 2)]
    assert bad["share_sum"].tolist() == pytest.approx([0.5, 1.0 + 1e-8], abs=1e-12)


def test_all_zero_shares_pass_only_with_a_reason_on_every_row():
    shares = share_rows(
        # P1 H1: all 0, reason on both rows -> fine
        [("P1", "S1", c, H1, 0.0, "no_active_child") for c in ("C1", "C2")]
        # P2 H1: all 0 without a reason -> flagged
        + [("P2", "S1", c, H1, 0.0) for c in ("C1", "C2")]
        # P3 H1: all 0, reason on one row only -> flagged
        + [("P3", "S1", "C1", H1, 0.0, "awaiting_history"), ("P3", "S1", "C2", H1, 0.0)]
        # P4 H1: sums to 1 but carries a reason -> flagged (a reason means all zero)
        + [("P4", "S1", "C1", H1, 1.0, "no_active_child")]
    )
    bad = find_shares_not_summing_to_one(shares)
    assert keyed(bad, "product", "share_sum", "with_reason") == [("P2", 0.0, 0), ("P3", 0.0, 1), ("P4", 1.0, 1)]


# ------------------------------------------------------------------ phase-out


def test_volume_after_the_span_end_is_returned(make_spans):
    spans = make_spans(
        [("P1", "S1", "C1", None, "2026-02-08"), ("P1", "S1", "C2"), ("P1", "S1", "C3", None, "2026-02-11")]
    )
    leaf = leaves(
        [
            ("P1", "S1", "C1", H1, 2.0),  # in the span's last week
            ("P1", "S1", "C1", H2, 3.0),  # after it, with volume -> flagged
            ("P1", "S1", "C1", H3, 0.0),  # after it, but zero
            ("P1", "S1", "C2", H3, 5.0),  # open span
            ("P1", "S1", "C3", H2, 1.0),  # span ends Wed 02-11, inside week 02-09
        ]
    )
    bad = find_volume_after_phase_out(leaf, spans, "week")
    # C1 ends Sun 2026-02-08 -> last week 02-02; only week 02-09 with 3.0 breaks the rule
    assert keyed(bad, "customer", "period_start", "forecast") == [("C1", H2, 3.0)]
    assert bad["active_to"].tolist() == [pd.Timestamp("2026-02-08")]


def test_no_volume_after_phase_out_when_spans_are_respected(make_spans):
    spans = make_spans([("P1", "S1", "C1", None, "2026-02-08"), ("P1", "S1", "C2")])
    leaf = leaves([("P1", "S1", "C1", H1, 2.0), ("P1", "S1", "C1", H2, 0.0), ("P1", "S1", "C2", H2, 5.0)])
    assert find_volume_after_phase_out(leaf, spans, "week").empty


def test_volume_before_the_span_start_or_outside_the_product_span_is_returned(make_spans, make_products):
    products = make_products([("P1", "a"), ("P2", "a", None, "2026-02-08")])  # P2 ends Sun 02-08 -> last week H1
    spans = make_spans(
        [("P1", "S1", "C1", "2026-02-11"), ("P1", "S1", "C2"), ("P2", "S1", "C1")]
    )  # C1 on P1 from week H2
    leaf = leaves(
        [
            ("P1", "S1", "C1", H1, 2.0),  # before its span starts -> flagged
            ("P1", "S1", "C1", H2, 3.0),  # span started Wed 02-11, inside week H2
            ("P1", "S1", "C2", H1, 0.0),
            ("P2", "S1", "C1", H1, 1.0),  # last product week
            ("P2", "S1", "C1", H2, 4.0),  # product over -> flagged
            ("P2", "S1", "C1", H3, 0.0),  # product over, but zero
        ]
    )
    parent = parents([("P1", "S1", H1, 2.0), ("P2", "S1", H1, 1.0), ("P2", "S1", H2, 4.0), ("P2", "S1", H3, 0.0)])
    bad = find_volume_outside_active_span(parent, leaf, spans, products, "week")
    assert keyed(bad, "grain", "product", "period_start", "forecast", "why") == [
        ("parent", "P2", H2, 4.0, "product not active"),
        ("leaf", "P1", H1, 2.0, "customer span not started"),
        ("leaf", "P2", H2, 4.0, "product not active"),
    ]


def test_no_volume_outside_active_span_when_spans_are_respected(make_spans, make_products):
    products = make_products([("P1", "a", "2026-02-09")])
    spans = make_spans([("P1", "S1", "C1", "2026-02-09")])
    leaf = leaves([("P1", "S1", "C1", H1, 0.0), ("P1", "S1", "C1", H2, 5.0)])
    parent = parents([("P1", "S1", H1, 0.0), ("P1", "S1", H2, 5.0)])
    assert find_volume_outside_active_span(parent, leaf, spans, products, "week").empty


# ------------------------------------------------------------------ negative / childless


def test_negative_rows_are_returned():
    leaf = leaves([("P1", "S1", "C1", H1, 2.0), ("P1", "S1", "C2", H1, -0.5), ("P1", "S1", "C3", H1, 0.0)])
    # only -0.5 < 0; zero is not negative
    assert keyed(find_negative(leaf), "customer", "forecast") == [("C2", -0.5)]
    assert find_negative(leaves([("P1", "S1", "C1", H1, 0.0)])).empty


# ------------------------------------------------------------------ against the strategy's parent


def test_leaves_are_judged_against_the_strategys_parent_not_against_their_own_sum():
    # P1 H1: the model said 12 (strategy_forecast); a parent re-summed from leaves 4 + 5 = 9 would agree with
    # itself. The leaves must sum to 12: 9 is 3 short (relative 3/12 = 0.25), and the final 9 differs from 12
    parent = parents([("P1", "S1", H1, 9.0, 12.0), ("P1", "S1", H2, 10.0, 10.0)])
    leaf = leaves([("P1", "S1", "C1", H1, 4.0), ("P1", "S1", "C2", H1, 5.0),
                   ("P1", "S1", "C1", H2, 4.0), ("P1", "S1", "C2", H2, 6.0)])
    bad = find_incoherent(reconcile(parent, leaf))
    assert keyed(bad, "product", "period_start", "difference", "why") == [
        ("P1", H1, -3.0, "leaves do not sum to the strategy's parent forecast")
    ]
    assert bad["relative_difference"].iloc[0] == pytest.approx(0.25)
    # leaves right, final parent wrong: 4 + 8 = 12 = strategy, but the final forecast says 9
    parent = parents([("P1", "S1", H1, 9.0, 12.0)])
    leaf = leaves([("P1", "S1", "C1", H1, 4.0), ("P1", "S1", "C2", H1, 8.0)])
    assert keyed(find_incoherent(reconcile(parent, leaf)), "product", "why") == [
        ("P1", "parent forecast differs from the strategy's (or is not 0 where the lifecycle set it to 0)")
    ]


def test_periods_set_to_zero_by_the_lifecycle_are_left_out_of_the_comparison_and_must_carry_nothing():
    # H2: the product ended; the model said 12 but the lifecycle set the period to 0 with its reason. It is not
    # compared with 12 (expected 0), and passes with leaves 0 + 0; H3 the same, but one leaf kept 1.5
    parent = parents([
        ("P1", "S1", H1, 12.0, 12.0),
        ("P1", "S1", H2, 0.0, 12.0, "product_not_active"),
        ("P1", "S1", H3, 0.0, 12.0, "product_not_active"),
    ])
    leaf = leaves([
        ("P1", "S1", "C1", H1, 3.0), ("P1", "S1", "C2", H1, 9.0),
        ("P1", "S1", "C1", H2, 0.0), ("P1", "S1", "C2", H2, 0.0),
        ("P1", "S1", "C1", H3, 1.5), ("P1", "S1", "C2", H3, 0.0),
    ])
    rc = Reconciliation.validate(reconcile(parent, leaf))
    assert rc.set_index("period_start")["expected"].tolist() == [12.0, 0.0, 0.0]
    bad = find_incoherent(rc)
    assert keyed(bad, "period_start", "children_sum", "why") == [
        (H3, 1.5, "leaves carry volume in a period the lifecycle set to 0")
    ]


def test_leaves_without_a_parent_row_are_not_lost():
    rc = reconcile(parents([("P1", "S1", H1, 4.0)]), leaves([("P1", "S1", "C1", H1, 4.0), ("P2", "S1", "C1", H1, 2.0)]))
    Reconciliation.validate(rc)
    bad = find_incoherent(rc)
    assert keyed(bad, "product", "children_sum", "why") == [("P2", 2.0, "leaves without a parent_forecast row")]


# ------------------------------------------------------------------ active parents from the master data


def test_active_parents_come_from_the_master_data_and_spans(make_spans, make_products):
    # horizon: 3 weeks from 2026-02-02. P1/S1 has an open span; P1/S2's only span ended 2026-01-25 (before the
    # horizon: not active); P2 ends Sun 2026-01-25 (product not active in the horizon); P3/S1 starts 2026-02-16
    # (inside the horizon: active); P4/S1 starts after the horizon (not active)
    products = make_products([("P1", "a"), ("P2", "a", None, "2026-01-25"), ("P3", "a"), ("P4", "a")])
    spans = make_spans([
        ("P1", "S1", "C1"), ("P1", "S1", "C2"), ("P1", "S2", "C1", None, "2026-01-25"),
        ("P2", "S1", "C1"), ("P3", "S1", "C1", "2026-02-16"), ("P4", "S1", "C1", "2026-03-02"),
    ])
    parent = parents([("P1", "S1", h, 1.0) for h in (H1, H2, H3)] + [("P3", "S1", h, 1.0) for h in (H1, H2, H3)])
    leaf = leaves([(p, "S1", "C1", h, 1.0) for p in ("P1", "P3") for h in (H1, H2, H3)])

    def judge(p, l):
        return find_active_parents_without_children(p, l, spans, products, CYCLE, 3, "week")

    assert judge(parent, leaf).empty
    # P3's children dropped from the forecast: found from the spans, not from the forecast's children
    bad = judge(parent, leaf[leaf["product"] != "P3"])
    assert keyed(bad, "product", "site", "active_spans", "children_in_forecast", "why") == [
        ("P3", "S1", 1, 0, "active in the master data, no child in statistical_forecast")
    ]
    # P3 gone from both tables: still named, from the master data
    bad = judge(parent[parent["product"] != "P3"], leaf[leaf["product"] != "P3"])
    assert keyed(bad, "product", "why") == [("P3", "active in the master data, no row in parent_forecast")]
    # a forecast parent without a child is named even when the master data do not know it
    extra = parents([("P9", "S1", H1, 2.0)])
    bad = judge(pd.concat([parent, extra], ignore_index=True), leaf)
    assert keyed(bad, "product", "active_spans", "why") == [
        ("P9", 0, "forecast parent without a child in statistical_forecast")
    ]


@pytest.mark.parametrize("seed", range(4))
def test_first_appearance_sums_are_pandas_groupby_sums_to_the_bit(seed):
    # reference: the groups pd.factorize numbers, their first rows, pandas' own (compensated) group sums with
    # NaN left out, and the rows per group counted with the NaN ones
    rng = np.random.default_rng(seed)
    key = rng.integers(0, 300, 5000) * 3  # keys held by no row between
    values = rng.random(5000) * rng.choice([1.0, 1e-8, 1e8, 1e16], 5000)
    values[rng.integers(0, 5000, 20)] = np.nan
    values[7], values[9] = np.inf, -0.0
    first, sums, rows = first_appearance_sums(key, 900, values)
    group, _ = pd.factorize(key)
    expected = pd.Series(values).groupby(group, sort=False).sum().to_numpy()
    assert np.array_equal(first, pd.Series(group).drop_duplicates().index.to_numpy())
    assert np.array_equal(sums.view(np.int64), expected.view(np.int64))
    assert np.array_equal(rows, np.bincount(group))
    plain = np.bincount(group, weights=np.nan_to_num(values, nan=0.0, posinf=np.inf))  # uncompensated
    assert not np.array_equal(sums.view(np.int64), plain.view(np.int64))


def test_first_appearance_sums_compensated_by_hand():
    # 1e16 then sixteen 1.0: added one after the other each 1.0 is lost (1e16 + 1 rounds to 1e16); the
    # compensated sum keeps them: 1e16 + 16. A group of NaN only sums to 0.0 over its one row.
    key = np.array([4] * 17 + [1])
    values = np.array([1e16] + [1.0] * 16 + [np.nan])
    first, sums, rows = first_appearance_sums(key, 5, values)
    assert first.tolist() == [0, 17] and sums.tolist() == [1e16 + 16, 0.0] and rows.tolist() == [17, 1]
