"""Stage 2, `cleaned_history`: raw lines to one clean value per leaf and period.

Rules, in the order they run:

1. **Rejection.** A line is rejected, with the first reason that applies, when a
   key is blank (`missing_key`), its date does not parse (`bad_date`), its
   quantity is not a finite number (`bad_quantity`), its product is not in the
   product master (`unknown_product`), its product x site x customer has no
   customer span (`no_customer_span`), or it falls on or after the cycle date
   (`on_or_after_cycle_date`). Raw lines = used lines + rejected lines.
2. **Bucketing.** Each line goes to the period containing its date (ISO week
   from Monday, or calendar month); lines of one leaf and period are summed,
   returns (negative lines) included, so a return nets against the same
   customer's shipments of that period.
3. **Returns rule `net_then_zero`.** A period whose net is negative is set to
   zero; the negative net is a correction row (`negative_net_to_zero`).
4. **Missing periods.** Inside a series' range - from its customer span start
   (or its first line when the span has no start, never before the first
   history period) to its span end (or the period before the cycle date) - a
   period without lines is filled with zero (`filled`).
5. **Outliers, Hampel filter** (Hampel 1974; scale 1.4826 x MAD as in Leys et
   al. 2013). In a centred window of `window` periods, a value x_t with
   |x_t - m_t| > k * 1.4826 * MAD_t is replaced by the nearer limit
   m_t +/- k * 1.4826 * MAD_t (or by m_t, per config), never below zero.
   `sides: upper` (default) flags only values above the median: a low week of
   shipments is more often a supply gap than low demand. `sides: both` is the
   symmetric rule as published. Where
   MAD_t = 0 nothing is flagged: an intermittent series whose window is mostly
   zeros has no spread to judge a spike by. Each replacement is a correction row
   (`hampel_cap`) holding the window, k and the limits.

Per series, sum(raw_quantity) + sum(delta of corrections) = sum(quantity).
"""

from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, ordinal_to_start, period_ordinal, period_start, resolve_cycle_date, span_bounds
from pipelines.config import OutlierConfig, PlanningConfig
from pipelines.keys import LEAF, factorize, lookup

MAD_SCALE = 1.4826  # 1 / Phi^-1(3/4): makes the MAD consistent for the normal sd (Leys et al. 2013)


@dataclass(frozen=True)
class CleaningResult:
    cleaned: pd.DataFrame
    rejected: pd.DataFrame
    corrections: pd.DataFrame
    cycle_date: pd.Timestamp


def reject_lines(
    raw: pd.DataFrame, products: pd.DataFrame, spans: pd.DataFrame, config: PlanningConfig
) -> tuple[pd.DataFrame, pd.DataFrame, pd.Timestamp]:
    """Split raw lines into usable lines (parsed) and rejected lines (with reason).

    Returns (used, rejected, cycle_date). `used` has the leaf keys, `ordinal`
    (period number) and `quantity` (float).
    """
    period = config.calendar.period
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
    cycle_date = resolve_cycle_date(config.calendar.cycle_date, last, period, str(config.source))
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


def _rolling_nanmedian(windows: np.ndarray) -> np.ndarray:
    """Median over the last axis ignoring NaN (NaN where a window is all NaN).

    np.sort puts NaN last, so the valid values of each window are its first n.
    """
    s = np.sort(windows, axis=-1)
    n = np.sum(~np.isnan(windows), axis=-1)
    lo = np.clip((n - 1) // 2, 0, None)
    hi = np.clip(n // 2, 0, None)
    a = np.take_along_axis(s, lo[..., None], axis=-1)[..., 0]
    b = np.take_along_axis(s, hi[..., None], axis=-1)[..., 0]
    med = (a + b) / 2.0
    med[n == 0] = np.nan
    return med


def hampel(matrix: np.ndarray, window: int, k: float, chunk_cells: int = 4_000_000) -> tuple[np.ndarray, np.ndarray]:
    """Rolling centred median and MAD of each row of `matrix` (NaN = no value).

    matrix: (n_series, n_periods). Returns (median, mad), both that shape; the
    window is truncated at the edges (min one value). Rows are processed in
    chunks of about `chunk_cells` window cells to bound memory.
    """
    half = window // 2
    n, t = matrix.shape
    med = np.full((n, t), np.nan)
    mad = np.full((n, t), np.nan)
    step = max(1, chunk_cells // max(1, t * window))
    for lo in range(0, n, step):  # chunks of rows, not a loop over series
        block = np.pad(matrix[lo : lo + step], ((0, 0), (half, half)), constant_values=np.nan)
        win = np.lib.stride_tricks.sliding_window_view(block, window, axis=1)
        m = _rolling_nanmedian(win)
        med[lo : lo + step] = m
        mad[lo : lo + step] = _rolling_nanmedian(np.abs(win - m[..., None]))
    return med, mad


def hampel_limits(values: np.ndarray, med: np.ndarray, mad: np.ndarray, rule: OutlierConfig) -> tuple[np.ndarray, np.ndarray]:
    """(flagged, replacement) for each value under the Hampel rule."""
    spread = rule.k * MAD_SCALE * mad
    with np.errstate(invalid="ignore"):
        deviation = values - med if rule.sides == "upper" else np.abs(values - med)
        flagged = (mad > 0) & (deviation > spread)
    if rule.replace_with == "median":
        replacement = med
    else:
        replacement = np.where(values > med, med + spread, med - spread)
    return flagged, np.clip(replacement, 0.0, None)


def clean_history(
    raw: pd.DataFrame, products: pd.DataFrame, spans: pd.DataFrame, config: PlanningConfig
) -> CleaningResult:
    """Apply the rules of this module. Returns cleaned, rejected and corrections tables."""
    period = config.calendar.period
    used, rejected, cycle_date = reject_lines(raw, products, spans, config)
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])

    # --- bucket and net: one value per leaf and period
    leaf_code, leaves = factorize(used, LEAF)
    n_leaves = len(leaves)
    first_ord = int(used["ordinal"].min()) if len(used) else cycle_ord - 1
    t = cycle_ord - first_ord  # periods in the grid: first history period .. cycle - 1
    cell = leaf_code * t + (used["ordinal"].to_numpy() - first_ord)
    net = np.bincount(cell, weights=used["quantity"].to_numpy(), minlength=n_leaves * t).reshape(n_leaves, t)
    lines = np.bincount(cell, minlength=n_leaves * t).reshape(n_leaves, t)
    observed = lines > 0

    # --- each series' fill range, in grid columns
    from_ord, to_ord = span_bounds(spans, period)
    pos = lookup(leaves, LEAF, spans)
    span_from = from_ord[pos] - first_ord
    span_to = to_ord[pos] - first_ord
    first_line = np.argmax(observed, axis=1)
    start = np.where(np.isnan(span_from), first_line, np.clip(span_from, 0, None)).astype(np.int64)
    end = np.where(np.isnan(span_to), t - 1, np.clip(span_to, -1, t - 1)).astype(np.int64)
    cols = np.arange(t)
    in_range = (cols >= start[:, None]) & (cols <= end[:, None])
    keep = observed | in_range

    # --- returns: negative net periods to zero
    corrections = []
    raw_net = np.where(keep, net, np.nan)
    values = raw_net.copy()
    negative = observed & (net < 0)
    if negative.any():
        corrections.append(_correction_rows(negative, raw_net, np.zeros_like(raw_net), "negative_net_to_zero", {"rule": "net_then_zero"}))
        values[negative] = 0.0

    # --- outliers on the kept cells
    rule = config.cleansing.outliers
    flagged = np.zeros_like(keep)
    if rule.rule == "hampel" and t > 0:
        med, mad = hampel(values, rule.window, rule.k)
        flagged, replacement = hampel_limits(values, med, mad, rule)
        flagged &= keep
        if flagged.any():
            before = values.copy()
            values = np.where(flagged, replacement, values)
            params = {"window": rule.window, "k": rule.k, "replace_with": rule.replace_with, "sides": rule.sides}
            rows = _correction_rows(flagged, before, values, "hampel_cap", params)
            fi, fj = np.nonzero(flagged)
            rows["parameters"] = [
                json.dumps({**params, "median": round(float(m), 6), "limit_scale": round(float(s), 6)})
                for m, s in zip(med[fi, fj], rule.k * MAD_SCALE * mad[fi, fj])
            ]
            corrections.append(rows)

    # --- long tables
    li, pj = np.nonzero(keep)
    cleaned = leaves.iloc[li].reset_index(drop=True)
    cleaned["period_start"] = ordinal_to_start(pj + first_ord, period)
    cleaned["quantity"] = values[li, pj]
    cleaned["raw_quantity"] = net[li, pj]
    cleaned["lines"] = lines[li, pj].astype(np.int64)
    cleaned["filled"] = ~observed[li, pj]
    cleaned["corrected"] = negative[li, pj] | flagged[li, pj]

    empty = np.zeros((0, 0))
    corr = pd.concat(corrections or [_correction_rows(empty.astype(bool), empty, empty, "hampel_cap", {})], ignore_index=True)
    corr = pd.concat([leaves.iloc[corr.pop("leaf").to_numpy()].reset_index(drop=True), corr], axis=1)
    corr.insert(3, "period_start", ordinal_to_start(corr.pop("col").to_numpy() + first_ord, period))
    corr = corr.sort_values(LEAF + ["period_start", "rule"], kind="stable").reset_index(drop=True)
    return CleaningResult(cleaned=cleaned, rejected=rejected, corrections=corr, cycle_date=cycle_date)


def _correction_rows(mask: np.ndarray, before: np.ndarray, after: np.ndarray, rule: str, params: dict) -> pd.DataFrame:
    i, j = np.nonzero(mask)
    b, a = before[i, j], after[i, j]
    return pd.DataFrame(
        {"leaf": i, "col": j, "rule": rule, "before": b, "after": a, "delta": a - b, "parameters": json.dumps(params)}
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
    return {"raw_lines": raw_lines, "used_lines": used, "rejected_lines": len(rejected), "unaccounted": raw_lines - used - len(rejected)}


def cycle_calendar(cleaned: pd.DataFrame, config: PlanningConfig, cycle_date: pd.Timestamp) -> pd.DataFrame:
    """One row describing the cycle: its date, period kind, horizon and history range."""

    period = config.calendar.period
    horizon = horizon_starts(cycle_date, config.calendar.horizon, period)
    start = cleaned["period_start"].min() if len(cleaned) else pd.NaT
    periods = (
        int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0] - period_ordinal(pd.DatetimeIndex([start]), period)[0])
        if len(cleaned)
        else 0
    )
    return pd.DataFrame(
        {
            "cycle_date": [cycle_date],
            "period": [period],
            "horizon": [config.calendar.horizon],
            "horizon_end": [horizon[-1]],
            "history_start": [start],
            "history_periods": [periods],
        }
    )
