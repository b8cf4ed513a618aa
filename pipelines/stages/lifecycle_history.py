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
from pipelines.keys import LEAF, lookup
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
    """Apply the rules of this module to the cleaned history."""
    period = config.calendar.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    h = cleaned[LEAF + ["period_start", "quantity"]].reset_index(drop=True)
    # the cleansing stage's shortage flag (product x site x period); absent = none recorded
    h["shortage"] = cleaned["shortage"].to_numpy(bool) if "shortage" in cleaned.columns else False
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
    # the successor span must overlap the horizon [cycle, cycle + horizon - 1]
    horizon_end = cycle_ord + config.calendar.horizon - 1
    m_from, m_to = s_from[np.clip(mpos, 0, None)], s_to[np.clip(mpos, 0, None)]
    with np.errstate(invalid="ignore"):
        m_ok = (mpos >= 0) & (np.isnan(m_from) | (m_from <= horizon_end)) & (np.isnan(m_to) | (m_to >= cycle_ord))
    audits.append(
        _audit(
            moved[~m_ok].assign(product=moved["source_product"][~m_ok]),
            "successor_without_span",
            "customer has no span active in the horizon on successor " + moved["product"][~m_ok],
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

    h = h[HISTORY_COLUMNS].sort_values(LEAF + ["period_start", "origin", "source_product"], kind="stable")
    audit = _stack(audits, AUDIT_COLUMNS)
    audit = audit.astype({"periods": np.int64, "quantity": float})
    return LifecycleResult(history=h.reset_index(drop=True), audit=audit.reset_index(drop=True))


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
    history, audit = result.history, result.audit
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
