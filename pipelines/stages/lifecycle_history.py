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
   successor active in any period of the horizon; `retired_product_without_successor` -
   dropped when there is no successor.
3. `phased_out_before_cycle` - a customer whose span ends before the cycle
   date leaves the share basis: its history is dropped here.

Every row carries `shortage` from cleaned history (False where the input has no
such column): a recorded supply shortage of the source product x site x
period. Shares and the parent baseline leave such periods out.

New customers are not given anyone else's history here: `active_children`
counts each child's own periods, and the share table decides a new
customer's share (from its reference customer, a planner-given initial share,
or none yet), see `pipelines.stages.share_tables`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import active_mask, period_ordinal, span_bounds
from pipelines.config import CalendarConfig, PlanningConfig
from pipelines.errors import LifecycleError
from pipelines.keys import LEAF, add_ids, factorize, lookup
from pipelines.results import Log, StageResult, quiet

HISTORY_COLUMNS = LEAF + ["period_start", "quantity", "origin", "source_product", "source_customer", "shortage"]
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
    """Apply the rules of this module to the cleaned history.

    The rules are decided once per leaf (its span, its product's retirement and
    successor, the successor's span) and reach the rows through integer leaf
    codes; the history is copied once, into the sorted result, whose order is
    that of a stable sort by leaf, period, origin and source product (the
    leaves and products ranked as text, on their distinct values only).
    """
    period = config.calendar.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    h = cleaned[LEAF + ["period_start", "quantity"]].reset_index(drop=True)
    shortage = cleaned["shortage"].to_numpy(bool) if "shortage" in cleaned.columns else np.zeros(len(h), dtype=bool)
    h_ord = period_ordinal(h["period_start"], period)
    s_from, s_to = span_bounds(spans, period)
    audits = []

    # --- per leaf: its span, and where its product is retired, the successor's leaf and span
    leaf, leaves = factorize(h, LEAF)
    lpos = lookup(leaves, LEAF, spans)[leaf]
    inside = (lpos >= 0) & active_mask(s_from[np.clip(lpos, 0, None)], s_to[np.clip(lpos, 0, None)], h_ord)
    audits.append(_audit(h[~inside], "outside_active_span", "history outside the customer's active span"))

    p_from, p_to = span_bounds(products, period)
    retired_products = products.loc[~np.isnan(p_to) & (p_to < cycle_ord), "product"]
    successor = resolve_successors(products)
    leaf_retired = leaves["product"].isin(retired_products).to_numpy()
    leaf_target = leaves["product"].map(successor).where(leaf_retired)
    leaf_has_target = leaf_target.notna().to_numpy()
    retired = inside & leaf_retired[leaf]
    no_successor = retired & ~leaf_has_target[leaf]
    audits.append(_audit(h[no_successor], "retired_product_without_successor", "product retired before the cycle date"))

    targets = np.flatnonzero(leaf_has_target)  # leaves whose history moves; their new keys
    target_keys = leaves.iloc[targets].assign(product=leaf_target.iloc[targets].astype(str).to_numpy())
    target_keys = target_keys.reset_index(drop=True)
    tpos = lookup(target_keys, LEAF, spans) if len(targets) else np.zeros(0, dtype=np.int64)
    horizon_end = cycle_ord + config.calendar.horizon - 1
    t_from, t_to = s_from[np.clip(tpos, 0, None)], s_to[np.clip(tpos, 0, None)]
    with np.errstate(invalid="ignore"):
        t_ok = (tpos >= 0) & (np.isnan(t_from) | (t_from <= horizon_end)) & (np.isnan(t_to) | (t_to >= cycle_ord))
    target_of_leaf = np.full(len(leaves), -1, dtype=np.int64)
    target_of_leaf[targets] = np.arange(len(targets))
    moving = retired & ~no_successor
    row_target = target_of_leaf[leaf]
    without_span = moving & ~t_ok[np.clip(row_target, 0, None)] if len(targets) else np.zeros(len(h), dtype=bool)
    moved_rows = np.flatnonzero(moving & ~without_span)
    lost = h[without_span]
    audits.append(
        _audit(
            lost,
            "successor_without_span",
            "customer has no span active in the horizon on successor "
            + target_keys["product"].to_numpy(dtype=object)[row_target[without_span]],
        )
    )
    moved = target_keys.iloc[row_target[moved_rows]].reset_index(drop=True)
    moved["quantity"] = h["quantity"].to_numpy()[moved_rows]
    audits.append(
        _audit(
            moved,
            "successor_history_mapped",
            "history of retired product " + leaves["product"].to_numpy(dtype=object)[leaf[moved_rows]],
        )
    )

    # --- the rows kept, own then moved (the order the stable sort keeps among equals); phased-out leaves leave
    own_rows = np.flatnonzero(inside & ~retired)
    rows = np.concatenate([own_rows, moved_rows])
    is_moved = np.concatenate([np.zeros(len(own_rows), dtype=bool), np.ones(len(moved_rows), dtype=bool)])
    key = np.where(is_moved, len(leaves) + row_target[rows], leaf[rows])  # into own leaves, then target keys
    key_span = np.concatenate([lookup(leaves, LEAF, spans), tpos])
    phased_out = ~np.isnan(s_to[key_span[key]]) & (s_to[key_span[key]] < cycle_ord)
    all_keys = pd.concat([leaves, target_keys], ignore_index=True)
    stacked = all_keys.iloc[key[phased_out]].reset_index(drop=True)
    stacked["quantity"] = h["quantity"].to_numpy()[rows[phased_out]]
    audits.append(_audit(stacked, "phased_out_before_cycle", "customer span ended before the cycle date"))
    rows, is_moved, key = rows[~phased_out], is_moved[~phased_out], key[~phased_out]

    # --- sorted by leaf (as text), period, origin ("own" < "successor") and source product (as text)
    key_code, distinct = factorize(all_keys, LEAF)
    rank = np.empty(len(distinct), dtype=np.int64)
    rank[distinct.sort_values(LEAF, kind="stable").index.to_numpy()] = np.arange(len(distinct))
    source_rank = pd.factorize(leaves["product"], sort=True)[0]
    period_ns = h["period_start"].to_numpy(dtype="datetime64[ns]").view(np.int64)
    order = np.lexsort((source_rank[leaf[rows]], is_moved, period_ns[rows], rank[key_code[key]]))
    rows, is_moved, key = rows[order], is_moved[order], key[order]
    out = all_keys.iloc[key].reset_index(drop=True)
    out["period_start"] = h["period_start"].to_numpy()[rows]
    out["quantity"] = h["quantity"].to_numpy()[rows]
    out["origin"] = np.where(is_moved, "successor", "own").astype(object)
    out["source_product"] = leaves["product"].to_numpy(dtype=object)[leaf[rows]]
    out["source_customer"] = leaves["customer"].to_numpy(dtype=object)[leaf[rows]]
    out["shortage"] = shortage[rows]
    audit = _stack(audits, AUDIT_COLUMNS)
    audit = audit.astype({"periods": np.int64, "quantity": float})
    return LifecycleResult(history=out[HISTORY_COLUMNS], audit=audit.reset_index(drop=True))


@dataclass(frozen=True)
class LifecycleSettings:
    """What the lifecycle stage reads: the calendar (period and horizon)."""

    calendar: CalendarConfig

    @classmethod
    def of(cls, config: PlanningConfig) -> LifecycleSettings:
        return cls(calendar=config.calendar)


def run(
    cleaned_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: LifecycleSettings,
    log: Log = quiet,
) -> StageResult:
    """lifecycle_history and lifecycle_audit, with what each rule moved."""
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    result = apply_lifecycle(cleaned_history, products, customer_spans, settings, cycle_date)
    history, audit = add_ids(result.history), result.audit  # the leaf and parent ids the later stages carry
    by_rule = audit.groupby("rule").agg(
        leaves=("customer", "size"), periods=("periods", "sum"), quantity=("quantity", "sum")
    )
    by_origin = history.groupby("origin").agg(rows=("quantity", "size"), quantity=("quantity", "sum"))
    return StageResult(
        outputs={"lifecycle_history": history, "lifecycle_audit": audit},
        metadata={
            "lifecycle_history": {
                "by_origin": by_origin.reset_index(),
                "shortage_rows": int(history["shortage"].sum()),
            },
            "lifecycle_audit": {"by_rule": by_rule.reset_index()},
        },
    )
