"""`apply_lifecycle` against the module's rules applied row by row in plain pandas.

The stage decides each rule per leaf and takes the rows it keeps as ranges
of the history (`leaf_runs`, a binary search per leaf, one index at the end).
The reference here states the rules of `pipelines/stages/lifecycle_history.py`
the plain way: every row judged by `calendar.active_mask` against its
customer's span, retired products and their successors merged on the rows,
the result ordered by one stable `sort_values` on leaf, period, origin and
source product, and the audit by `groupby` on the dropped rows. A random
scenario (successor chains, products retired without successor, customers
without a span on the successor, phased-out customers, spans starting and
ending inside the history, a repeated period) is checked in the row order
the cleansing stage writes and shuffled.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.calendar import active_mask, period_ordinal, span_bounds
from pipelines.keys import LEAF, key_ids
from pipelines.stages.lifecycle_history import apply_lifecycle, resolve_successors

CYCLE = pd.Timestamp("2026-02-02")
WEEKS = pd.date_range("2025-09-01", periods=22, freq="7D")  # the 22 weeks before the cycle


def scenario(make_cleaned, make_products, make_spans, seed: int):
    rng = np.random.default_rng(seed)
    products = make_products(
        [
            ("P0", "a", None, "2025-12-01", "P1"),  # P0 -> P1 -> P2: both retired, their history ends on P2
            ("P1", "a", None, "2026-01-10", "P2"),
            ("P2", "a"),
            ("P3", "a", None, "2026-01-05"),  # retired, no successor
            ("P4", "a", None, "2026-01-20", "P5"),
            ("P5", "a", "2026-01-12"),
            ("P6", "a"),
        ]
    )
    starts = [None, None, "2025-10-15", "2025-12-03", "2026-01-19"]  # spans starting and ending in the history
    ends = [None, None, None, "2026-03-02", "2025-12-03"]
    span_rows, history = [], []
    for product in ["P0", "P1", "P2", "P3", "P4", "P5", "P6"]:
        for site in ["S1", "S2"]:
            for customer in ["C1", "C2", "C3", "C4"]:
                if rng.random() < 0.85:  # a few leaves have no span at all
                    start, end = rng.choice(starts), rng.choice(ends)
                    end = None if start and end and end < start else end
                    span_rows.append((product, site, customer, start, end))
                weeks = np.sort(rng.choice(len(WEEKS), rng.integers(0, 18), replace=False))
                for w in weeks:
                    history.append((product, site, customer, str(WEEKS[w].date()), float(rng.integers(0, 9)) / 4))
    cleaned = make_cleaned(history)
    cleaned["shortage"] = rng.random(len(cleaned)) < 0.1
    repeated = cleaned.sample(8, random_state=seed).assign(quantity=0.5)  # a period twice: ties keep row order
    cleaned = pd.concat([cleaned, repeated]).sort_values(LEAF + ["period_start"], kind="stable")
    return cleaned.reset_index(drop=True), products, make_spans(span_rows)


def reference(cleaned, products, spans, horizon):
    """The module's rules, row by row: (history without ids, audit)."""
    cycle = period_ordinal(pd.DatetimeIndex([CYCLE]), "week")[0]
    s_from, s_to = span_bounds(spans, "week")
    bounds = spans[LEAF].assign(s_from=s_from, s_to=s_to)
    rows = cleaned.assign(row=np.arange(len(cleaned)), ord=period_ordinal(cleaned["period_start"], "week"))
    rows = rows.merge(bounds, on=LEAF, how="left", indicator="span")
    inside = (rows["span"] == "both").to_numpy() & active_mask(rows["s_from"], rows["s_to"], rows["ord"])
    p_to = span_bounds(products, "week")[1]
    retired = rows["product"].isin(products.loc[p_to < cycle, "product"]).to_numpy()
    target = rows["product"].map(resolve_successors(products)).where(retired)
    moved_keys = rows[LEAF].assign(product=target).merge(bounds, on=LEAF, how="left", indicator="span")
    with np.errstate(invalid="ignore"):
        target_ok = (moved_keys["span"] == "both").to_numpy() & active_mask(
            moved_keys["s_from"].to_numpy(), moved_keys["s_to"].to_numpy(), np.arange(cycle, cycle + horizon)[:, None]
        ).any(axis=0)
    audits = []

    def audit(mask, rule, detail, keys=None, frame=rows):
        part = frame[mask].assign(detail=detail[mask] if isinstance(detail, pd.Series) else detail)
        if keys is not None:
            part[LEAF] = keys[mask].to_numpy()
        grouped = part.groupby(LEAF + ["detail"], sort=True)["quantity"].agg(periods="size", quantity="sum")
        audits.append(grouped.reset_index().assign(rule=rule))

    successor = "customer has no span active in the horizon on successor " + target.fillna("")
    audit(~inside, "outside_active_span", "history outside the customer's active span")
    audit(inside & retired & target.isna().to_numpy(), "retired_product_without_successor",
          "product retired before the cycle date")
    audit(inside & target.notna().to_numpy() & ~target_ok, "successor_without_span", successor)
    moved = inside & target.notna().to_numpy() & target_ok
    audit(moved, "successor_history_mapped", "history of retired product " + rows["product"], moved_keys[LEAF])
    own, new = rows[inside & ~retired], rows[moved].assign(product=target[moved])
    kept = pd.concat([own.assign(origin="own"), new.assign(origin="successor")], ignore_index=True)
    kept["source_product"], kept["source_customer"] = rows["product"].to_numpy()[kept["row"]], kept["customer"]
    end = kept[LEAF].merge(bounds, on=LEAF, how="left")["s_to"].to_numpy()
    gone = end < cycle
    audit(gone, "phased_out_before_cycle", "customer span ended before the cycle date", frame=kept)  # own, then moved
    kept = kept[~gone].sort_values(LEAF + ["period_start", "origin", "source_product"], kind="stable")
    columns = LEAF + ["period_start", "quantity", "origin", "source_product", "source_customer", "shortage"]
    audit_columns = LEAF + ["rule", "periods", "quantity", "detail"]
    return kept[columns].reset_index(drop=True), pd.concat(audits, ignore_index=True)[audit_columns]


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("shuffled", [False, True])
def test_the_stage_keeps_moves_drops_and_audits_as_the_rules_row_by_row(
    make_cleaned, make_products, make_spans, make_config, seed, shuffled
):
    cleaned, products, spans = scenario(make_cleaned, make_products, make_spans, seed)
    if shuffled:
        cleaned = cleaned.sample(frac=1, random_state=seed).reset_index(drop=True)
    config = make_config(calendar={"horizon": 4})
    result = apply_lifecycle(cleaned, products, spans, config, CYCLE)
    want, want_audit = reference(cleaned, products, spans, 4)
    assert set(want_audit["rule"]) == {
        "outside_active_span", "retired_product_without_successor", "successor_without_span",
        "successor_history_mapped", "phased_out_before_cycle",
    }
    assert (want["origin"] == "successor").any() and len(want) > 100
    pd.testing.assert_frame_equal(result.history, want, check_exact=True)
    pd.testing.assert_frame_equal(result.audit, want_audit.astype({"periods": np.int64}), check_exact=True)
    leaf_id, parent_id = key_ids(want)
    assert result.ids[0].tolist() == leaf_id.tolist() and result.ids[1].tolist() == parent_id.tolist()
