"""Stage 5, `reinitialized_target`: the target measure rewritten from fresh shares.

For every active child and every horizon period:

    target_{j,h} = share_j x baseline_P,

where baseline_P is the parent's mean per period over the window its share
used: the parent's volume in that window divided by the window's periods, or
by fewer periods when the parent's history starts inside the window. Copied
reference history (`origin = reference`) is left out of the baseline so a new
customer's stand-in history does not inflate the parent. A parent that fell
back to an even split has no volume in any window, so its baseline is 0.

Because the target is overwritten every cycle, the pro-rata split of the next
forecast follows this cycle's shares, not whatever the children held before.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, period_ordinal
from pipelines.config import PlanningConfig
from pipelines.keys import LEAF, PARENT, factorize, lookup

TARGET_COLUMNS = LEAF + ["period_start", "cycle_date", "target", "share", "parent_baseline"]


def parent_baselines(shares: pd.DataFrame, history: pd.DataFrame, config: PlanningConfig, cycle_date: pd.Timestamp) -> np.ndarray:
    """Baseline of each share-table row's parent (same value on all its children)."""
    period = config.calendar.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    parent_code, parents = factorize(shares, PARENT)
    n_parents = len(parents)
    window_used = np.zeros(n_parents, dtype=np.int64)
    window_used[parent_code] = shares["window_used"].to_numpy()

    real = history[history["origin"] != "reference"]
    row_parent = lookup(real, PARENT, parents)
    ok = row_parent >= 0
    row_parent = row_parent[ok]
    age = cycle_ord - period_ordinal(real["period_start"], period)[ok]
    qty = real["quantity"].to_numpy(float)[ok]
    inside = (age >= 1) & (age <= window_used[row_parent])
    volume = np.bincount(row_parent[inside], weights=qty[inside], minlength=n_parents)
    oldest = np.zeros(n_parents, dtype=np.int64)
    np.maximum.at(oldest, row_parent, age)  # history length of each parent, in periods
    periods = np.minimum(window_used, oldest)
    baseline = np.divide(volume, periods, out=np.zeros(n_parents), where=periods > 0)
    return baseline[parent_code]


def reinitialize_target(shares: pd.DataFrame, history: pd.DataFrame, config: PlanningConfig, cycle_date: pd.Timestamp) -> pd.DataFrame:
    """One row per child and horizon period: target = share x parent baseline."""
    period = config.calendar.period
    starts = horizon_starts(cycle_date, config.calendar.horizon, period)
    h = len(starts)
    baseline = parent_baselines(shares, history, config, cycle_date)
    out = shares[LEAF].loc[shares.index.repeat(h)].reset_index(drop=True)
    out["period_start"] = np.tile(starts.values, len(shares))
    out["cycle_date"] = cycle_date
    share = np.repeat(shares["share"].to_numpy(float), h)
    out["share"] = share
    out["parent_baseline"] = np.repeat(baseline, h)
    out["target"] = share * out["parent_baseline"].to_numpy()
    return out[TARGET_COLUMNS]
