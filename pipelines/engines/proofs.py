"""The rows that break a rule of the cycle (empty = the rule holds): shares sum to one, volume only where active.

Each `find_*` function judges one asset's rows; the stage that makes the
asset returns them as the failing rows of its check (`pipelines.checks`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.calendar import period_ordinal, span_bounds
from pipelines.checks import SHARE_TOLERANCE
from pipelines.keys import LEAF, PARENT, lookup


def find_shares_not_summing_to_one(target: pd.DataFrame, tolerance: float = SHARE_TOLERANCE) -> pd.DataFrame:
    """Parent periods whose shares neither sum to 1 nor are all 0 with a recorded reason.

    target: per-period shares (`reinitialized_target`: parent keys, period_start,
    share, zero_reason). A period summing to 1 must have no reason; an
    all-zero period must have its reason on every row.
    """
    t = target.assign(
        has_reason=target["zero_reason"].notna(),
        nonzero=target["share"] != 0,
    )
    sums = (
        t.groupby(PARENT + ["period_start"], sort=True, observed=True)
        .agg(
            share_sum=("share", "sum"),
            children=("share", "size"),
            with_reason=("has_reason", "sum"),
            nonzero=("nonzero", "sum"),
            zero_reason=("zero_reason", "first"),
        )
        .reset_index()
    )
    sums_to_one = ((sums["share_sum"] - 1.0).abs() <= tolerance) & (sums["with_reason"] == 0)
    zero_with_reason = (sums["nonzero"] == 0) & (sums["with_reason"] == sums["children"])
    return sums[~(sums_to_one | zero_with_reason)].drop(columns=["nonzero"])


def find_volume_after_phase_out(leaf: pd.DataFrame, spans: pd.DataFrame, period: str) -> pd.DataFrame:
    """Leaf forecast rows with volume in a period after the customer's span ended."""
    _, to_ord = span_bounds(spans, period)
    pos = lookup(leaf, LEAF, spans)
    end = np.where(pos >= 0, to_ord[np.clip(pos, 0, None)], np.nan)
    with np.errstate(invalid="ignore"):
        after = (period_ordinal(leaf["period_start"], period) > end) & (leaf["forecast"].to_numpy() != 0)
    out = leaf.loc[after, LEAF + ["period_start", "forecast"]].copy()
    out["active_to"] = spans["active_to"].to_numpy()[pos[after]] if after.any() else pd.Series(dtype="datetime64[ns]")
    return out


def find_volume_outside_active_span(
    parent: pd.DataFrame, leaf: pd.DataFrame, spans: pd.DataFrame, products: pd.DataFrame, period: str
) -> pd.DataFrame:
    """Forecast rows with volume where the customer span has not started or the product's span does not cover the
    period.

    Leaf rows are judged against their customer span's start and their product's
    span; parent rows against the product's span. (Volume after a customer
    span's end is `find_volume_after_phase_out`.)
    """
    p_from, p_to = span_bounds(products, period)
    s_from, _ = span_bounds(spans, period)

    def product_bounds(frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
        pos = lookup(frame, ["product"], products)
        return (
            np.where(pos >= 0, p_from[np.clip(pos, 0, None)], np.nan),
            np.where(pos >= 0, p_to[np.clip(pos, 0, None)], np.nan),
        )

    out = []
    for grain, frame in (("parent", parent), ("leaf", leaf)):
        ords = period_ordinal(frame["period_start"], period)
        lo, hi = product_bounds(frame)
        why = np.full(len(frame), None, dtype=object)
        with np.errstate(invalid="ignore"):
            why[(ords < lo) | (ords > hi)] = "product not active"
            if grain == "leaf":
                pos = lookup(frame, LEAF, spans)
                start = np.where(pos >= 0, s_from[np.clip(pos, 0, None)], np.nan)
                why[(ords < start) & pd.isna(why)] = "customer span not started"
        bad = pd.notna(why) & (frame["forecast"].to_numpy() != 0)
        keys = LEAF if grain == "leaf" else PARENT
        out.append(frame.loc[bad, keys + ["period_start", "forecast"]].assign(grain=grain, why=why[bad]))
    rows = [f for f in out if len(f)]
    return pd.concat(rows, ignore_index=True) if rows else out[1].iloc[0:0]


def find_negative(frame: pd.DataFrame, column: str = "forecast") -> pd.DataFrame:
    """Rows with a negative value."""
    return frame[frame[column] < 0]
