"""The children of a parent in a cycle: customer spans active in some period of the horizon, with their own history."""

from __future__ import annotations

import numpy as np
import pandas as pd
from numba import njit

from pipelines.calendar import ordinal_to_start, period_ordinal, span_bounds
from pipelines.engines.share_rows import ShareRows
from pipelines.engines.share_settings import ShareSettings
from pipelines.keys import LEAF, Coded, coded, lookup


def active_children(
    spans: pd.DataFrame,
    products: pd.DataFrame,
    history: pd.DataFrame,
    settings: ShareSettings,
    cycle_date: pd.Timestamp,
    keys: Coded | None = None,
    rows: ShareRows | None = None,
    counted: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """The children that can receive a share: customer spans active in any period of the horizon.

    A child is active in horizon period h when h lies inside its customer span
    and inside its product's span. Spans whose intersection with the horizon is
    empty (ended before the cycle date, starting after the horizon, on a product
    retired before the cycle or launched after the horizon) are not children.

    history: lifecycle history, to count each child's own distinct periods
    (a period with an own row and a mapped successor row is one period).
    Columns: leaf keys, product_class, first_active_period, last_active_period,
    own_periods, reference_customer, scale, initial_share. keys: `coded(history)`, rows: its `share_rows`,
    when the caller has them. counted: a table that already holds these children's `own_periods` over this
    history (leaf keys, own_periods; the cycle's share table): looked up there instead of counted again, when it
    holds every child.
    """
    settings = ShareSettings.of(settings)
    period = settings.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    last_ord = cycle_ord + settings.horizon - 1
    s_from, s_to = span_bounds(spans, period)
    p_from, p_to = span_bounds(products, period)
    ppos = spans["product"].map(pd.Series(np.arange(len(products)), index=products["product"].to_numpy()))
    known = ppos.notna().to_numpy()
    ppos = ppos.fillna(0).astype(np.int64).to_numpy()
    # first and last active ordinal: span, product span and horizon intersected (NaN = open)
    first = np.fmax(np.fmax(s_from, np.where(known, p_from[ppos], np.nan)), cycle_ord)
    last = np.fmin(np.fmin(s_to, np.where(known, p_to[ppos], np.nan)), last_ord)
    ok = known & (first <= last)
    out = spans.loc[ok, LEAF].reset_index(drop=True)
    out["product_class"] = out["product"].map(products.set_index("product")["product_class"]).to_numpy()
    out["first_active_period"] = ordinal_to_start(first[ok].astype(np.int64), period)
    out["last_active_period"] = ordinal_to_start(last[ok].astype(np.int64), period)
    pos = lookup(out, LEAF, counted) if counted is not None else None
    if pos is not None and (pos >= 0).all():
        out["own_periods"] = counted["own_periods"].to_numpy(np.int64)[pos]
    else:
        out["own_periods"] = own_periods(history, out, period, keys, rows)
    for column in ("reference_customer", "scale", "initial_share"):
        values = spans[column] if column in spans.columns else pd.Series(np.nan, index=spans.index)
        out[column] = values[ok].to_numpy()
    out["scale"] = pd.to_numeric(out["scale"]).astype(float)
    out["initial_share"] = pd.to_numeric(out["initial_share"]).astype(float)
    return out


def own_periods(
    history: pd.DataFrame, children: pd.DataFrame, period: str, keys: Coded | None = None, rows: ShareRows | None = None
) -> np.ndarray:
    """Distinct periods of history of each child (0 without any), counted on integer codes.

    A history sorted by leaf id and period (as the lifecycle stage writes it) is counted by its runs; any
    other order through a leaf x period grid. rows: the history's `share_rows` (each row's age before the cycle
    date: a period is one age; each leaf's first row where sorted by leaf id), when the caller has them.
    """
    if history.empty:
        return np.zeros(len(children), dtype=np.int64)
    c = keys if keys is not None else coded(history)
    leaves = c.leaves
    if rows is not None and rows.first is not None:  # sorted by leaf id: each leaf's rows from its first
        count = rows.periods if rows.periods is not None else np.zeros(len(leaves), dtype=np.int64)
        if rows.periods is not None or _run_periods(rows.first, rows.age, count):  # in period order in each leaf
            pos = lookup(children, LEAF, leaves)
            return np.where(pos >= 0, count[np.clip(pos, 0, None)], 0).astype(np.int64)
    code = c.leaf
    ords = period_ordinal(history["period_start"], period)
    step_leaf, step_ord = np.diff(code), np.diff(ords)
    if bool(np.all((step_leaf > 0) | ((step_leaf == 0) & (step_ord >= 0)))):
        new = np.empty(len(code), dtype=bool)
        new[0] = True
        np.not_equal(step_leaf, 0, out=new[1:])
        new[1:] |= step_ord != 0
        count = np.bincount(code[new], minlength=len(leaves))
    else:
        lo = int(ords.min())
        width = int(ords.max()) - lo + 1
        seen = np.zeros(len(leaves) * width, dtype=bool)  # one cell per (leaf, period)
        seen[code * width + (ords - lo)] = True
        count = seen.reshape(len(leaves), width).sum(axis=1)
    pos = lookup(children, LEAF, leaves)
    return np.where(pos >= 0, count[np.clip(pos, 0, None)], 0).astype(np.int64)


@njit(cache=True)
def _run_periods(first: np.ndarray, age: np.ndarray, count: np.ndarray) -> bool:
    """count[l] = the distinct ages of the rows first[l] .. first[l + 1] - 1 (leaf l's run, rows sorted by leaf
    id): its rows less those repeating the age of the row before (a moved history's row beside its own in the
    same period). False, counts incomplete, when an age rises inside a run (the leaf's rows not in period order:
    the caller counts another way). One pass, nothing of the history's length written."""
    for at in range(len(first) - 1):
        n = 0
        for i in range(first[at], first[at + 1]):
            if i == first[at] or age[i] < age[i - 1]:
                n += 1
            elif age[i] > age[i - 1]:
                return False
        count[at] = n
    return True
