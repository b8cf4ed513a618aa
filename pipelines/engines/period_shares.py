"""The period basis of the per-period share methods, and the shares of every child in every horizon period.

Two share methods give the established children a share per horizon period,
their *period basis* (`period_basis`); the share table holds their pooled
share over the window as `history_share`, which is both their one-row summary
and their fallback in any period without a basis:

- `seasonal` (shares by period of the year): the share of child j in horizon
  period h is the pooled share over the history periods with h's period of the
  year, taken from the `seasonal_years` (default 3) most recent occurrences of
  each period of the year before the cycle date. Period of the year: the ISO
  week number for weeks, with week 53 counted as week 52 (a long year's last
  two weeks pool as one period of the year, and a horizon week 53 reads week
  52's history), or the month for months. `seasonal_band` k > 0 pools the k
  neighbouring periods of the year on each side too, each from its own most
  recent occurrences (wrapping round the year: week 1's neighbours include
  week 52), damping noise at the cost of a flatter season. Shortage periods are
  left out. A parent without volume in the pooled periods of h's period of the
  year falls back to its pooled share in h.
- `children_forecast` (forecast proportions, Athanasopoulos, Ahmed & Hyndman 2009): the
  children's own base forecasts, from the models the class uses
  (`pipelines.engines.models.base_forecasts` run at leaf grain on the
  children's lifecycle history before the cycle date, shortage periods
  included as the forecast stage has them, negatives set to 0): share_{j,h} =
  yhat_{j,h} / sum_k yhat_{k,h} over the parent's established children. Where
  they are all 0 in a period, the pooled share is the basis there.

Where a per-period method fell back is recorded per parent and period
(`basis` = `pooled_fallback`). The period basis is computed once a cycle, by
the `period_basis` asset, and read by `reinitialized_target`.

`period_shares` applies the lifecycle rules of `pipelines.engines.shares` on
top of the weights, period by period, and names the reason where every share
of a parent is 0.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numba import njit

from pipelines.calendar import horizon_starts, ordinal_to_start, period_ordinal, season_length, span_bounds
from pipelines.engines.base_forecasts import base_forecasts
from pipelines.engines.lifecycle_shares import counts_by, reference_positions, split_shares
from pipelines.engines.series_grids import SeriesGrid, series_grid
from pipelines.engines.share_rows import shortage_periods
from pipelines.engines.share_settings import ShareSettings
from pipelines.keys import LEAF, PARENT, coded, factorize, lookup
from pipelines.vocabulary import (
    BASIS_OF_METHOD,
    NEW_CUSTOMER_RULES,
    PER_PERIOD_METHODS,
    Basis,
    ShareMethod,
    label_array,
)

# the `share_basis` (pipelines.schemas.SHARE_BASES) of a parent period where a per-period method has a basis


def period_of_year(starts: pd.DatetimeIndex | pd.Series, period: str) -> tuple[np.ndarray, np.ndarray]:
    """(period of the year 0..L-1, its year) of each period start.

    Weeks: ISO week number 1..52 -> 0..51, with ISO week 53 counted as week 52
    (so a long year's last two weeks are one period of the year), and the ISO
    year. Months: month 1..12 -> 0..11 and the calendar year.
    """
    idx = pd.DatetimeIndex(starts)
    if period == "week":
        iso = idx.isocalendar()
        return np.minimum(iso["week"].to_numpy(np.int64), 52) - 1, iso["year"].to_numpy(np.int64)
    return idx.month.to_numpy(np.int64) - 1, idx.year.to_numpy(np.int64)


def seasonal_periods(cycle_ord: int, period: str, years: int) -> tuple[np.ndarray, np.ndarray]:
    """(ordinal, period of the year) of the history periods the `seasonal` method pools.

    For each period of the year, its `years` most recent occurrences before the
    cycle date (week 52 and the folded week 53 of one ISO year are one
    occurrence). Counted on the calendar, not on the data: a child without
    history in some of them simply has nothing there.
    """
    span = (years + 1) * (season_length(period) + 1)
    ords = np.arange(cycle_ord - span, cycle_ord)
    poy, year = period_of_year(ordinal_to_start(ords, period), period)
    newest = np.full(season_length(period), np.iinfo(np.int64).min)
    np.maximum.at(newest, poy, year)
    keep = year > newest[poy] - years
    return ords[keep], poy[keep]


def seasonal_shares(
    ordinal: np.ndarray,
    qty: np.ndarray,
    child: np.ndarray,
    parent_of_child: np.ndarray,
    n_parents: int,
    cycle_ord: int,
    horizon_poy: np.ndarray,
    period: str,
    years: int,
    band: int,
) -> tuple[np.ndarray, np.ndarray]:
    """(share (n, H), has_volume (n_parents, H)) of the `seasonal` method.

    share_{j,h} = sum of y_j over the pooled periods (`seasonal_periods`) whose
    period of the year lies within `band` of h's, divided by the same sum over
    all children of j's parent (the band wraps round the year: week 1's
    neighbours include week 52). has_volume is False where that parent sum is
    0; there share is 0 and the caller falls back.
    """
    length = season_length(period)
    n = len(parent_of_child)
    pooled_ords, pooled_poy = seasonal_periods(cycle_ord, period, years)
    lo = int(pooled_ords.min())
    table = np.full(cycle_ord - lo, -1, dtype=np.int64)  # period of the year of each pooled ordinal, -1 = not pooled
    table[pooled_ords - lo] = pooled_poy
    at = ordinal - lo
    poy = np.where((at >= 0) & (at < len(table)), table[np.clip(at, 0, len(table) - 1)], -1)
    inside = poy >= 0
    cells = np.bincount(child[inside] * length + poy[inside], weights=qty[inside], minlength=n * length)
    m = cells.astype(float).reshape(n, length)  # float even without rows (bincount of nothing is int)
    if band:
        m = sum(np.roll(m, d, axis=1) for d in range(-band, band + 1))
    child_h = m[:, horizon_poy]
    parent_h = np.zeros((n_parents, len(horizon_poy)))
    np.add.at(parent_h, parent_of_child, child_h)
    denominator = parent_h[parent_of_child]
    share = np.divide(child_h, denominator, out=np.zeros_like(child_h), where=denominator > 0)
    return share, parent_h > 0


def children_forecasts(
    history: pd.DataFrame, children: pd.DataFrame, settings: ShareSettings, cycle_ord: int, horizon: int
) -> np.ndarray:
    """(n, horizon) base forecasts of `children` at leaf grain, with the models of each child's class.

    The forecast stage's own functions (`series_grid`, `base_forecasts` with the
    class forecast bottom-up, i.e. at leaf grain only) on the children's
    lifecycle history before the cycle date; negative values are set to 0
    there.
    """
    code = coded(history).leaf_rows(children)
    ok = code >= 0
    settings = ShareSettings.of(settings)
    ords = period_ordinal(history["period_start"], settings.period)[ok]
    grid = series_grid(code[ok], ords, history["quantity"].to_numpy(float)[ok], len(children), cycle_ord)
    no_parents = SeriesGrid(series=np.zeros(0, np.int64), ordinal=np.zeros(0, np.int64), y=np.zeros(0), n_series=0)
    classes = children["product_class"].to_numpy(object)
    strategies = {name: "bottom_up" for name in pd.unique(classes)}
    return base_forecasts(
        no_parents, grid, np.zeros(0, dtype=object), classes, strategies, settings.models, horizon
    ).leaf_fc


def period_basis(
    shares: pd.DataFrame,
    history: pd.DataFrame | None,
    settings: ShareSettings,
    cycle_date: pd.Timestamp,
    horizon: int | None = None,
    labels: bool = True,
) -> tuple[np.ndarray, np.ndarray | None]:
    """(weight, share_basis (n, H)): each share-table row's history share in every horizon period.

    weight is (n, H), or the (n,) history shares when no row has a per-period
    method (the same in every period; `split_shares` takes either).

    Classes with one share per child: the row's `history_share` in every period
    (`history_share`). `seasonal` and `forecast_proportions`: the established
    children's share of the period (`period_of_year`, `children_forecast`; see
    the module docstring), else, where the parent has no basis in that period,
    the pooled `history_share` (`pooled_fallback`). share_basis is the same on
    every child of a parent in a period. New customers' weights are left to
    `split_shares`, which ignores them. H is `horizon` (default: the calendar's).
    history (lifecycle history) may be None only when no row has a per-period method. labels False: a
    caller that reads the weights only; share_basis is None where no row has a per-period method.
    """
    settings = ShareSettings.of(settings)
    period = settings.period
    h = horizon or settings.horizon
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    history_share = shares["history_share"].to_numpy(float)
    methods = shares["method"].to_numpy(object)
    per_period = np.isin(methods, PER_PERIOD_METHODS).any()
    if not per_period and not labels:
        return history_share, None
    parent_code, parents = factorize(shares, PARENT)
    label = label_array((len(parents), h), "history_share")
    if not per_period:
        return history_share, label[parent_code]
    weight = np.repeat(history_share[:, None], h, axis=1)
    if history is None:
        raise ValueError(
            f"the shares of methods {list(PER_PERIOD_METHODS)} differ per period and need the lifecycle history"
        )

    established = ~np.isin(shares["lifecycle_rule"].to_numpy(object), NEW_CUSTOMER_RULES)
    classes = shares["product_class"].to_numpy(object)
    horizon_poy, _ = period_of_year(horizon_starts(cycle_date, h, period), period)
    child_of_row = coded(history).leaf_rows(shares)
    row_ok = (child_of_row >= 0) & ~shortage_periods(history, settings.exclude_shortages)
    ords = period_ordinal(history["period_start"], period)
    qty = history["quantity"].to_numpy(float)
    fp = (methods == ShareMethod.CHILDREN_FORECAST) & established
    forecasts = children_forecasts(history, shares[fp], settings, cycle_ord, h) if fp.any() else np.zeros((0, h))
    for name in pd.unique(classes[np.isin(methods, PER_PERIOD_METHODS)]):  # a few classes, not a loop over series
        pc = settings.rules[name]
        in_class = classes == name
        members = in_class & established
        pos = np.cumsum(members) - 1  # row -> member index
        p_code, p_members = factorize(shares[members], PARENT)
        if pc.method == "seasonal":
            rows = row_ok & members[np.clip(child_of_row, 0, None)]
            share, has = seasonal_shares(
                ords[rows],
                qty[rows],
                pos[child_of_row[rows]],
                p_code,
                len(p_members),
                cycle_ord,
                horizon_poy,
                period,
                pc.years,
                pc.band,
            )
        else:
            f = forecasts[np.cumsum(fp)[members] - 1]
            total = np.zeros((len(p_members), h))
            np.add.at(total, p_code, f)
            share = np.divide(f, total[p_code], out=np.zeros_like(f), where=total[p_code] > 0)
            has = total > 0
        weight[members] = np.where(has[p_code], share, history_share[members, None])
        # every parent of the class: a parent without established children has no basis of its own
        label[parent_code[in_class]] = "pooled_fallback"
        member_of_parent = lookup(parents, PARENT, p_members)
        with_members = np.flatnonzero(member_of_parent >= 0)
        label[with_members] = np.where(
            has[member_of_parent[with_members]], BASIS_OF_METHOD[pc.method], "pooled_fallback"
        )
    return weight, label[parent_code]


def period_shares(
    shares: pd.DataFrame,
    settings: ShareSettings,
    cycle_date: pd.Timestamp,
    products: pd.DataFrame | None = None,
    history: pd.DataFrame | None = None,
    horizon: int | None = None,
    basis: tuple[np.ndarray, np.ndarray] | None = None,
    reasons: bool = True,
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """(share, zero_reason (None where shares sum to 1), basis), each (n, H), per share-table row.

    products: the product master, to tell `product_not_active` from
    `no_active_child` (without it, every product counts as active).
    history: the lifecycle history, needed by the per-period share methods
    (`period_basis`) unless `basis` gives their (weight, basis) as decided
    once for the cycle (`stored_basis`). horizon: H, default the calendar's. reasons False: the shares
    only (zero_reason None, and basis None unless a per-period method made one), for a caller that reads
    nothing else (a named share basis of the plan).
    """
    settings = ShareSettings.of(settings)
    period = settings.period
    starts = horizon_starts(cycle_date, horizon or settings.horizon, period)
    h_ord = period_ordinal(starts, period)
    first = period_ordinal(pd.DatetimeIndex(shares["first_active_period"]), period)
    last = period_ordinal(pd.DatetimeIndex(shares["last_active_period"]), period)
    active = (h_ord[None, :] >= first[:, None]) & (h_ord[None, :] <= last[:, None])
    parent_code, parents = factorize(shares, PARENT)
    n_parents = len(parents)
    rule = shares["lifecycle_rule"].to_numpy(object)
    if basis is None:
        basis = period_basis(shares, history, settings, cycle_date, len(starts), labels=reasons)
    weight, basis = basis
    share, all_zero = split_shares(
        parent_code,
        n_parents,
        weight,
        rule,
        reference_positions(shares, parent_code),
        shares["scale"].to_numpy(float),
        shares["initial_share"].to_numpy(float),
        active,
    )
    if not reasons:
        return share, None, basis

    any_active = counts_by(active, parent_code, n_parents)
    non_waiting = counts_by(active, parent_code, n_parents, keep=rule != "awaiting_history")
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


def basis_table(shares: pd.DataFrame, weight: np.ndarray, basis: np.ndarray, starts: pd.DatetimeIndex) -> pd.DataFrame:
    """The period basis of the children of per-period methods, long: leaf keys, period_start, weight, basis."""
    rows = np.flatnonzero(shares["method"].isin(PER_PERIOD_METHODS).to_numpy())
    h = len(starts)
    w = np.broadcast_to(weight if weight.ndim == 2 else weight[:, None], (len(shares), h))
    out = shares[LEAF].iloc[np.repeat(rows, h)].reset_index(drop=True)
    out["period_start"] = np.tile(starts.values, len(rows))
    out["weight"] = w[rows].ravel()
    out["basis"] = basis[rows].ravel()
    return out


def stored_basis(shares: pd.DataFrame, table: pd.DataFrame, starts: pd.DatetimeIndex) -> tuple[np.ndarray, np.ndarray]:
    """(weight, basis) per share-table row and horizon period from the stored period basis (`basis_table`).

    Children the table does not hold (one share per child) weigh their
    history share in every period, with basis `history_share`; without any
    row the weight is that one share per child.
    """
    history_share = shares["history_share"].to_numpy(float)
    label = label_array((len(shares), len(starts)), str(Basis.HISTORY_SHARE))
    if table.empty:
        return history_share, label
    weight = np.repeat(history_share[:, None], len(starts), axis=1)
    row = lookup(table, LEAF, shares)
    col = pd.DatetimeIndex(starts).get_indexer(pd.DatetimeIndex(table["period_start"]))
    ok = (row >= 0) & (col >= 0)
    weight[row[ok], col[ok]] = table["weight"].to_numpy(float)[ok]
    label[row[ok], col[ok]] = table["basis"].to_numpy(object)[ok]
    return weight, label


@njit(cache=True)
def share_steps(ids, when, share, tolerance, n_ids):
    """(in_runs, rows): where each id's rows are one run with `when` not decreasing inside it, the rows whose
    share differs from the row before of the same id by more than `tolerance` (|a - b| > tolerance; NaN never
    does), ascending; else (False, -). ids: 0..n_ids-1. One pass over the rows."""
    n = len(ids)
    rows = np.empty(n, dtype=np.int64)
    seen = np.zeros(n_ids, dtype=np.bool_)
    k = 0
    if n:
        seen[ids[0]] = True
    for i in range(1, n):
        if ids[i] != ids[i - 1]:
            if seen[ids[i]]:  # a second run of the same id
                return False, rows[:0]
            seen[ids[i]] = True
        elif when[i] < when[i - 1]:
            return False, rows[:0]
        elif abs(share[i] - share[i - 1]) > tolerance:
            rows[k] = i
            k += 1
    return True, rows[:k].copy()
