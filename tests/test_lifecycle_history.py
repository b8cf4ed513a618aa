"""`lifecycle_history`: spans, retired products, successors, references, active children.

Cycle date 2026-02-02 (a Monday); history weeks 2026-01-05, -12, -19, -26.
"""

from __future__ import annotations

import pandas as pd
import pytest

from pipelines.errors import LifecycleError
from pipelines.stages.lifecycle_history import active_children, apply_lifecycle

CYCLE = pd.Timestamp("2026-02-02")
W1, W2, W3, W4 = "2026-01-05", "2026-01-12", "2026-01-19", "2026-01-26"


@pytest.fixture
def config(make_config):
    return make_config(lifecycle={"min_history_periods": 3})


def keyed(history, customer=None, product=None):
    out = history
    if customer is not None:
        out = out[out["customer"] == customer]
    if product is not None:
        out = out[out["product"] == product]
    return out.sort_values(["period_start", "origin", "source_product"]).reset_index(drop=True)


def audit_rows(audit, rule):
    return audit[audit["rule"] == rule].reset_index(drop=True)


def ts(day):
    return pd.Timestamp(day)


def test_history_outside_the_customer_span_is_dropped_and_audited(make_cleaned, make_products, make_spans, config):
    products = make_products([("P1", "a")])
    spans = make_spans([("P1", "S1", "C1", "2026-01-14")])  # starts Wed 01-14 -> week 01-12
    cleaned = make_cleaned([("P1", "S1", "C1", w, q) for w, q in [(W1, 4), (W2, 6), (W3, 3), (W4, 5)]])
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    # week 01-05 is before the span; 01-12, 01-19, 01-26 stay
    assert keyed(res.history)["period_start"].tolist() == [ts(W2), ts(W3), ts(W4)]
    a = audit_rows(res.audit, "outside_active_span")
    # one dropped period holding 4
    assert a[["customer", "periods", "quantity"]].values.tolist() == [["C1", 1, 4.0]]


def test_customer_phased_out_before_cycle_leaves_the_basis_and_is_audited(make_cleaned, make_products, make_spans, config):
    products = make_products([("P1", "a")])
    spans = make_spans([("P1", "S1", "C1"), ("P1", "S1", "C2", None, "2026-01-20")])  # C2 ends in week 01-19
    cleaned = make_cleaned(
        [("P1", "S1", "C1", W1, 9), ("P1", "S1", "C2", W1, 1), ("P1", "S1", "C2", W2, 2), ("P1", "S1", "C2", W3, 3)]
    )
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    # C2 is inside its span everywhere but the span ends before the cycle: all of it goes
    assert res.history["customer"].unique().tolist() == ["C1"]
    a = audit_rows(res.audit, "phased_out_before_cycle")
    # 3 periods, 1 + 2 + 3 = 6
    assert a[["customer", "periods", "quantity"]].values.tolist() == [["C2", 3, 6.0]]
    assert audit_rows(res.audit, "outside_active_span").empty


def test_retired_product_history_moves_to_its_successor(make_cleaned, make_products, make_spans, config):
    products = make_products([("A", "a", None, "2026-01-14", "B"), ("B", "a", "2026-01-19")])
    spans = make_spans([("A", "S1", "C1"), ("B", "S1", "C1")])
    cleaned = make_cleaned([("A", "S1", "C1", W1, 5), ("A", "S1", "C1", W2, 7), ("B", "S1", "C1", W3, 4), ("B", "S1", "C1", W4, 6)])
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    h = keyed(res.history)
    # everything is on B now: A's two weeks as successor rows, B's two as own rows
    assert h["product"].unique().tolist() == ["B"]
    assert h[["period_start", "quantity", "origin", "source_product", "source_customer"]].values.tolist() == [
        [ts(W1), 5.0, "successor", "A", "C1"],
        [ts(W2), 7.0, "successor", "A", "C1"],
        [ts(W3), 4.0, "own", "B", "C1"],
        [ts(W4), 6.0, "own", "B", "C1"],
    ]
    a = audit_rows(res.audit, "successor_history_mapped")
    # 2 periods of A, 5 + 7 = 12, booked on B
    assert a[["product", "customer", "periods", "quantity"]].values.tolist() == [["B", "C1", 2, 12.0]]
    assert "A" in a.loc[0, "detail"]


def test_successor_chain_maps_to_its_last_product(make_cleaned, make_products, make_spans, config):
    products = make_products(
        [("A", "a", None, "2026-01-07", "B"), ("B", "a", "2026-01-12", "2026-01-21", "C"), ("C", "a", "2026-01-26")]
    )
    spans = make_spans([("A", "S1", "C1"), ("B", "S1", "C1"), ("C", "S1", "C1")])
    cleaned = make_cleaned([("A", "S1", "C1", W1, 2), ("B", "S1", "C1", W2, 3), ("B", "S1", "C1", W3, 4), ("C", "S1", "C1", W4, 5)])
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    h = keyed(res.history)
    # A -> B -> C: A's and B's history both end on C
    assert h["product"].unique().tolist() == ["C"]
    assert h[["period_start", "source_product", "origin"]].values.tolist() == [
        [ts(W1), "A", "successor"],
        [ts(W2), "B", "successor"],
        [ts(W3), "B", "successor"],
        [ts(W4), "C", "own"],
    ]
    # total kept: 2 + 3 + 4 + 5 = 14
    assert h["quantity"].sum() == 14.0


def test_successor_cycle_raises_lifecycle_error_naming_the_products(make_cleaned, make_products, make_spans, config):
    products = make_products([("A", "a", None, None, "B"), ("B", "a", None, None, "A"), ("P1", "a")])
    spans = make_spans([("P1", "S1", "C1")])
    cleaned = make_cleaned([("P1", "S1", "C1", W1, 1)])
    with pytest.raises(LifecycleError, match=r"loops.*'A', 'B'"):
        apply_lifecycle(cleaned, products, spans, config, CYCLE)


def test_unknown_successor_raises_lifecycle_error_naming_the_pair(make_cleaned, make_products, make_spans, config):
    products = make_products([("A", "a", None, "2026-01-14", "Z")])
    spans = make_spans([("A", "S1", "C1")])
    cleaned = make_cleaned([("A", "S1", "C1", W1, 1)])
    with pytest.raises(LifecycleError, match="A -> Z"):
        apply_lifecycle(cleaned, products, spans, config, CYCLE)


def test_retired_product_without_successor_is_dropped_and_audited(make_cleaned, make_products, make_spans, config):
    products = make_products([("A", "a", None, "2026-01-14"), ("P1", "a")])
    spans = make_spans([("A", "S1", "C1"), ("P1", "S1", "C1")])
    cleaned = make_cleaned([("A", "S1", "C1", W1, 5), ("A", "S1", "C1", W2, 7), ("P1", "S1", "C1", W1, 1)])
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    assert res.history["product"].tolist() == ["P1"]
    a = audit_rows(res.audit, "retired_product_without_successor")
    # 2 periods of A, 5 + 7 = 12
    assert a[["product", "customer", "periods", "quantity"]].values.tolist() == [["A", "C1", 2, 12.0]]


def test_successor_without_active_span_drops_the_history_and_audits_it(make_cleaned, make_products, make_spans, config):
    products = make_products([("A", "a", None, "2026-01-14", "B"), ("B", "a")])
    spans = make_spans([("A", "S1", "C1"), ("A", "S1", "C2"), ("B", "S1", "C1")])  # C2 has no span on B
    cleaned = make_cleaned([("A", "S1", "C1", W1, 5), ("A", "S1", "C2", W1, 8), ("A", "S1", "C2", W2, 1)])
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    assert res.history[["product", "customer", "quantity"]].values.tolist() == [["B", "C1", 5.0]]
    a = audit_rows(res.audit, "successor_without_span")
    # C2's two weeks of A, 8 + 1 = 9, audited on the product they were recorded on
    assert a[["product", "customer", "periods", "quantity"]].values.tolist() == [["A", "C2", 2, 9.0]]


def test_new_customer_gets_reference_history_before_its_own_start(make_cleaned, make_products, make_spans, config):
    products = make_products([("P1", "a")])
    spans = make_spans([("P1", "S1", "C1"), ("P1", "S1", "C2", "2026-01-19", None, "C1")])
    cleaned = make_cleaned(
        [("P1", "S1", "C1", w, q) for w, q in [(W1, 5), (W2, 6), (W3, 7), (W4, 8)]]
        + [("P1", "S1", "C2", W3, 2), ("P1", "S1", "C2", W4, 3)]
    )
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    c2 = keyed(res.history, "C2")
    # C2 has 2 own periods < min_history_periods 3 -> takes C1's 01-05 (5) and 01-12 (6),
    # the periods before its own history starts on 01-19
    assert c2[["period_start", "quantity", "origin", "source_customer"]].values.tolist() == [
        [ts(W1), 5.0, "reference", "C1"],
        [ts(W2), 6.0, "reference", "C1"],
        [ts(W3), 2.0, "own", "C2"],
        [ts(W4), 3.0, "own", "C2"],
    ]
    a = audit_rows(res.audit, "reference_history_copied")
    # 2 periods copied, 5 + 6 = 11
    assert a[["customer", "periods", "quantity"]].values.tolist() == [["C2", 2, 11.0]]
    assert "C1" in a.loc[0, "detail"]
    # the reference's own history is untouched: 5 + 6 + 7 + 8 = 26
    assert keyed(res.history, "C1")["quantity"].sum() == 26.0


def test_customer_with_min_history_periods_takes_no_reference_history(make_cleaned, make_products, make_spans, config):
    products = make_products([("P1", "a")])
    spans = make_spans([("P1", "S1", "C1"), ("P1", "S1", "C3", None, None, "C1")])
    cleaned = make_cleaned(
        [("P1", "S1", "C1", w, q) for w, q in [(W1, 5), (W2, 6), (W3, 7), (W4, 8)]]
        + [("P1", "S1", "C3", w, 1) for w in (W2, W3, W4)]
    )
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    # C3 has exactly 3 own periods = min_history_periods -> not new, nothing copied
    assert (res.history["origin"] == "reference").sum() == 0
    assert len(keyed(res.history, "C3")) == 3
    assert audit_rows(res.audit, "reference_history_copied").empty


def test_active_children_exclude_phased_out_future_and_retired(make_products, make_spans):
    products = make_products([("P1", "a"), ("P2", "b"), ("R", "a", None, "2026-01-20")])
    spans = make_spans(
        [
            ("P1", "S1", "C1"),  # open -> active
            ("P1", "S1", "C2", None, "2026-01-20"),  # ended in week 01-19 -> phased out
            ("P1", "S1", "C3", "2026-02-09"),  # starts next week -> future
            ("P1", "S1", "C4", "2026-02-04"),  # starts Wed of the cycle week -> active
            ("P1", "S1", "C5", None, "2026-02-02"),  # ends on the cycle Monday -> active
            ("R", "S1", "C1"),  # product retired before the cycle
            ("P2", "S2", "C6"),  # other product and class -> active
        ]
    )
    ch = active_children(spans, products, CYCLE, "week")
    assert ch.values.tolist() == [
        ["P1", "S1", "C1", "a"],
        ["P1", "S1", "C4", "a"],
        ["P1", "S1", "C5", "a"],
        ["P2", "S2", "C6", "b"],
    ]


def test_new_customer_own_periods_are_counted_once_when_successor_rows_share_them(
    make_cleaned, make_products, make_spans, config
):
    # C2 moves from retired A to B in the same two weeks, so weeks 01-19 and 01-26 each
    # hold an own row (on B) and a successor row (from A).
    products = make_products([("A", "a", None, "2026-01-30", "B"), ("B", "a")])
    spans = make_spans([("A", "S1", "C2"), ("B", "S1", "C1"), ("B", "S1", "C2", "2026-01-19", None, "C1")])
    cleaned = make_cleaned(
        [("B", "S1", "C1", w, q) for w, q in [(W1, 5), (W2, 6), (W3, 7), (W4, 8)]]
        + [("A", "S1", "C2", W3, 1), ("A", "S1", "C2", W4, 1), ("B", "S1", "C2", W3, 2), ("B", "S1", "C2", W4, 3)]
    )
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    copied = keyed(res.history, "C2")
    copied = copied[copied["origin"] == "reference"]
    # C2 has 2 periods of history (01-19, 01-26), fewer than min_history_periods 3, so it
    # takes C1's 01-05 (5) and 01-12 (6); the 4 rows are 2 periods, not 4
    assert copied[["period_start", "quantity", "source_customer"]].values.tolist() == [
        [ts(W1), 5.0, "C1"],
        [ts(W2), 6.0, "C1"],
    ]
