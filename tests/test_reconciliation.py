"""`reconciliation`: parent against the sum of its children, and each `find_*` rule.

Tolerances: children sum to the parent when |difference| <= 1e-9 x max(|parent|, 1);
shares sum to 1 within 1e-9, per parent and period (or are all 0 with a recorded reason).
"""

from __future__ import annotations

import pandas as pd
import pytest

from pipelines.engines.proofs import (
    find_negative,
    find_shares_not_summing_to_one,
    find_volume_after_phase_out,
    find_volume_outside_active_span,
)
from pipelines.schemas_forecast import ParentForecast, Reconciliation, StatisticalForecast
from pipelines.stages.reconciliation import find_incoherent, find_parents_without_children, reconcile

CYCLE = pd.Timestamp("2026-02-02")
H1, H2, H3 = pd.Timestamp("2026-02-02"), pd.Timestamp("2026-02-09"), pd.Timestamp("2026-02-16")


def parents(rows):
    """rows: (product, site, period_start, forecast)."""
    frame = pd.DataFrame(rows, columns=["product", "site", "period_start", "forecast"])
    frame.insert(0, "product_class", "a")
    frame.insert(0, "cycle_date", CYCLE)
    frame["model"] = "ses"
    frame["demand_class"] = "smooth"
    frame["model_grain"] = "parent"
    frame["zero_reason"] = None
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


def test_parents_without_children_are_returned_with_their_total():
    rc = reconcile(
        parents([("P1", "S1", H1, 4.0), ("P2", "S1", H1, 1.5), ("P2", "S1", H2, 2.5)]),
        leaves([("P1", "S1", "C1", H1, 4.0)]),
    )
    bad = find_parents_without_children(rc)
    # P2 has 2 periods and no child: 1.5 + 2.5 = 4.0
    assert keyed(bad, "product", "periods", "parent_forecast") == [("P2", 2, 4.0)]


def test_no_parent_without_children_when_every_parent_has_one():
    rc = reconcile(parents([("P1", "S1", H1, 4.0)]), leaves([("P1", "S1", "C1", H1, 4.0)]))
    assert find_parents_without_children(rc).empty
