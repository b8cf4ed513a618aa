"""Stage 3, `lifecycle_history`: the history a share may be computed from.

Rules, in the order they run (each one's moved or dropped quantity is a row of
`lifecycle_audit`, so nothing leaves the history unexplained):

1. `outside_active_span` - a line outside its customer's span (before
   `active_from` or after `active_to`) is dropped.
2. Retired products (product `active_to` before the cycle date):
   `successor_history_mapped` - with a successor, the history moves to the end
   of the successor chain (A -> B -> C goes to C) for the same site and
   customer, kept as separate rows with `origin = successor`;
   `successor_without_span` - dropped when that customer has no span on the
   successor active at the cycle date; `retired_product_without_successor` -
   dropped when there is no successor.
3. `phased_out_before_cycle` - a customer whose span ends before the cycle
   date leaves the share basis: its history is dropped here.
4. `reference_history_copied` - a customer active at the cycle date with fewer
   than `lifecycle.min_history_periods` periods of own history and a
   `reference_customer` gets the reference's history (same product and site)
   for the periods before its own history starts, as rows with
   `origin = reference`. Copied rows feed the share basis only: the parent's
   forecast history leaves them out, so the parent's volume is not counted twice.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import active_mask, period_ordinal, span_bounds
from pipelines.config import PlanningConfig
from pipelines.errors import LifecycleError
from pipelines.keys import LEAF, lookup

HISTORY_COLUMNS = LEAF + ["period_start", "quantity", "origin", "source_product", "source_customer"]
AUDIT_COLUMNS = LEAF + ["rule", "periods", "quantity", "detail"]


@dataclass(frozen=True)
class LifecycleResult:
    history: pd.DataFrame
    audit: pd.DataFrame


def resolve_successors(products: pd.DataFrame) -> pd.Series:
    """Final successor of every product that names one (A -> B -> C gives A: C, B: C).

    Raises LifecycleError naming the products when a successor is unknown or the
    chain loops back on itself.
    """
    step = products.set_index("product")["successor"].dropna()
    unknown = step[~step.isin(products["product"])]
    if len(unknown):
        pairs = ", ".join(f"{p} -> {s}" for p, s in unknown.items())
        raise LifecycleError(
            f"products: successor not in the product master: {pairs}. "
            f"Add the successor product or clear the successor cell."
        )
    final = step.copy()
    for _ in range(len(step) + 1):
        nxt = final.map(step)
        if nxt.isna().all():
            return final
        final = nxt.fillna(final)
    looping = sorted(final.index[final.map(step).notna()])
    raise LifecycleError(
        f"products: the successor chain loops through {looping}; each chain must end at a "
        f"product without successor."
    )


def active_children(spans: pd.DataFrame, products: pd.DataFrame, cycle_date: pd.Timestamp, period: str) -> pd.DataFrame:
    """Customer spans active at the cycle date, on products not retired before it.

    These are the children that receive a share. Columns: leaf keys and product_class.
    """
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    s_from, s_to = span_bounds(spans, period)
    p_from, p_to = span_bounds(products, period)
    product_ok = pd.Series(active_mask(p_from, p_to, cycle_ord), index=products["product"].to_numpy())
    ok = active_mask(s_from, s_to, cycle_ord) & spans["product"].map(product_ok).fillna(False).to_numpy(bool)
    out = spans.loc[ok, LEAF].reset_index(drop=True)
    out["product_class"] = out["product"].map(products.set_index("product")["product_class"]).to_numpy()
    return out


def _stack(frames: list[pd.DataFrame], columns: list[str] | None = None) -> pd.DataFrame:
    """Concatenate the non-empty frames (the first frame, empty or not, if all are empty)."""
    full = [f for f in frames if len(f)]
    if not full:
        return frames[0].iloc[0:0] if frames and columns is None else pd.DataFrame(columns=columns)
    return pd.concat(full, ignore_index=True)


def _audit(rows: pd.DataFrame, rule: str, detail: str | pd.Series) -> pd.DataFrame:
    """Audit rows for `rows` (history lines) grouped by leaf."""
    if rows.empty:
        return pd.DataFrame(columns=AUDIT_COLUMNS)
    g = rows.assign(detail=detail).groupby(LEAF + ["detail"], sort=True, observed=True)["quantity"]
    out = g.agg(periods="size", quantity="sum").reset_index()
    out["rule"] = rule
    return out[AUDIT_COLUMNS]


def apply_lifecycle(
    cleaned: pd.DataFrame, products: pd.DataFrame, spans: pd.DataFrame, config: PlanningConfig, cycle_date: pd.Timestamp
) -> LifecycleResult:
    """Apply the rules of this module to the cleaned history."""
    period = config.calendar.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    h = cleaned[LEAF + ["period_start", "quantity"]].reset_index(drop=True)
    h_ord = period_ordinal(h["period_start"], period)
    s_from, s_to = span_bounds(spans, period)
    audits = []

    # 1. inside the customer's own span
    pos = lookup(h, LEAF, spans)
    inside = (pos >= 0) & active_mask(s_from[np.clip(pos, 0, None)], s_to[np.clip(pos, 0, None)], h_ord)
    audits.append(_audit(h[~inside], "outside_active_span", "history outside the customer's active span"))
    h, h_ord = h[inside].reset_index(drop=True), h_ord[inside]
    h["origin"] = "own"
    h["source_product"] = h["product"]
    h["source_customer"] = h["customer"]

    # 2. retired products move to their successor
    p_from, p_to = span_bounds(products, period)
    retired_products = products.loc[~np.isnan(p_to) & (p_to < cycle_ord), "product"]
    successor = resolve_successors(products)
    retired = h["product"].isin(retired_products).to_numpy()
    target = h["product"].map(successor).where(retired)
    no_successor = retired & target.isna().to_numpy()
    audits.append(_audit(h[no_successor], "retired_product_without_successor", "product retired before the cycle date"))
    moved = h[retired & ~no_successor].copy()
    moved["product"] = target[retired & ~no_successor].astype(str).to_numpy()
    moved["origin"] = "successor"
    mpos = lookup(moved, LEAF, spans)
    m_ok = (mpos >= 0) & active_mask(s_from[np.clip(mpos, 0, None)], s_to[np.clip(mpos, 0, None)], cycle_ord)
    audits.append(
        _audit(
            moved[~m_ok].assign(product=moved["source_product"][~m_ok]),
            "successor_without_span",
            "customer has no active span on successor " + moved["product"][~m_ok],
        )
    )
    moved = moved[m_ok]
    audits.append(_audit(moved, "successor_history_mapped", "history of retired product " + moved["source_product"]))
    h = _stack([h[~retired], moved])

    # 3. customers phased out before the cycle date leave the basis
    pos = lookup(h, LEAF, spans)
    phased_out = ~np.isnan(s_to[pos]) & (s_to[pos] < cycle_ord)
    audits.append(_audit(h[phased_out], "phased_out_before_cycle", "customer span ended before the cycle date"))
    h = h[~phased_out].reset_index(drop=True)

    # 4. new customers take their reference customer's earlier history
    copies, copy_audit = _reference_copies(h, spans, s_from, s_to, cycle_ord, config)
    audits.append(copy_audit)
    h = _stack([h, copies])

    h = h[HISTORY_COLUMNS].sort_values(LEAF + ["period_start", "origin", "source_product"], kind="stable")
    audit = _stack(audits, AUDIT_COLUMNS)
    audit = audit.astype({"periods": np.int64, "quantity": float})
    return LifecycleResult(history=h.reset_index(drop=True), audit=audit.reset_index(drop=True))


def _reference_copies(h, spans, s_from, s_to, cycle_ord, config):
    period = config.calendar.period
    active = active_mask(s_from, s_to, cycle_ord)
    new = spans[active & spans["reference_customer"].notna().to_numpy()][LEAF + ["reference_customer"]]
    if new.empty:
        return pd.DataFrame(columns=HISTORY_COLUMNS), pd.DataFrame(columns=AUDIT_COLUMNS)
    # distinct periods: a mapped successor row and an own row of one period are one period of history
    own = h.groupby(LEAF, sort=False)["period_start"].agg(size="nunique", min="min")
    new = new.join(own, on=LEAF)
    new["size"] = new["size"].fillna(0).astype(np.int64)
    new = new[new["size"] < config.lifecycle.min_history_periods]
    first_own = np.where(new["size"] > 0, period_ordinal(new["min"].fillna(pd.Timestamp(0)), period), cycle_ord)
    new = new.assign(first_own=first_own)
    ref = h.merge(
        new.rename(columns={"customer": "new_customer", "reference_customer": "customer"})[
            ["product", "site", "customer", "new_customer", "first_own"]
        ],
        on=["product", "site", "customer"],
    )
    ref = ref[period_ordinal(ref["period_start"], period) < ref["first_own"].to_numpy()]
    copies = ref.assign(
        source_customer=ref["customer"], customer=ref["new_customer"], origin="reference"
    )[HISTORY_COLUMNS]
    audit = _audit(copies, "reference_history_copied", "history copied from reference customer " + copies["source_customer"])
    without = new[~new.set_index(LEAF).index.isin(copies.set_index(LEAF).index)]
    if len(without):
        extra = without[LEAF].assign(
            rule="reference_history_copied",
            periods=0,
            quantity=0.0,
            detail="reference customer " + without["reference_customer"] + " has no history before this customer's own",
        )
        audit = _stack([audit, extra[AUDIT_COLUMNS]], AUDIT_COLUMNS)
    return copies.reset_index(drop=True), audit
