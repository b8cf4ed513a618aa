"""Stage 5, `reinitialized_target`: the target measure rewritten from fresh shares, per period.

For every child and every horizon period h:

    target_{j,h} = share_{j,h} x baseline_P,

share_{j,h} being the child's share in period h: the base shares of the
children active in h, renormalised over them (`share_tables.split_shares`;
a child before its first or after its last active period has 0, and a
reference keeps its whole share until its new customer starts). The
established children's weights in h are their history shares, or, for the
per-period share methods `seasonal` and `forecast_proportions`, their basis
of period h (`share_tables.period_basis`, computed here from the lifecycle
history); every lifecycle rule applies on top of these weights. `share_basis`
records per parent and period what the weights came from: `history_share`,
`period_of_year`, `children_forecast`, or `pooled_fallback` where a per-period
method had no basis in the period. Per parent and period the shares sum to 1,
or are all 0 with `zero_share_reason`:

- `product_not_active` - the product's own span does not cover the period;
- `no_active_child` - no customer span covers it;
- `awaiting_history` - the only active children are new customers without
  a reference or initial share;
- `no_share_among_active` - the active children hold no share (e.g. none of
  them had volume in the window, or their initial shares are 0).

The forecast stage sets such a parent period to 0, so nothing is forecast that
no child could carry.

baseline_P is the parent's mean per period over the window its share used:
the parent's volume in that window divided by the window's periods, or by
fewer periods when the parent's history starts inside the window. Periods
with a recorded shortage (`share_tables.shortage_periods`) are left out of
both: the volume leaves out their rows and the divisor their count. A parent
that fell back to an even split has no volume in any window, so its baseline
is 0.

Because the target is overwritten every cycle, the pro-rata split of the next
forecast follows this cycle's shares, not whatever the children held before.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, period_ordinal, span_bounds
from pipelines.config import PlanningConfig
from pipelines.keys import LEAF, PARENT, factorize, lookup
from pipelines.stages.share_tables import period_basis, reference_positions, shortage_periods, split_shares

TARGET_COLUMNS = LEAF + ["period_start", "cycle_date", "target", "share", "parent_baseline", "zero_share_reason", "share_basis"]


def parent_baselines(shares: pd.DataFrame, history: pd.DataFrame, config: PlanningConfig, cycle_date: pd.Timestamp) -> np.ndarray:
    """Baseline of each share-table row's parent (same value on all its children)."""
    period = config.calendar.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    parent_code, parents = factorize(shares, PARENT)
    n_parents = len(parents)
    window_used = np.zeros(n_parents, dtype=np.int64)
    window_used[parent_code] = shares["window_used"].to_numpy()

    row_parent = lookup(history, PARENT, parents)
    ok = row_parent >= 0
    short = shortage_periods(history, config)[ok]
    row_parent = row_parent[ok]
    age = cycle_ord - period_ordinal(history["period_start"], period)[ok]
    qty = history["quantity"].to_numpy(float)[ok]
    oldest = np.zeros(n_parents, dtype=np.int64)
    np.maximum.at(oldest, row_parent, age)  # history length of each parent, in periods
    span = np.minimum(window_used, oldest)
    inside = (age >= 1) & (age <= span[row_parent])
    volume = np.bincount(row_parent[inside & ~short], weights=qty[inside & ~short], minlength=n_parents)
    # shortage periods inside the window: distinct (parent, age) pairs
    m = inside & short
    pairs = np.unique(np.stack([row_parent[m], age[m]], axis=1), axis=0)
    periods = span - np.bincount(pairs[:, 0], minlength=n_parents)
    baseline = np.divide(volume, periods, out=np.zeros(n_parents), where=periods > 0)
    return baseline[parent_code]


def period_shares(
    shares: pd.DataFrame,
    config: PlanningConfig,
    cycle_date: pd.Timestamp,
    products: pd.DataFrame | None = None,
    history: pd.DataFrame | None = None,
    horizon: int | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(share, zero_share_reason (None where shares sum to 1), share_basis), each (n, H), per share-table row.

    products: the product master, to tell `product_not_active` from
    `no_active_child` (without it, every product counts as active).
    history: the lifecycle history, needed by the per-period share methods
    (`share_tables.period_basis`). horizon: H, default the calendar's.
    """
    period = config.calendar.period
    starts = horizon_starts(cycle_date, horizon or config.calendar.horizon, period)
    h_ord = period_ordinal(starts, period)
    first = period_ordinal(pd.DatetimeIndex(shares["first_active_period"]), period)
    last = period_ordinal(pd.DatetimeIndex(shares["last_active_period"]), period)
    active = (h_ord[None, :] >= first[:, None]) & (h_ord[None, :] <= last[:, None])
    parent_code, parents = factorize(shares, PARENT)
    n_parents = len(parents)
    rule = shares["lifecycle_rule"].to_numpy(object)
    weight, basis = period_basis(shares, history, config, cycle_date, len(starts))
    share, all_zero = split_shares(
        parent_code,
        n_parents,
        weight,
        rule,
        reference_positions(shares),
        shares["scale"].to_numpy(float),
        shares["initial_share"].to_numpy(float),
        active,
    )

    any_active = np.zeros((n_parents, len(starts)), dtype=bool)
    np.logical_or.at(any_active, parent_code, active)
    non_waiting = np.zeros_like(any_active)
    np.logical_or.at(non_waiting, parent_code, active & (rule != "awaiting_history")[:, None])
    product_active = np.ones_like(any_active)
    if products is not None:
        p_from, p_to = span_bounds(products, period)
        pos = lookup(parents, ["product"], products)
        pf = np.where(pos >= 0, p_from[np.clip(pos, 0, None)], np.nan)[:, None]
        pt = np.where(pos >= 0, p_to[np.clip(pos, 0, None)], np.nan)[:, None]
        with np.errstate(invalid="ignore"):
            product_active = (np.isnan(pf) | (h_ord[None, :] >= pf)) & (np.isnan(pt) | (h_ord[None, :] <= pt))
    reason = np.select(
        [~product_active, ~any_active, ~non_waiting],
        ["product_not_active", "no_active_child", "awaiting_history"],
        "no_share_among_active",
    ).astype(object)
    reason[~all_zero] = None
    return share, reason[parent_code], basis


def reinitialize_target(
    shares: pd.DataFrame,
    history: pd.DataFrame,
    config: PlanningConfig,
    cycle_date: pd.Timestamp,
    products: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """One row per child and horizon period: target = period share x parent baseline."""
    period = config.calendar.period
    starts = horizon_starts(cycle_date, config.calendar.horizon, period)
    h = len(starts)
    shares = shares.reset_index(drop=True)
    baseline = parent_baselines(shares, history, config, cycle_date)
    share, reason, basis = period_shares(shares, config, cycle_date, products, history)
    out = shares[LEAF].loc[shares.index.repeat(h)].reset_index(drop=True)
    out["period_start"] = np.tile(starts.values, len(shares))
    out["cycle_date"] = cycle_date
    out["share"] = share.ravel()
    out["parent_baseline"] = np.repeat(baseline, h)
    out["target"] = out["share"].to_numpy() * out["parent_baseline"].to_numpy()
    out["zero_share_reason"] = reason.ravel()
    out["share_basis"] = basis.ravel()
    return out[TARGET_COLUMNS]


def parents_with_mix_change(target: pd.DataFrame, shares: pd.DataFrame, tolerance: float = 1e-9) -> pd.DataFrame:
    """Parents whose children's shares change inside the horizon, with when and who.

    Columns: product, site, first_change (first period whose shares differ from
    the period before), periods_with_change, phasing_in, phasing_out (customers
    whose share starts or stops inside the horizon), zero_periods.
    """
    if target.empty:
        return pd.DataFrame(columns=PARENT + ["first_change", "periods_with_change", "phasing_in", "phasing_out", "zero_periods"])
    t = target.sort_values(LEAF + ["period_start"], kind="stable")
    previous = t.groupby(LEAF, sort=False)["share"].shift()
    changed = (t["share"] - previous).abs() > tolerance
    change = t.loc[changed.to_numpy(), PARENT + ["period_start"]].drop_duplicates()
    per_parent = change.groupby(PARENT, sort=True).agg(
        first_change=("period_start", "min"), periods_with_change=("period_start", "size")
    )
    if per_parent.empty:
        return per_parent.reset_index().assign(phasing_in="", phasing_out="", zero_periods=0)
    start, end = target["period_start"].min(), target["period_start"].max()
    s = shares.set_index(PARENT)

    def customers(mask: pd.Series) -> pd.Series:
        rows = s[mask.to_numpy()]
        return rows.groupby(level=PARENT)["customer"].agg(lambda c: ", ".join(sorted(c)))

    in_ = customers((shares["first_active_period"] > start) & (shares["lifecycle_rule"] != "awaiting_history"))
    out_ = customers(shares["last_active_period"] < end)
    zero = target[target["zero_share_reason"].notna()].drop_duplicates(PARENT + ["period_start"]).groupby(PARENT).size()
    per_parent["phasing_in"] = in_.reindex(per_parent.index).fillna("")
    per_parent["phasing_out"] = out_.reindex(per_parent.index).fillna("")
    per_parent["zero_periods"] = zero.reindex(per_parent.index).fillna(0).astype(np.int64)
    return per_parent.reset_index()
