"""Stage 6, `statistical_forecast`: the forecast rerun, then split to the leaf.

Per product class the forecast runs at the class's `forecast_grain`:

- `product_site` (default): one series per parent, the sum of its children's
  lifecycle history. Each parent's forecast is split pro rata to its children
  by `reinitialized_target`, period by period:
  leaf_{j,h} = F_{P,h} x target_{j,h} / sum_k target_{k,h}; where a parent's
  targets sum to 0 (it fell back to an even split) the period's shares are
  the basis. A parent period whose shares are all 0 (`zero_share_reason`:
  the product or every customer span has ended, or no active child holds a
  share) is forecast as 0 and the reason is kept in `zero_reason`, so the
  children always sum to the parent.
- `product_site_customer`: one series per child (bottom-up); the parent's
  forecast is the sum of its children's. A child is forecast 0 outside its
  active periods (before its span or product starts, after either ends). The
  new-customer share rules do not apply at this grain: each child is
  forecast from its own history.

Each series gets a demand class (Syntetos, Boylan & Croston 2005, cut-offs
ADI = 1.32 and CV^2 = 0.49). ADI convention used here: the number of periods
from the series' first non-zero period to the end of history, divided by the
number of non-zero periods. CV^2 is the squared coefficient of variation of
the non-zero sizes (population variance, ddof = 0); one non-zero period has
CV^2 = 0. A series without any demand is `no_demand` and is forecast as 0.

The model per demand class comes from the config and runs through
statsforecast; a model that fails on a series falls back to the naive
forecast. Negative forecasts (possible from a trended ETS) are set to 0.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd
from statsforecast import StatsForecast
from statsforecast import models as sfm

from pipelines.calendar import horizon_starts, period_ordinal, season_length
from pipelines.config import ModelChoice, ModelName, PlanningConfig
from pipelines.keys import LEAF, PARENT, factorize, lookup

ADI_CUTOFF = 1.32
CV2_CUTOFF = 0.49

PARENT_COLUMNS = ["cycle_date", "product_class", "product", "site", "period_start", "forecast", "model", "demand_class", "forecast_grain", "zero_reason"]
LEAF_COLUMNS = LEAF + ["period_start", "cycle_date", "product_class", "forecast", "parent_forecast", "split_basis"]


@dataclass(frozen=True)
class ForecastResult:
    parent: pd.DataFrame
    leaf: pd.DataFrame
    negatives_clipped: int


@dataclass(frozen=True)
class SeriesGrid:
    """Dense history of n series, each from its first non-zero period to the period before the cycle.

    `series`, `ordinal`, `y` are aligned long arrays; a series without demand has no rows.
    """

    series: np.ndarray
    ordinal: np.ndarray
    y: np.ndarray
    n_series: int


def series_grid(code: np.ndarray, ordinal: np.ndarray, qty: np.ndarray, n_series: int, end_ord: int) -> SeriesGrid:
    """Sum rows per (series, period) and lay each series out densely with zeros filled."""
    keep = ordinal < end_ord
    code, ordinal, qty = code[keep], ordinal[keep], qty[keep]
    nz = qty > 0
    first = np.full(n_series, end_ord, dtype=np.int64)
    np.minimum.at(first, code[nz], ordinal[nz])
    length = end_ord - first
    offset = np.concatenate([[0], np.cumsum(length)[:-1]])
    total = int(length.sum())
    series = np.repeat(np.arange(n_series), length)
    ords = first[series] + (np.arange(total) - offset[series])
    inside = ordinal >= first[code]
    y = np.bincount(offset[code[inside]] + ordinal[inside] - first[code[inside]], weights=qty[inside], minlength=total)
    return SeriesGrid(series=series, ordinal=ords, y=y, n_series=n_series)


def demand_classes(grid: SeriesGrid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(demand_class, adi, cv2) per series; see the module docstring for the conventions."""
    n = grid.n_series
    length = np.bincount(grid.series, minlength=n)
    nz = grid.y > 0
    count = np.bincount(grid.series[nz], minlength=n)
    total = np.bincount(grid.series[nz], weights=grid.y[nz], minlength=n)
    squares = np.bincount(grid.series[nz], weights=grid.y[nz] ** 2, minlength=n)
    with np.errstate(invalid="ignore", divide="ignore"):
        adi = np.where(count > 0, length / count, np.nan)
        mean = total / count
        var = np.clip(squares / count - mean**2, 0, None)
        cv2 = np.where(count > 0, var / mean**2, np.nan)
    cls = np.where(
        adi < ADI_CUTOFF, np.where(cv2 < CV2_CUTOFF, "smooth", "erratic"), np.where(cv2 < CV2_CUTOFF, "intermittent", "lumpy")
    ).astype(object)
    cls[count == 0] = "no_demand"
    return cls, adi, cv2


def make_model(name: ModelName, season: int):
    """The statsforecast model object for a config model name (season 1 = non-seasonal)."""
    if name == "auto_ets":
        return sfm.AutoETS(season_length=season)
    if name == "ses":
        return sfm.SimpleExponentialSmoothingOptimized()
    if name == "seasonal_naive":
        return sfm.SeasonalNaive(season_length=season)
    if name == "croston_classic":
        return sfm.CrostonClassic()
    if name == "croston_sba":
        return sfm.CrostonSBA()
    if name == "croston_optimized":
        return sfm.CrostonOptimized()
    if name == "adida":
        return sfm.ADIDA()
    if name == "imapa":
        return sfm.IMAPA()
    raise ValueError(f"unknown model {name!r}")


def model_label(name: str, season: int) -> str:
    return f"{name}(season_length={season})" if name in ("auto_ets", "seasonal_naive") else name


def assign_models(demand: np.ndarray, length: np.ndarray, choice: ModelChoice, period: str) -> tuple[np.ndarray, np.ndarray]:
    """Model name and season length per series of one product class."""
    names = np.empty(len(demand), dtype=object)
    for dc in ("smooth", "erratic", "intermittent", "lumpy"):
        names[demand == dc] = getattr(choice, dc)
    names[demand == "no_demand"] = "zero"
    sl = season_length(period)
    seasonal_ok = choice.seasonal & (length >= 2 * sl)
    uses_season = np.isin(names, ["auto_ets", "seasonal_naive"])
    season = np.where(seasonal_ok & uses_season, sl, 1)
    return names, season


def run_models(grid: SeriesGrid, names: np.ndarray, season: np.ndarray, horizon: int, log: Callable[[str], None] | None = None) -> np.ndarray:
    """Forecast matrix (n_series, horizon); one statsforecast call per (model, season) group."""
    fc = np.zeros((grid.n_series, horizon))
    groups = pd.DataFrame({"name": names, "season": season})
    for (name, s), idx in groups.groupby(["name", "season"], sort=True).groups.items():
        if name == "zero":
            continue
        ids = np.asarray(idx)
        rows = np.isin(grid.series, ids)
        df = pd.DataFrame({"unique_id": grid.series[rows], "ds": grid.ordinal[rows], "y": grid.y[rows]})
        sf = StatsForecast(models=[make_model(name, int(s))], freq=1, n_jobs=1, fallback_model=sfm.Naive())
        started = time.perf_counter()
        out = sf.forecast(df=df, h=horizon)
        if log:
            log(f"{model_label(name, int(s))}: {len(ids)} series in {time.perf_counter() - started:.1f} s")
        values = out.iloc[:, 2].to_numpy(float).reshape(-1, horizon)
        fc[out["unique_id"].to_numpy()[::horizon]] = values
    return fc


def forecast_cycle(
    history: pd.DataFrame,
    children: pd.DataFrame,
    target: pd.DataFrame,
    config: PlanningConfig,
    cycle_date: pd.Timestamp,
    log: Callable[[str], None] | None = None,
) -> ForecastResult:
    """Parent and leaf forecasts for the horizon; see the module docstring.

    children: leaf keys and product_class, optionally first/last_active_period
    (absent = active in the whole horizon). target: `reinitialized_target`.
    """
    period = config.calendar.period
    horizon = config.calendar.horizon
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    starts = horizon_starts(cycle_date, horizon, period)
    children = children.reset_index(drop=True)
    parent_of_child, parents = factorize(children, PARENT)
    parents["product_class"] = children["product_class"].to_numpy()[np.unique(parent_of_child, return_index=True)[1]]
    n_parents, n_children = len(parents), len(children)
    ords = period_ordinal(history["period_start"], period)
    qty = history["quantity"].to_numpy(float)

    p_code = lookup(history, PARENT, parents)
    ok = p_code >= 0
    p_grid = series_grid(p_code[ok], ords[ok], qty[ok], n_parents, cycle_ord)
    p_demand, _, _ = demand_classes(p_grid)
    p_length = np.bincount(p_grid.series, minlength=n_parents)

    leaf_grain_classes = [n for n, pc in config.product_classes.items() if pc.forecast_grain == "product_site_customer"]
    leaf_grain_parent = parents["product_class"].isin(leaf_grain_classes).to_numpy()
    parent_fc = np.zeros((n_parents, horizon))
    parent_model = np.full(n_parents, "bottom_up", dtype=object)
    for name, pc in config.product_classes.items():
        members = (parents["product_class"] == name).to_numpy() & ~leaf_grain_parent
        if not members.any():
            continue
        names, season = assign_models(p_demand[members], p_length[members], pc.models, period)
        sub = _subgrid(p_grid, members)
        parent_fc[members] = run_models(sub, names, season, horizon, log)
        parent_model[members] = [model_label(a, int(b)) for a, b in zip(names, season)]

    # leaf-grain classes: forecast every child, parent = sum of children
    leaf_fc = np.zeros((n_children, horizon))
    child_leaf_grain = leaf_grain_parent[parent_of_child]
    if child_leaf_grain.any():
        c_code = lookup(history, LEAF, children)
        okc = (c_code >= 0) & child_leaf_grain[np.clip(c_code, 0, None)]
        c_grid = series_grid(c_code[okc], ords[okc], qty[okc], n_children, cycle_ord)
        c_demand, _, _ = demand_classes(c_grid)
        c_length = np.bincount(c_grid.series, minlength=n_children)
        for name in leaf_grain_classes:
            members = (children["product_class"] == name).to_numpy()
            if not members.any():
                continue
            names, season = assign_models(c_demand[members], c_length[members], config.product_classes[name].models, period)
            leaf_fc[members] = run_models(_subgrid(c_grid, members), names, season, horizon, log)

    negatives = int((parent_fc < 0).sum() + (leaf_fc < 0).sum())
    parent_fc = np.clip(parent_fc, 0, None)
    leaf_fc = np.clip(leaf_fc, 0, None)

    # lifecycle: no leaf volume outside a child's active periods; no parent volume where no child can carry it
    active = _active_matrix(children, starts, period)
    leaf_fc = np.where(active, leaf_fc, 0.0)
    zero_reason = _parent_reasons(target, parents, starts)
    no_active_child = np.isin(zero_reason, ["product_not_active", "no_active_child"])
    zeroed = np.where(leaf_grain_parent[:, None], no_active_child, pd.notna(zero_reason))
    zero_reason = np.where(zeroed, zero_reason, None)
    parent_fc[zeroed] = 0.0
    parent_fc[leaf_grain_parent] = 0.0
    np.add.at(parent_fc, parent_of_child[child_leaf_grain], leaf_fc[child_leaf_grain])

    # top-down split by the reinitialized target (the period's share where the targets are all 0)
    target_m = _leaf_matrix(target, children, "target", starts)
    share_m = _leaf_matrix(target, children, "share", starts)
    target_sum = np.zeros((n_parents, horizon))
    np.add.at(target_sum, parent_of_child, target_m)
    use_target = target_sum[parent_of_child] > 0
    basis = np.where(use_target, target_m, share_m)
    basis_sum = np.zeros((n_parents, horizon))
    np.add.at(basis_sum, parent_of_child, basis)
    denom = basis_sum[parent_of_child]
    split = parent_fc[parent_of_child] * np.divide(basis, denom, out=np.zeros_like(basis), where=denom > 0)
    leaf_fc = np.where(child_leaf_grain[:, None], leaf_fc, split)
    split_basis = np.where(child_leaf_grain[:, None], "own_forecast", np.where(use_target, "target", "share"))

    parent_out = parents[PARENT].loc[parents.index.repeat(horizon)].reset_index(drop=True)
    parent_out.insert(0, "product_class", np.repeat(parents["product_class"].to_numpy(), horizon))
    parent_out.insert(0, "cycle_date", cycle_date)
    parent_out["period_start"] = np.tile(starts.values, n_parents)
    parent_out["forecast"] = parent_fc.ravel()
    parent_out["model"] = np.repeat(parent_model, horizon)
    parent_out["demand_class"] = np.repeat(p_demand, horizon)
    parent_out["forecast_grain"] = np.repeat(np.where(leaf_grain_parent, "product_site_customer", "product_site"), horizon)
    parent_out["zero_reason"] = zero_reason.ravel()

    leaf_out = children[LEAF].loc[children.index.repeat(horizon)].reset_index(drop=True)
    leaf_out["period_start"] = np.tile(starts.values, n_children)
    leaf_out["cycle_date"] = cycle_date
    leaf_out["product_class"] = np.repeat(children["product_class"].to_numpy(), horizon)
    leaf_out["forecast"] = leaf_fc.ravel()
    leaf_out["parent_forecast"] = parent_fc[parent_of_child].ravel()
    leaf_out["split_basis"] = split_basis.ravel()
    return ForecastResult(parent=parent_out[PARENT_COLUMNS], leaf=leaf_out[LEAF_COLUMNS], negatives_clipped=negatives)


def _subgrid(grid: SeriesGrid, members: np.ndarray) -> SeriesGrid:
    """The grid restricted to `members` (a mask over series), renumbered 0..k-1."""
    new_id = np.cumsum(members) - 1
    rows = members[grid.series]
    return SeriesGrid(series=new_id[grid.series[rows]], ordinal=grid.ordinal[rows], y=grid.y[rows], n_series=int(members.sum()))


def _active_matrix(children: pd.DataFrame, starts: pd.DatetimeIndex, period: str) -> np.ndarray:
    """(n_children, horizon) bool: the child is active in the period (all True without the span columns)."""
    if not {"first_active_period", "last_active_period"} <= set(children.columns):
        return np.ones((len(children), len(starts)), dtype=bool)
    h = period_ordinal(starts, period)[None, :]
    first = period_ordinal(pd.DatetimeIndex(children["first_active_period"]), period)[:, None]
    last = period_ordinal(pd.DatetimeIndex(children["last_active_period"]), period)[:, None]
    return (h >= first) & (h <= last)


def _parent_reasons(target: pd.DataFrame, parents: pd.DataFrame, starts: pd.DatetimeIndex) -> np.ndarray:
    """(n_parents, horizon) zero_share_reason of each parent period (None where its shares sum to 1)."""
    out = np.full((len(parents), len(starts)), None, dtype=object)
    if target.empty or "zero_share_reason" not in target.columns:
        return out
    rows = target[target["zero_share_reason"].notna()]
    row = lookup(rows, PARENT, parents)
    col = pd.DatetimeIndex(starts).get_indexer(pd.DatetimeIndex(rows["period_start"]))
    ok = (row >= 0) & (col >= 0)
    out[row[ok], col[ok]] = rows["zero_share_reason"].to_numpy(object)[ok]
    return out


def _leaf_matrix(frame: pd.DataFrame, children: pd.DataFrame, column: str, starts: pd.DatetimeIndex) -> np.ndarray:
    """(n_children, horizon) matrix of `column` from a long leaf x period frame (0 where absent)."""
    out = np.zeros((len(children), len(starts)))
    if frame.empty:
        return out
    row = lookup(frame, LEAF, children)
    col = pd.DatetimeIndex(starts).get_indexer(pd.DatetimeIndex(frame["period_start"]))
    ok = (row >= 0) & (col >= 0)
    out[row[ok], col[ok]] = frame[column].to_numpy(float)[ok]
    return out
