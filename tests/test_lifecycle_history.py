"""`lifecycle_history`: spans, retired products, successors, shortage flag, active children.

Cycle date 2026-02-02 (a Monday); history weeks 2026-01-05, -12, -19, -26.
Horizon (where a test sets 4 periods): weeks 2026-02-02, -09, -16, -23.
"""

from __future__ import annotations

import pandas as pd
import pytest

from pipelines.engines.children import active_children
from pipelines.errors import LifecycleError
from pipelines.stages.lifecycle_history import apply_lifecycle

CYCLE = pd.Timestamp("2026-02-02")
W1, W2, W3, W4 = "2026-01-05", "2026-01-12", "2026-01-19", "2026-01-26"


H1, H2, H3, H4 = "2026-02-02", "2026-02-09", "2026-02-16", "2026-02-23"


@pytest.fixture
def config(make_config):
    return make_config(lifecycle={"min_history_periods": 3}, calendar={"horizon": 4})


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


def test_customer_phased_out_before_cycle_leaves_the_basis_and_is_audited(
    make_cleaned, make_products, make_spans, config
):
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
    cleaned = make_cleaned(
        [("A", "S1", "C1", W1, 5), ("A", "S1", "C1", W2, 7), ("B", "S1", "C1", W3, 4), ("B", "S1", "C1", W4, 6)]
    )
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
    cleaned = make_cleaned(
        [("A", "S1", "C1", W1, 2), ("B", "S1", "C1", W2, 3), ("B", "S1", "C1", W3, 4), ("C", "S1", "C1", W4, 5)]
    )
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


def test_no_history_is_copied_from_a_reference_customer(make_cleaned, make_products, make_spans, config):
    products = make_products([("P1", "a")])
    spans = make_spans([("P1", "S1", "C1"), ("P1", "S1", "C2", "2026-01-19", None, "C1")])
    cleaned = make_cleaned(
        [("P1", "S1", "C1", w, q) for w, q in [(W1, 5), (W2, 6), (W3, 7), (W4, 8)]]
        + [("P1", "S1", "C2", W3, 2), ("P1", "S1", "C2", W4, 3)]
    )
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    # C2 is new (2 own periods < 3) but keeps only its own 2 + 3; its share comes from the
    # share table's reference rule, not from copied history
    assert keyed(res.history, "C2")[["period_start", "quantity", "origin"]].values.tolist() == [
        [ts(W3), 2.0, "own"],
        [ts(W4), 3.0, "own"],
    ]
    assert set(res.history["origin"]) == {"own"}
    # total kept: 5 + 6 + 7 + 8 + 2 + 3 = 31, nothing added
    assert res.history["quantity"].sum() == 31.0


def test_shortage_flag_is_carried_and_false_without_the_column(make_cleaned, make_products, make_spans, config):
    products = make_products([("A", "a", None, "2026-01-14", "B"), ("B", "a")])
    spans = make_spans([("A", "S1", "C1"), ("B", "S1", "C1")])
    cleaned = make_cleaned(
        [("A", "S1", "C1", W1, 5), ("A", "S1", "C1", W2, 7), ("B", "S1", "C1", W3, 4), ("B", "S1", "C1", W4, 6)]
    )
    # a hand-made cleaned frame with the cleansing stage's shortage column:
    # shortages on A in week 01-12 and on B in week 01-26
    with_flag = cleaned.assign(shortage=[False, True, False, True])
    h = keyed(apply_lifecycle(with_flag, products, spans, config, CYCLE).history)
    # A's 01-12 row moves to B as a successor row and keeps its flag
    assert h[["period_start", "source_product", "shortage"]].values.tolist() == [
        [ts(W1), "A", False],
        [ts(W2), "A", True],
        [ts(W3), "B", False],
        [ts(W4), "B", True],
    ]
    assert h["shortage"].dtype == bool
    without = apply_lifecycle(cleaned, products, spans, config, CYCLE).history
    assert not without["shortage"].any() and len(without) == 4


def test_successor_span_starting_inside_the_horizon_takes_the_history(make_cleaned, make_products, make_spans, config):
    products = make_products([("A", "a", None, "2026-01-14", "B"), ("B", "a")])
    # C1 starts on B in the horizon's third week (02-16); C2 only after the 4-week horizon (03-02)
    spans = make_spans([("A", "S1", "C1"), ("A", "S1", "C2"), ("B", "S1", "C1", H3), ("B", "S1", "C2", "2026-03-02")])
    cleaned = make_cleaned([("A", "S1", "C1", W1, 5), ("A", "S1", "C2", W1, 8)])
    res = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    # C1's span on B overlaps the horizon -> mapped; C2's does not -> dropped and audited
    assert res.history[["product", "customer", "quantity", "origin"]].values.tolist() == [["B", "C1", 5.0, "successor"]]
    a = audit_rows(res.audit, "successor_without_span")
    assert a[["product", "customer", "periods", "quantity"]].values.tolist() == [["A", "C2", 1, 8.0]]


def test_active_children_are_the_spans_active_in_any_horizon_period(make_products, make_spans, make_history, config):
    products = make_products(
        [
            ("P1", "a"),
            ("P2", "b"),
            ("R", "a", None, "2026-01-20"),
            ("E", "a", None, "2026-02-11"),
            ("L", "a", H3),
            ("F", "a", "2026-03-02"),
        ]
    )
    spans = make_spans(
        [
            ("P1", "S1", "C1"),  # open -> the whole horizon 02-02 .. 02-23
            ("P1", "S1", "C2", None, "2026-01-20"),  # ended in week 01-19, before the cycle -> no child
            ("P1", "S1", "C3", "2026-02-11"),  # starts Wed 02-11 -> from week 02-09 (phase-in)
            ("P1", "S1", "C4", None, "2026-02-18"),  # ends Wed 02-18 -> until week 02-16 (phase-out)
            ("P1", "S1", "C5", "2026-03-02"),  # starts after the 4-week horizon -> no child
            ("R", "S1", "C1"),  # product retired before the cycle -> no child
            ("E", "S1", "C1"),  # product ends Wed 02-11 -> until week 02-09
            ("L", "S1", "C1", None, "2026-02-16"),  # product from 02-16, span until Mon 02-16 -> that week only
            ("F", "S1", "C1"),  # product launched after the horizon -> no child
            ("P2", "S2", "C6", None, None, "C1", 0.5, None),  # other class; lifecycle inputs carried over
        ]
    )
    history = make_history([("P1", "S1", "C1", W1, 1), ("P1", "S1", "C1", W2, 0), ("P1", "S1", "C4", W4, 2)])
    ch = active_children(spans, products, history, config, CYCLE)
    got = ch[["product", "customer", "product_class", "first_active_period", "last_active_period", "own_periods"]]
    assert got.values.tolist() == [
        ["P1", "C1", "a", ts(H1), ts(H4), 2],  # two periods of own history (a 0 counts: the customer was there)
        ["P1", "C3", "a", ts(H2), ts(H4), 0],
        ["P1", "C4", "a", ts(H1), ts(H3), 1],
        ["E", "C1", "a", ts(H1), ts(H2), 0],
        ["L", "C1", "a", ts(H3), ts(H3), 0],
        ["P2", "C6", "b", ts(H1), ts(H4), 0],
    ]
    assert ch.loc[5, "reference_customer"] == "C1" and ch.loc[5, "scale"] == 0.5
    assert ch["initial_share"].isna().all()


def test_active_children_count_a_period_with_own_and_successor_rows_once(
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
    ch = active_children(spans, products, res.history, config, CYCLE)
    # 4 rows of C2 on B, but 2 distinct periods (01-19, 01-26): new under min_history_periods 3
    assert dict(zip(ch["customer"], ch["own_periods"], strict=False)) == {"C1": 4, "C2": 2}


def test_active_children_take_own_periods_from_a_table_that_counted_them(
    make_products, make_spans, make_history, config
):
    """`counted=` (the plan passes the cycle's share table): the children's own periods are looked up there, so
    the frame equals the one counted over the history; a table lacking a child is not used (counted again)."""
    products = make_products([("P1", "a"), ("P2", "b")])
    spans = make_spans([("P1", "S1", "C1"), ("P1", "S1", "C2"), ("P2", "S2", "C3")])
    history = make_history(
        [("P1", "S1", "C1", W1, 1), ("P1", "S1", "C1", W2, 0), ("P1", "S1", "C2", W4, 2), ("P2", "S2", "C3", W3, 4)]
    )
    counted_here = active_children(spans, products, history, config, CYCLE)
    assert counted_here["own_periods"].tolist() == [2, 1, 1]  # by hand: C1 weeks W1, W2; C2 W4; C3 W3
    table = counted_here.iloc[::-1].reset_index(drop=True)  # another order, as the share table's
    pd.testing.assert_frame_equal(
        active_children(spans, products, history, config, CYCLE, counted=table), counted_here, check_exact=True
    )
    wrong = table.assign(own_periods=[7, 8, 9])  # proves the look-up: these values come from the table
    assert active_children(spans, products, history, config, CYCLE, counted=wrong)["own_periods"].tolist() == [9, 8, 7]
    lacking = table.iloc[1:].assign(own_periods=99)  # one child missing: every child counted over the history
    pd.testing.assert_frame_equal(
        active_children(spans, products, history, config, CYCLE, counted=lacking), counted_here, check_exact=True
    )


def test_leaf_runs_hold_each_leafs_rows_in_period_order_in_any_row_order():
    """`leaf_runs`: its leaves are `keys.factorize`'s (first appearance), and the run of each leaf is exactly
    that leaf's rows, by period start, ties in row order (checked against a stable sort by code and start),
    for rows grouped by leaf (no sort needed), grouped but with a period out of order, and shuffled."""
    import numpy as np

    from pipelines.engines.leaf_runs import leaf_runs
    from pipelines.keys import LEAF, factorize

    rng = np.random.default_rng(3)
    keys = pd.DataFrame({"product": rng.choice(["A", "B"], 2000), "site": rng.choice(["S1", "S2"], 2000),
                         "customer": rng.choice(["C1", "C2", "C3"], 2000)})
    frame = keys.assign(period_start=pd.Timestamp("2025-01-06") + pd.to_timedelta(rng.integers(0, 40, 2000) * 7, "D"))
    grouped = frame.sort_values(LEAF + ["period_start"], kind="stable").reset_index(drop=True)
    late = grouped.copy()
    late.loc[5, "period_start"] = pd.Timestamp("2030-01-07")  # one leaf's periods no longer ascend
    for rows, sorted_already in ((grouped, True), (late, False), (frame, False)):
        runs = leaf_runs(rows, rows["period_start"].to_numpy())
        code, leaves = factorize(rows, LEAF)
        pd.testing.assert_frame_equal(runs.leaves, leaves)
        assert (runs.order is None) == sorted_already
        want = np.lexsort((rows["period_start"].to_numpy(), code))  # stable: ties keep row order
        got = np.concatenate([runs.rows(np.arange(runs.first[k], runs.end[k])) for k in range(len(leaves))])
        assert got.tolist() == want.tolist()


def test_ids_from_the_sort_are_the_key_ids_of_the_history(make_cleaned, make_products, make_spans, config):
    """The ids `apply_lifecycle` derives from its sort are `keys.key_ids` of its history (the reference: the ids
    coded from the text keys), with a successor's rows joining an own leaf, a leaf dropped and two sites."""
    from pipelines.keys import key_ids
    from pipelines.stages.lifecycle_history import _by_origin

    products = make_products([("P0", "a", None, "2026-01-20", "P2"), ("P1", "a"), ("P2", "a")])
    spans = make_spans(
        [("P0", "S1", "C1"), ("P2", "S1", "C1"), ("P1", "S2", "C3"), ("P1", "S1", "C2", None, "2026-01-10"),
         ("P1", "S1", "C1")]
    )
    rows = [(p, s, c, w, q) for p, s, c in [("P1", "S2", "C3"), ("P0", "S1", "C1"), ("P2", "S1", "C1"),
                                           ("P1", "S1", "C2"), ("P1", "S1", "C1")] for w, q in [(W1, 2), (W3, 5)]]
    res = apply_lifecycle(make_cleaned(rows), products, spans, config, CYCLE)
    assert "successor" in set(res.history["origin"]) and "C2" not in set(res.history["customer"])
    leaf_id, parent_id = key_ids(res.history)
    assert res.ids[0].tolist() == leaf_id.tolist() == [0, 0, 1, 1, 2, 2, 2, 2]
    assert res.ids[1].tolist() == parent_id.tolist() == [0, 0, 1, 1, 2, 2, 2, 2]
    grouped = res.history.groupby("origin").agg(rows=("quantity", "size"), quantity=("quantity", "sum"))
    pd.testing.assert_frame_equal(_by_origin(res.history), grouped.reset_index())


def test_span_rows_are_the_rows_active_mask_keeps():
    """`span_rows` (a binary search per leaf) against `calendar.active_mask` judging every row, on every kind
    of bound (open, closed, empty, no span) over leaves whose rows ascend by period, with repeated periods."""
    import numpy as np

    from pipelines.calendar import active_mask
    from pipelines.engines.leaf_runs import LeafRuns, span_rows

    rng = np.random.default_rng(5)
    s_from = rng.choice([np.nan, 10.0, 20.0, -3.0], 50)
    s_to = rng.choice([np.nan, 15.0, 30.0, 5.0], 50)
    leaf_span = rng.integers(-1, 50, 40)
    sizes = rng.integers(0, 60, 40)
    end = np.cumsum(sizes)
    runs = LeafRuns(pd.DataFrame(index=range(40)), end - sizes, end, None)
    ordinal = np.concatenate([np.sort(rng.integers(-10, 40, k)) for k in sizes])
    leaf = np.repeat(np.arange(40), sizes)
    at = np.clip(leaf_span, 0, None)
    want = (leaf_span >= 0)[leaf] & active_mask(s_from[at][leaf], s_to[at][leaf], ordinal)
    assert want.any() and not want.all()
    inside, after = span_rows(runs, leaf_span, s_from, s_to, lambda pos: ordinal[pos])
    got = np.zeros(len(ordinal), dtype=bool)
    for k in range(40):
        got[inside[k]:after[k]] = True
    assert (got == want).all()


@pytest.mark.parametrize("sorted_already", [True, False])
def test_take_history_gives_the_rows_expand_would_index(sorted_already):
    """`take_history` (one compiled pass) against plain numpy and pandas: each column at the index of every row
    (`runs.rows(expand(...))`), the ids `np.repeat`ed along the ranges, and rows and quantity per group as
    pandas' `groupby(...).sum()` of the taken rows, bit for bit; on ranges that continue each other, skip rows,
    repeat, are empty or single rows, over a history in leaf order and one that needs the sort."""
    import numpy as np

    from pipelines.engines.leaf_runs import expand, leaf_runs, take_history

    rng = np.random.default_rng(7)
    n_leaves, periods = 40, 90
    keys = pd.DataFrame({"product": np.repeat([f"P{i % 7}" for i in range(n_leaves)], periods),
                         "site": "S1", "customer": np.repeat([f"C{i:02d}" for i in range(n_leaves)], periods)})
    frame = keys.assign(period_start=np.tile(pd.date_range("2024-01-01", periods=periods, freq="W-MON"), n_leaves))
    if not sorted_already:
        frame = frame.sample(frac=1.0, random_state=1).reset_index(drop=True)
    runs = leaf_runs(frame, frame["period_start"].to_numpy())
    assert (runs.order is None) == sorted_already
    starts = frame["period_start"].to_numpy()
    pool = np.array([0.1, 0.2, 0.3, 1e16, -1e16, np.nan, np.inf, -np.inf, 1e-300, 3.7, -0.0])
    for trial in range(40):
        quantity = rng.choice(pool, len(frame)) if trial % 2 else rng.normal(0, 1e8, len(frame))
        shortage = rng.random(len(frame)) < 0.3
        leaf = rng.choice(n_leaves, size=rng.integers(1, 3 * n_leaves))
        if rng.random() < 0.5:
            leaf = np.sort(leaf)  # mostly neighbouring leaves: ranges that continue each other
        low = rng.integers(0, periods, len(leaf)) * (rng.random(len(leaf)) < 0.5)
        high = np.maximum(low, periods - rng.integers(0, periods, len(leaf)) * (rng.random(len(leaf)) < 0.3))
        start, length = runs.first[leaf] + low, high - low
        leaf_id = rng.integers(0, 1000, len(leaf)).astype(np.int32)
        parent_id = rng.integers(0, 100, len(leaf)).astype(np.int32)
        group = rng.integers(0, 3, len(leaf)).astype(np.int8)
        got = take_history(runs, start, length, starts, quantity, shortage, leaf_id, parent_id, group, 3)
        rows = runs.rows(expand(start, length))
        assert got.starts.dtype == starts.dtype and np.array_equal(got.starts, starts[rows])
        assert np.array_equal(got.quantity, quantity[rows], equal_nan=True)
        assert got.shortage.dtype == bool and np.array_equal(got.shortage, shortage[rows])
        assert got.leaf_id.dtype == np.int32 and np.array_equal(got.leaf_id, np.repeat(leaf_id, length))
        assert np.array_equal(got.parent_id, np.repeat(parent_id, length))
        assert got.shortage_rows == int(shortage[rows].sum())
        want = pd.Series(quantity[rows]).groupby(np.repeat(group, length)).agg(["size", "sum"])
        held = want.index.to_numpy()
        assert np.array_equal(got.group_rows[held], want["size"].to_numpy())
        assert not np.delete(got.group_rows, held).any()
        assert np.array_equal(got.group_sums[held], want["sum"].to_numpy(), equal_nan=True)
        assert (np.signbit(got.group_sums[held]) == np.signbit(want["sum"].to_numpy())).all()


def test_take_history_sums_fail_without_the_compensation():
    """The sums `take_history` gives are pandas' compensated ones, not the plain sum: on values where the two
    differ (a test that would pass a kernel adding plainly would prove nothing)."""
    import numpy as np

    from pipelines.engines.leaf_runs import LeafRuns, take_history

    quantity = np.array([1e16, 1.0, 1.0, -1e16, 0.5, 0.25])
    n = len(quantity)
    runs = LeafRuns(pd.DataFrame(index=[0]), np.array([0]), np.array([n]), None)
    ids = np.zeros(1, np.int32)
    got = take_history(runs, np.array([0]), np.array([n]), np.zeros(n, "M8[ns]"), quantity, np.zeros(n, bool),
                       ids, ids, np.zeros(1, np.int8), 1)
    plain = 0.0
    for v in quantity:
        plain += v
    want = pd.Series(quantity).groupby(np.zeros(n, int)).sum().iloc[0]
    assert plain != want and got.group_sums[0] == want


def test_rows_and_quantity_per_origin_added_up_while_taken_equal_grouping_the_rows(
    make_cleaned, make_products, make_spans, config
):
    """The stage's rows and quantity per origin, added up while it took the rows, equal pandas' groupby of
    the history's rows; and the source customer of every row is its customer."""
    from pipelines.stages.lifecycle_history import _by_origin

    products = make_products([("P0", "a", None, "2026-01-20", "P2"), ("P1", "a"), ("P2", "a")])
    spans = make_spans([("P0", "S1", "C1"), ("P2", "S1", "C1"), ("P1", "S1", "C2"), ("P0", "S1", "C3")])
    rows = [(p, s, c, w, q) for p, s, c in [("P0", "S1", "C1"), ("P2", "S1", "C1"), ("P1", "S1", "C2"),
                                           ("P0", "S1", "C3")] for w, q in [(W1, 0.1), (W2, 0.2), (W3, 0.7)]]
    res = apply_lifecycle(make_cleaned(rows), products, spans, config, CYCLE)
    grouped = res.history.groupby("origin").agg(rows=("quantity", "size"), quantity=("quantity", "sum"))
    pd.testing.assert_frame_equal(_by_origin(res.history, res.origin_totals), grouped.reset_index())
    assert res.shortage_rows == int(res.history["shortage"].sum())
    assert set(res.history["origin"]) == {"own", "successor"}
    assert res.history["source_customer"].tolist() == res.history["customer"].tolist()


def test_audit_rows_equal_grouping_every_line_by_text_key_and_detail():
    """`_audit` (lines numbered by group on integers, sizes and sums in one pass, the groups sorted as text)
    against pandas' groupby of every line: keys of several rows with one text (a moved history kept under a
    leaf's own key), details per line, values whose plain sum differs from pandas' compensated one, NaN and
    infinities."""
    import numpy as np

    from pipelines.keys import LEAF, factorize
    from pipelines.stages.lifecycle_history import AUDIT_COLUMNS, _audit

    rng = np.random.default_rng(8)
    products = np.array(["P0", "P1", "P10", "P2"], dtype=object)
    compensated = 0
    for trial in range(150):
        n_keys, n_lines = int(rng.integers(1, 12)), int(rng.integers(1, 200))
        keys = pd.DataFrame({"product": rng.choice(products, n_keys), "site": rng.choice(["S1", "S2"], n_keys),
                             "customer": rng.choice(["C1", "C2"], n_keys)})
        key_of_row = rng.integers(0, n_keys, n_lines)
        words = np.array(["detail b", "detail a", "detail a2"], dtype=object)[: int(rng.integers(1, 4))]
        word_of_row = rng.integers(0, len(words), n_lines)
        quantity = rng.normal(size=n_lines) * 10.0 ** rng.integers(-8, 10, n_lines)
        quantity[rng.random(n_lines) < 0.05] = np.nan
        if trial % 10 == 0:
            quantity[0] = np.inf
        got = _audit(keys, key_of_row, factorize(keys, LEAF)[0], quantity, "some_rule", words, word_of_row)
        lines = keys.iloc[key_of_row].reset_index(drop=True).assign(quantity=quantity, detail=words[word_of_row])
        grouped = lines.groupby(LEAF + ["detail"], sort=True)["quantity"].agg(periods="size", quantity="sum")
        want = grouped.reset_index().assign(rule="some_rule")[AUDIT_COLUMNS]
        pd.testing.assert_frame_equal(got, want, check_exact=True)
        plain = lines.groupby(LEAF + ["detail"], sort=True)["quantity"].agg(lambda v: float(np.nansum(v.to_numpy())))
        compensated += not np.array_equal(plain.to_numpy(), want["quantity"].to_numpy(), equal_nan=True)
    assert compensated > 20  # the data tell pandas' compensated sum from the plain one
