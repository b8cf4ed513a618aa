"""Base forecasts of both grains for one forecast origin: each class's models at the grains its strategy needs.

`base_forecasts` runs `pipelines.engines.models` at parent and leaf grain for
the classes whose strategy needs that grain (`pipelines.engines.hierarchy`),
with in-sample residuals over a common window where MinT or WLS needs them.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.engines.hierarchy import NEEDS_LEAF, NEEDS_PARENT, NEEDS_RESIDUALS
from pipelines.engines.models import ModelSettings, assign_models, demand_classes, run_model_groups
from pipelines.engines.seasonal_base import SeasonPlan
from pipelines.engines.series_grids import SeriesGrid
from pipelines.vocabulary import Seasonality


def residual_matrix(grid: SeriesGrid, fitted: np.ndarray, start_ord: int, end_ord: int) -> np.ndarray:
    """(n_series, end_ord - start_ord) in-sample residuals y - fitted; 0 where a series has no value or no fit.

    Before its first demand a series had 0 and a forecast of 0, so a zero
    residual there is the truth, not a guess; periods before `start_ord` are
    left out.
    """
    width = end_ord - start_ord
    out = np.zeros((grid.n_series, width))
    res = grid.y - fitted
    ok = np.isfinite(res) & (grid.ordinal >= start_ord) & (grid.ordinal < end_ord)
    out[grid.series[ok], grid.ordinal[ok] - start_ord] = res[ok]
    return out


@dataclass(frozen=True)
class BaseForecasts:
    """Base forecasts of both grains for one forecast origin (zeros where a grain was not run).

    parent_fc (n_parents, h), leaf_fc (n_children, h), both already >= 0;
    negatives: how many base values were below 0 and set to 0; parent_res and
    leaf_res: in-sample residuals over a common window (None when no class
    needs them); models: one row per series that was forecast.
    """

    parent_fc: np.ndarray
    leaf_fc: np.ndarray
    parent_label: np.ndarray
    parent_demand: np.ndarray
    negatives: int
    parent_res: np.ndarray | None
    leaf_res: np.ndarray | None
    models: pd.DataFrame
    parent_fitted: np.ndarray | None = None  # aligned with the parent grid's rows (NaN where not fitted)
    leaf_fitted: np.ndarray | None = None
    parent_sd: np.ndarray | None = None  # (n_parents, h) base forecast standard deviations (with `sd=True`)
    leaf_sd: np.ndarray | None = None


def series_to_fit(parent_class: np.ndarray, child_class: np.ndarray, strategies: dict[str, str]) -> int:
    """How many series `base_forecasts` fits: the parents and children of each class whose strategy needs
    that grain (the total its `progress` counts to)."""
    count = 0
    for need, classes in ((NEEDS_PARENT, parent_class), (NEEDS_LEAF, child_class)):
        for name, strategy in strategies.items():
            if strategy in need:
                count += int((classes == name).sum())
    return count


def base_forecasts(
    p_grid: SeriesGrid,
    c_grid: SeriesGrid,
    parent_class: np.ndarray,
    child_class: np.ndarray,
    strategies: dict[str, str],
    models: ModelSettings,
    horizon: int,
    log: Callable[[str], None] | None = None,
    progress: Callable[[int], None] | None = None,
    seasonality: Mapping[str, str] | None = None,
    season: SeasonPlan | None = None,
    sd: bool = False,
    residual_start: int | None = None,
) -> BaseForecasts:
    """Run the class's models at the grains its strategy needs (`pipelines.engines.hierarchy`).

    `strategies` maps product class -> strategy; for several strategies at
    once (the backtest) pass `mint_shrink`, which needs both grains and the
    residuals. `seasonality` maps class -> none | own | group (absent: the
    class's `models.seasonal`); a `group` class runs its models without a
    season on the history divided by `season`'s index and takes the index
    back on its forecasts and fitted values (`pipelines.engines.seasonal_base`).
    `sd`: also the base forecasts' standard deviations (`models.run_model_groups`).
    `progress(n)`: n more series fitted (`series_to_fit` in all).
    """
    period = models.period
    out = {}
    sds = {}
    seasonality = seasonality or {}
    for grain, grid, cls in (("parent", p_grid, parent_class), ("leaf", c_grid, child_class)):
        demand, adi, cv2 = demand_classes(grid)
        length = np.bincount(grid.series, minlength=grid.n_series)
        row_factor = season.row_factor(grid, grain) if season is not None else np.ones(len(grid.y))
        model_grid = SeriesGrid(grid.series, grid.ordinal, grid.y / row_factor, grid.n_series)
        end = int(grid.ordinal.max()) + 1 if len(grid.ordinal) else 0
        fc_factor = season.horizon_factor(grain, end, horizon) if season is not None else None
        fc_sd = np.zeros((grid.n_series, horizon))
        fc = np.zeros((grid.n_series, horizon))
        fitted = np.full(len(grid.y), np.nan)
        label = np.full(grid.n_series, "", dtype=object)
        params = np.full(grid.n_series, "", dtype=object)
        ran = np.zeros(grid.n_series, dtype=bool)
        need = NEEDS_PARENT if grain == "parent" else NEEDS_LEAF
        for name, strategy in strategies.items():
            members = cls == name
            if strategy not in need or not members.any():
                continue
            choice = models.choices[name]
            mode = seasonality.get(name)
            if mode is not None:
                choice = choice.model_copy(update={"seasonal": mode == Seasonality.OWN})
            names, season_len = assign_models(demand[members], length[members], choice, period)
            grouped = mode == Seasonality.GROUP and season is not None
            res = run_model_groups(
                _subgrid(model_grid if grouped else grid, members), names, season_len, horizon, log=log,
                tsb=choice.tsb, fitted=strategy in NEEDS_RESIDUALS or sd, engine=models.engine, sd=sd,
                progress=progress,
            )
            rows = members[grid.series]
            scale = fc_factor[members] if grouped else 1.0
            fc[members] = res.forecast * scale
            if strategy in NEEDS_RESIDUALS:  # kept for MinT / WLS only (the sd needs them inside the run)
                fitted[rows] = res.fitted * (row_factor[rows] if grouped else 1.0)
            if sd:
                fc_sd[members] = res.sd * scale
            label[members] = res.label
            params[members] = res.parameters
            ran |= members
        out[grain] = (fc, fitted, label, params, ran, demand, adi, cv2)
        sds[grain] = fc_sd if sd else None
    (pfc, pfit, plabel, pparams, pran, pdemand, padi, pcv2) = out["parent"]
    (lfc, lfit, llabel, lparams, lran, ldemand, ladi, lcv2) = out["leaf"]
    negatives = int((pfc < 0).sum() + (lfc < 0).sum())
    parent_res = leaf_res = None
    if any(s in NEEDS_RESIDUALS for s in strategies.values()):
        both = np.concatenate([p_grid.ordinal, c_grid.ordinal])
        # the window starts at the first period of any series here, or at `residual_start` (a shard of a class:
        # the class's first period, so each parent's residual window is the one the whole class would use)
        first = residual_start if residual_start is not None else int(both.min()) if len(both) else 0
        end = int(both.max()) + 1 if len(both) else first
        parent_res = residual_matrix(p_grid, pfit, first, end)
        leaf_res = residual_matrix(c_grid, lfit, first, end)
    models = pd.concat(
        [
            pd.DataFrame(
                {
                    "grain": "parent",
                    "series": np.flatnonzero(pran),
                    "demand_class": pdemand[pran],
                    "adi": padi[pran],
                    "cv2": pcv2[pran],
                    "model": plabel[pran],
                    "parameters": pparams[pran],
                }
            ),
            pd.DataFrame(
                {
                    "grain": "leaf",
                    "series": np.flatnonzero(lran),
                    "demand_class": ldemand[lran],
                    "adi": ladi[lran],
                    "cv2": lcv2[lran],
                    "model": llabel[lran],
                    "parameters": lparams[lran],
                }
            ),
        ],
        ignore_index=True,
    )
    return BaseForecasts(
        parent_fc=np.clip(pfc, 0, None),
        leaf_fc=np.clip(lfc, 0, None),
        parent_label=plabel,
        parent_demand=pdemand,
        negatives=negatives,
        parent_res=parent_res,
        leaf_res=leaf_res,
        models=models,
        parent_fitted=pfit,
        leaf_fitted=lfit,
        parent_sd=sds["parent"],
        leaf_sd=sds["leaf"],
    )


def _subgrid(grid: SeriesGrid, members: np.ndarray) -> SeriesGrid:
    """The grid restricted to `members` (a mask over series), renumbered 0..k-1."""
    new_id = np.cumsum(members) - 1
    rows = members[grid.series]
    return SeriesGrid(
        series=new_id[grid.series[rows]], ordinal=grid.ordinal[rows], y=grid.y[rows], n_series=int(members.sum())
    )
