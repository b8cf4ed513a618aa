"""Building blocks of cleansing: raw lines rejected with a reason, shortage cells, and correction rows.

The rules and their order are stated in `pipelines.stages.cleaned_history`.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd

from pipelines.calendar import ordinal_to_start, period_ordinal, period_start, resolve_cycle_date
from pipelines.keys import LEAF, PARENT, factorize, lookup


def reject_lines(
    raw: pd.DataFrame, products: pd.DataFrame, spans: pd.DataFrame, calendar, source
) -> tuple[pd.DataFrame, pd.DataFrame, pd.Timestamp]:
    """Split raw lines into usable lines (parsed) and rejected lines (with reason).

    Returns (used, rejected, cycle_date). `used` has the leaf keys, `ordinal`
    (period number) and `quantity` (float).
    """
    period = calendar.period
    keys = raw[LEAF]
    reason = pd.Series(pd.NA, index=raw.index, dtype=object)

    def mark(mask: pd.Series, why: str) -> None:
        reason[mask & reason.isna()] = why

    mark((keys == "").any(axis=1), "missing_key")
    dates = pd.to_datetime(raw["period_start"], format="ISO8601", errors="coerce")
    mark(dates.isna(), "bad_date")
    qty = pd.to_numeric(raw["quantity"], errors="coerce")
    mark(~np.isfinite(qty.to_numpy(dtype=float, na_value=np.nan)), "bad_quantity")
    mark(~raw["product"].isin(products["product"]), "unknown_product")
    span_index = pd.MultiIndex.from_frame(spans[LEAF])
    mark(pd.Series(~pd.MultiIndex.from_frame(keys).isin(span_index), index=raw.index), "no_customer_span")

    ok = reason.isna().to_numpy()
    starts = period_start(dates[ok], period)
    ordinals = period_ordinal(starts, period)
    last = ordinal_to_start(np.array([ordinals.max()]), period)[0] if len(ordinals) else None
    cycle_date = resolve_cycle_date(calendar.cycle_date, last, period, str(source))
    cycle_ord = period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0]
    late = np.zeros(len(raw), dtype=bool)
    late[np.flatnonzero(ok)[ordinals >= cycle_ord]] = True
    mark(pd.Series(late, index=raw.index), "on_or_after_cycle_date")

    ok = reason.isna().to_numpy()
    used = raw.loc[ok, LEAF].reset_index(drop=True)
    used["ordinal"] = period_ordinal(period_start(dates[ok], period), period)
    used["quantity"] = qty[ok].to_numpy(dtype=float)
    rejected = raw.loc[~ok].copy()
    rejected["reason"] = reason[~ok].astype(str)
    return used, rejected.reset_index(drop=True), cycle_date


def shortage_cells(
    shortages: pd.DataFrame | None, leaves: pd.DataFrame, keep: np.ndarray, first_ord: int, period: str
) -> tuple[np.ndarray, pd.DataFrame]:
    """Boolean (n_leaves, n_periods) of kept cells whose product x site has a shortage that period.

    Also the shortage records bucketed to their period, with the children each flagged.
    """
    n, t = keep.shape
    columns = PARENT + ["period_start", "children"]
    cells = np.zeros((n, t), dtype=bool)
    if shortages is None or len(shortages) == 0:
        empty = {"product": pd.Series(dtype=object), "site": pd.Series(dtype=object)}
        return cells, pd.DataFrame(
            empty | {"period_start": pd.Series(dtype="datetime64[ns]"), "children": pd.Series(dtype=np.int64)}
        )
    dates = pd.to_datetime(shortages["period_start"], errors="coerce")
    records = shortages.loc[dates.notna().to_numpy(), PARENT].astype(str).reset_index(drop=True)
    records["period_start"] = period_start(dates[dates.notna()].reset_index(drop=True), period)
    records = records.drop_duplicates().reset_index(drop=True)
    col = period_ordinal(records["period_start"], period) - first_ord
    parent_code, parents = factorize(leaves, PARENT) if n else (np.zeros(0, np.int64), pd.DataFrame(columns=PARENT))
    ppos = lookup(records, PARENT, parents) if n else np.full(len(records), -1)
    ok = (ppos >= 0) & (col >= 0) & (col < t)
    by_parent = np.zeros((len(parents), t), dtype=bool)
    by_parent[ppos[ok], col[ok]] = True
    cells = by_parent[parent_code] & keep
    li, pj = np.nonzero(cells)
    flagged_per_parent = np.bincount(parent_code[li] * t + pj, minlength=len(parents) * t)
    children = np.zeros(len(records), dtype=np.int64)
    children[ok] = flagged_per_parent[ppos[ok] * t + col[ok]]
    records["children"] = children
    return cells, records.sort_values(columns[:3], kind="stable").reset_index(drop=True)


def correction_rows(
    mask: np.ndarray,
    before: np.ndarray,
    after: np.ndarray,
    rule: str,
    params: dict,
    leaf_index: np.ndarray | None = None,
    figures: dict[str, np.ndarray] | None = None,
    adjusted: np.ndarray | None = None,
) -> pd.DataFrame:
    """One row per True cell of `mask`: before, after, delta and the parameters as JSON.

    `leaf_index` maps the rows of `mask` to leaf codes (default: the identity);
    `figures` are per-cell numbers added to each row's parameters (NaN left out);
    `adjusted` per row of `mask` says whether the series was seasonally adjusted.
    """
    i, j = np.nonzero(mask)
    b, a = before[i, j], after[i, j]
    if figures or adjusted is not None:
        picked = {k: v[i, j] for k, v in (figures or {}).items()}
        extra = [{k: round(float(v[r]), 6) for k, v in picked.items() if not np.isnan(v[r])} for r in range(len(i))]
        if adjusted is not None:
            for r, e in enumerate(extra):
                e["seasonal_adjusted"] = bool(adjusted[i[r]])
        parameters = [json.dumps(params | e) for e in extra]
    else:
        parameters = json.dumps(params)
    leaf = i if leaf_index is None else np.asarray(leaf_index)[i]
    return pd.DataFrame(
        {"leaf": leaf, "col": j, "rule": rule, "before": b, "after": a, "delta": a - b, "parameters": parameters}
    )


def find_unexplained_changes(cleaned: pd.DataFrame, corrections: pd.DataFrame, tolerance: float = 1e-6) -> pd.DataFrame:
    """Series whose cleaned total differs from raw total + audited corrections.

    Per series: sum(raw_quantity) + sum(delta) must equal sum(quantity).
    """
    totals = cleaned.groupby(LEAF, sort=True, observed=True)[["raw_quantity", "quantity"]].sum()
    moved = corrections.groupby(LEAF, sort=True, observed=True)["delta"].sum()
    totals["corrections"] = moved.reindex(totals.index).fillna(0.0)
    totals["unexplained"] = totals["quantity"] - totals["raw_quantity"] - totals["corrections"]
    return totals[totals["unexplained"].abs() > tolerance].reset_index()


def line_accounting(raw_lines: int, cleaned: pd.DataFrame, rejected: pd.DataFrame) -> dict[str, int]:
    """Raw lines against used (summed into cleaned periods) plus rejected lines."""
    used = int(cleaned["lines"].sum())
    return {
        "raw_lines": raw_lines,
        "used_lines": used,
        "rejected_lines": len(rejected),
        "unaccounted": raw_lines - used - len(rejected),
    }
