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
- `auto`: the strategy the backtest chose for the class (`backtest_accuracy`,
  lowest leaf-grain WMAPE): `top_down` or `bottom_up` as above,
  `forecast_proportions` (parent forecast split by the children's own
  forecasts) or `mint_shrink` / `wls_var` (both grains reconciled); see
  `pipelines.stages.hierarchy`. Whatever the strategy, parent = sum of leaves.

Each series gets a demand class (Syntetos, Boylan & Croston 2005, cut-offs
ADI = 1.32 and CV^2 = 0.49). ADI convention used here: the number of periods
from the series' first non-zero period to the end of history, divided by the
number of non-zero periods. CV^2 is the squared coefficient of variation of
the non-zero sizes (population variance, ddof = 0); one non-zero period has
CV^2 = 0. A series without any demand is `no_demand` and is forecast as 0.
Ties at the cut-offs: the cut-offs belong to the upper side, i.e. smooth needs
ADI < 1.32 and CV^2 < 0.49; ADI = 1.32 exactly is intermittent (or lumpy) and
CV^2 = 0.49 exactly is erratic (or lumpy). The comparison is made on the
floating-point ratio, so 33 periods / 25 demands (1.32) is on the cut-off.

Models (statsforecast): `auto_ets` (AutoETS, Hyndman et al. 2008; seasonal
with `seasonal: true` and two full seasons), `ets_additive_season` (ETS(A,N,A),
the one seasonal ETS form instead of AutoETS' search), `mstl_ets` (MSTL
decomposition with AutoETS on the deseasonalised series; Bandara et al. 2021),
`ses`, `seasonal_naive` (the benchmark), Croston (`croston_classic`,
`croston_sba` = Syntetos & Boylan 2005 debiasing, `croston_optimized`), `tsb`
(Teunter, Syntetos & Babai 2011, parameters in config), `adida`
(Nikolopoulos et al. 2011) and `imapa`. Seasonal AutoETS on weekly data is
costly: on the demo's 28 seasonal parents (156 weeks, 1 core) AutoETS with
season_length 52 took 300-560 ms per series and picked unstable multiplicative
forms (26-week holdout WMAPE 1.80); ETS(A,N,A) took 45-57 ms (WMAPE 0.27),
MSTL + AutoETS 45-50 ms (0.39) and seasonal naive 0.4 ms (0.28). So the demo
uses `ets_additive_season` where a season is wanted (benchmarks/backtest.py
measures again). The model, its parameters where the library exposes them (ETS
component string and smoothing parameters, the fixed Croston alpha, the TSB
alphas) and the in-sample one-step fitted values (for MinT's residuals) come
out of `run_model_groups`.

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

from pipelines.calendar import horizon_starts, ordinal_to_start, period_ordinal, season_length
from pipelines.config import ModelChoice, ModelName, PlanningConfig, TSBConfig
from pipelines.errors import ConfigError
from pipelines.keys import LEAF, PARENT, factorize, first_rows, lookup
from pipelines.stages.hierarchy import NEEDS_LEAF, NEEDS_PARENT, NEEDS_RESIDUALS, coherent_forecasts
from pipelines.stages.intermittent import croston_states

ADI_CUTOFF = 1.32
CV2_CUTOFF = 0.49

PARENT_COLUMNS = ["cycle_date", "product_class", "product", "site", "period_start", "forecast", "model", "demand_class", "forecast_grain", "zero_reason"]
LEAF_COLUMNS = LEAF + ["period_start", "cycle_date", "product_class", "forecast", "parent_forecast", "split_basis"]
SEASONAL_MODELS = ("auto_ets", "ets_additive_season", "mstl_ets", "seasonal_naive")
ETS_MODELS = ("auto_ets", "ets_additive_season")
CROSTON_ALPHA = 0.1  # statsforecast's CrostonClassic and CrostonSBA smooth both series with alpha = 0.1
FITTED_COLUMNS = ["cycle_date", "grain", "product_class", "product", "site", "customer", "period_start", "actual", "fitted"]
MODEL_COLUMNS = ["cycle_date", "grain", "product_class", "product", "site", "customer", "demand_class", "adi", "cv2", "model", "parameters"]
GRAIN_STRATEGY = {"product_site": "top_down", "product_site_customer": "bottom_up"}


@dataclass(frozen=True)
class ForecastResult:
    parent: pd.DataFrame
    leaf: pd.DataFrame
    negatives_clipped: int
    models: pd.DataFrame | None = None  # one row per forecast series: grain, key, model, parameters
    fitted: pd.DataFrame | None = None  # in-sample one-step fitted values behind MinT / WLS residuals


@dataclass(frozen=True)
class ModelRun:
    """What the model library returned for n series.

    forecast: (n, horizon); fitted: in-sample one-step fitted values aligned
    with the grid's rows (NaN where the library gives none); parameters: (n,)
    text, '' where the library does not expose them; label: (n,) model label.
    """

    forecast: np.ndarray
    fitted: np.ndarray
    parameters: np.ndarray
    label: np.ndarray


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


def make_model(name: ModelName, season: int, tsb: TSBConfig | None = None):
    """The statsforecast model object for a config model name (season 1 = non-seasonal)."""
    if name == "auto_ets":
        return sfm.AutoETS(season_length=season)
    if name == "ets_additive_season":
        return sfm.AutoETS(season_length=season, model="ANA" if season > 1 else "ANN")
    if name == "mstl_ets":
        if season > 1:
            return sfm.MSTL(season_length=season, trend_forecaster=sfm.AutoETS(model="ZZN"))
        return sfm.AutoETS(model="ZZN")
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
    if name == "tsb":
        tsb = tsb or TSBConfig()
        return sfm.TSB(alpha_d=tsb.alpha_d, alpha_p=tsb.alpha_p)
    if name == "adida":
        return sfm.ADIDA()
    if name == "imapa":
        return sfm.IMAPA()
    raise ValueError(f"unknown model {name!r}")


def model_label(name: str, season: int) -> str:
    return f"{name}(season_length={season})" if name in SEASONAL_MODELS else name


def assign_models(demand: np.ndarray, length: np.ndarray, choice: ModelChoice, period: str) -> tuple[np.ndarray, np.ndarray]:
    """Model name and season length per series of one product class."""
    names = np.empty(len(demand), dtype=object)
    for dc in ("smooth", "erratic", "intermittent", "lumpy"):
        names[demand == dc] = getattr(choice, dc)
    names[demand == "no_demand"] = "zero"
    sl = season_length(period)
    seasonal_ok = choice.seasonal & (length >= 2 * sl)
    uses_season = np.isin(names, SEASONAL_MODELS)
    season = np.where(seasonal_ok & uses_season, sl, 1)
    return names, season


def run_models(grid: SeriesGrid, names: np.ndarray, season: np.ndarray, horizon: int, log: Callable[[str], None] | None = None) -> np.ndarray:
    """Forecast matrix (n_series, horizon); one statsforecast call per (model, season) group."""
    return run_model_groups(grid, names, season, horizon, log=log).forecast


def _ets_parameters(model) -> str:
    """'ETS(A,N,N) alpha=0.1234' from a fitted statsforecast AutoETS (or '' for a fallback model)."""
    fit = getattr(model, "model_", None)
    if not isinstance(fit, dict) or "method" not in fit:
        return "fallback: naive"
    par = np.asarray(fit["par"], dtype=float)
    names = ("alpha", "beta", "gamma", "phi")
    values = [f"{n}={v:.4g}" for n, v in zip(names, par[:4]) if np.isfinite(v)]
    return " ".join([fit["method"], *values])


def run_model_groups(
    grid: SeriesGrid,
    names: np.ndarray,
    season: np.ndarray,
    horizon: int,
    log: Callable[[str], None] | None = None,
    tsb: TSBConfig | None = None,
    fitted: bool = False,
) -> ModelRun:
    """Forecasts (and, with `fitted`, in-sample fitted values) of every series, one statsforecast call per (model, season) group.

    ETS groups go through `fit`/`predict` so the chosen component string and
    smoothing parameters can be read back; the other groups use the
    memory-efficient `forecast`. A model that fails on a series falls back to
    the naive forecast.
    """
    fc = np.zeros((grid.n_series, horizon))
    fit_values = np.full(len(grid.y), np.nan)
    parameters = np.full(grid.n_series, "", dtype=object)
    labels = np.full(grid.n_series, "zero", dtype=object)
    groups = pd.DataFrame({"name": names, "season": season})
    for (name, s), idx in groups.groupby(["name", "season"], sort=True).groups.items():
        ids = np.asarray(idx)
        labels[ids] = model_label(name, int(s))
        if name == "zero":
            continue
        rows = np.isin(grid.series, ids)
        df = pd.DataFrame({"unique_id": grid.series[rows], "ds": grid.ordinal[rows], "y": grid.y[rows]})
        sf = StatsForecast(models=[make_model(name, int(s), tsb)], freq=1, n_jobs=1, fallback_model=sfm.Naive())
        started = time.perf_counter()
        if name in ETS_MODELS:
            sf.fit(df=df)
            out = sf.predict(h=horizon)
            fitted_models = sf.fitted_[:, 0]
            parameters[np.sort(ids)] = [_ets_parameters(m) for m in fitted_models]  # reads the library's results
            if fitted:
                fit_values[rows] = np.concatenate([m.model_["fitted"] for m in fitted_models])
        else:
            out = sf.forecast(df=df, h=horizon, fitted=fitted)
            if fitted:
                fit_values[rows] = sf.forecast_fitted_values().iloc[:, 3].to_numpy(float)
            if name in ("croston_classic", "croston_sba"):
                # the final smoothed size and interval behind the forecast, which the library does not return
                order = np.sort(ids)
                size, gap, _ = croston_states(
                    grid.y[rows], CROSTON_ALPHA, CROSTON_ALPHA, series=np.searchsorted(order, grid.series[rows]), n_series=len(order)
                )
                parameters[order] = [f"alpha={CROSTON_ALPHA:g} size={a:.4g} interval={b:.4g}" for a, b in zip(size, gap)]
            elif name == "tsb":
                t = tsb or TSBConfig()
                parameters[ids] = f"alpha_d={t.alpha_d:g} alpha_p={t.alpha_p:g}"
        if log:
            log(f"{model_label(name, int(s))}: {len(ids)} series in {time.perf_counter() - started:.1f} s")
        values = out.iloc[:, 2].to_numpy(float).reshape(-1, horizon)
        fc[out["unique_id"].to_numpy()[::horizon]] = values
    return ModelRun(forecast=fc, fitted=fit_values, parameters=parameters, label=labels)


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


def strategy_by_class(config: PlanningConfig, chosen: dict[str, str] | None = None) -> dict[str, str]:
    """The strategy each product class follows: its fixed grain's, or for `auto` the backtest's choice."""
    out = {}
    for name, pc in config.product_classes.items():
        if pc.forecast_grain == "auto":
            if not chosen or name not in chosen:
                raise ConfigError(
                    f"{config.source}: product_classes.{name}.forecast_grain is 'auto' but the backtest "
                    f"made no choice for it; materialize backtest_accuracy first, or set forecast_grain to "
                    f"one of {sorted(GRAIN_STRATEGY)}."
                )
            out[name] = chosen[name]
        else:
            out[name] = GRAIN_STRATEGY[pc.forecast_grain]
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


def base_forecasts(
    p_grid: SeriesGrid,
    c_grid: SeriesGrid,
    parent_class: np.ndarray,
    child_class: np.ndarray,
    strategies: dict[str, str],
    config: PlanningConfig,
    horizon: int,
    log: Callable[[str], None] | None = None,
    timer: Callable | None = None,
) -> BaseForecasts:
    """Run the class's models at the grains its strategy needs (`pipelines.stages.hierarchy`).

    `strategies` maps product class -> strategy; for several strategies at
    once (the backtest) pass `mint_shrink`, which needs both grains and the
    residuals. `timer`, if given, wraps each model-library call (benchmarks).
    """
    period = config.calendar.period
    n_parents, n_children = p_grid.n_series, c_grid.n_series
    run = timer or run_model_groups
    out = {}
    for grain, grid, cls in (("parent", p_grid, parent_class), ("leaf", c_grid, child_class)):
        demand, adi, cv2 = demand_classes(grid)
        length = np.bincount(grid.series, minlength=grid.n_series)
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
            pc = config.product_classes[name]
            names, season = assign_models(demand[members], length[members], pc.models, period)
            res = run(_subgrid(grid, members), names, season, horizon, log=log, tsb=pc.models.tsb, fitted=strategy in NEEDS_RESIDUALS)
            fc[members] = res.forecast
            fitted[members[grid.series]] = res.fitted
            label[members] = res.label
            params[members] = res.parameters
            ran |= members
        out[grain] = (fc, fitted, label, params, ran, demand, adi, cv2)
    (pfc, pfit, plabel, pparams, pran, pdemand, padi, pcv2) = out["parent"]
    (lfc, lfit, llabel, lparams, lran, ldemand, ladi, lcv2) = out["leaf"]
    negatives = int((pfc < 0).sum() + (lfc < 0).sum())
    parent_res = leaf_res = None
    if any(s in NEEDS_RESIDUALS for s in strategies.values()):
        both = np.concatenate([p_grid.ordinal, c_grid.ordinal])
        first = int(both.min()) if len(both) else 0
        end = int(both.max()) + 1 if len(both) else 0
        parent_res = residual_matrix(p_grid, pfit, first, end)
        leaf_res = residual_matrix(c_grid, lfit, first, end)
    models = pd.concat(
        [
            pd.DataFrame({"grain": "parent", "series": np.flatnonzero(pran), "demand_class": pdemand[pran], "adi": padi[pran],
                          "cv2": pcv2[pran], "model": plabel[pran], "parameters": pparams[pran]}),
            pd.DataFrame({"grain": "leaf", "series": np.flatnonzero(lran), "demand_class": ldemand[lran], "adi": ladi[lran],
                          "cv2": lcv2[lran], "model": llabel[lran], "parameters": lparams[lran]}),
        ],
        ignore_index=True,
    )
    return BaseForecasts(
        parent_fc=np.clip(pfc, 0, None), leaf_fc=np.clip(lfc, 0, None), parent_label=plabel, parent_demand=pdemand,
        negatives=negatives, parent_res=parent_res, leaf_res=leaf_res, models=models, parent_fitted=pfit, leaf_fitted=lfit,
    )


def combine_strategies(
    strategy_of_parent: np.ndarray,
    base: BaseForecasts,
    parent_of_child: np.ndarray,
    basis: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Coherent (parent, leaf, leaf source, negatives set to 0), each parent by its own strategy."""
    n_parents = len(strategy_of_parent)
    parent = np.zeros_like(base.parent_fc)
    leaf = np.zeros_like(base.leaf_fc)
    source = np.empty(leaf.shape, dtype=object)
    negatives = 0
    for strategy in pd.unique(strategy_of_parent):  # a handful of strategies, not a loop over series
        ps = strategy_of_parent == strategy
        cs = ps[parent_of_child]
        remap = np.cumsum(ps) - 1
        p, l, src, neg = coherent_forecasts(
            strategy,
            base.parent_fc[ps],
            base.leaf_fc[cs],
            remap[parent_of_child[cs]],
            basis[cs],
            None if base.parent_res is None else base.parent_res[ps],
            None if base.leaf_res is None else base.leaf_res[cs],
        )
        parent[ps], leaf[cs], source[cs] = p, l, src
        negatives += neg
    assert n_parents == parent.shape[0]
    return parent, leaf, source, negatives


def forecast_cycle(
    history: pd.DataFrame,
    children: pd.DataFrame,
    target: pd.DataFrame,
    config: PlanningConfig,
    cycle_date: pd.Timestamp,
    log: Callable[[str], None] | None = None,
    chosen: dict[str, str] | None = None,
) -> ForecastResult:
    """Parent and leaf forecasts for the horizon; see the module docstring.

    `chosen` maps each `auto` class to the strategy the backtest picked.
    children: leaf keys and product_class, optionally first/last_active_period
    (absent = active in the whole horizon). target: `reinitialized_target`.
    """
    period = config.calendar.period
    horizon = config.calendar.horizon
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    starts = horizon_starts(cycle_date, horizon, period)
    children = children.reset_index(drop=True)
    parent_of_child, parents = factorize(children, PARENT)
    parents["product_class"] = children["product_class"].to_numpy()[first_rows(parent_of_child)]
    n_parents, n_children = len(parents), len(children)
    ords = period_ordinal(history["period_start"], period)
    qty = history["quantity"].to_numpy(float)
    strategies = strategy_by_class(config, chosen)

    p_code = lookup(history, PARENT, parents)
    ok = p_code >= 0
    p_grid = series_grid(p_code[ok], ords[ok], qty[ok], n_parents, cycle_ord)
    c_code = lookup(history, LEAF, children)
    okc = c_code >= 0
    c_grid = series_grid(c_code[okc], ords[okc], qty[okc], n_children, cycle_ord)
    base = base_forecasts(
        p_grid, c_grid, parents["product_class"].to_numpy(), children["product_class"].to_numpy(), strategies, config, horizon, log
    )

    # top-down basis: the reinitialized target (the period's share where the targets are all 0)
    target_m = _leaf_matrix(target, children, "target", starts)
    share_m = _leaf_matrix(target, children, "share", starts)
    target_sum = np.zeros((n_parents, horizon))
    np.add.at(target_sum, parent_of_child, target_m)
    use_target = target_sum[parent_of_child] > 0
    basis = np.where(use_target, target_m, share_m)

    strategy_of_parent = parents["product_class"].map(strategies).to_numpy()
    parent_fc, leaf_fc, source, reconciled_negatives = combine_strategies(strategy_of_parent, base, parent_of_child, basis)
    split_basis = np.where(source == "basis", np.where(use_target, "target", "share"), source)

    # lifecycle: no leaf volume outside a child's active periods, none in a parent period that no
    # child can carry (a share-split parent: no child holds a share; otherwise: no child is active);
    # parents are then re-summed from their leaves so every strategy stays coherent
    active = _active_matrix(children, starts, period)
    zero_reason = _parent_reasons(target, parents, starts)
    no_active_child = np.isin(zero_reason, ["product_not_active", "no_active_child"])
    zeroed = np.where((strategy_of_parent == "top_down")[:, None], pd.notna(zero_reason), no_active_child)
    zero_reason = np.where(zeroed, zero_reason, None)
    leaf_fc = np.where(active & ~zeroed[parent_of_child], leaf_fc, 0.0)
    parent_fc = np.zeros_like(parent_fc)
    np.add.at(parent_fc, parent_of_child, leaf_fc)
    parent_model = np.where(strategy_of_parent == "bottom_up", "bottom_up", base.parent_label)
    grain = np.select(
        [strategy_of_parent == "top_down", strategy_of_parent == "bottom_up"], ["product_site", "product_site_customer"], "both"
    )

    parent_out = parents[PARENT].loc[parents.index.repeat(horizon)].reset_index(drop=True)
    parent_out.insert(0, "product_class", np.repeat(parents["product_class"].to_numpy(), horizon))
    parent_out.insert(0, "cycle_date", cycle_date)
    parent_out["period_start"] = np.tile(starts.values, n_parents)
    parent_out["forecast"] = parent_fc.ravel()
    parent_out["model"] = np.repeat(parent_model, horizon)
    parent_out["demand_class"] = np.repeat(base.parent_demand, horizon)
    parent_out["forecast_grain"] = np.repeat(grain, horizon)
    parent_out["strategy"] = np.repeat(strategy_of_parent, horizon)
    parent_out["zero_reason"] = zero_reason.ravel()

    leaf_out = children[LEAF].loc[children.index.repeat(horizon)].reset_index(drop=True)
    leaf_out["period_start"] = np.tile(starts.values, n_children)
    leaf_out["cycle_date"] = cycle_date
    leaf_out["product_class"] = np.repeat(children["product_class"].to_numpy(), horizon)
    leaf_out["forecast"] = leaf_fc.ravel()
    leaf_out["parent_forecast"] = parent_fc[parent_of_child].ravel()
    leaf_out["split_basis"] = split_basis.ravel()

    models = base.models
    is_parent = (models["grain"] == "parent").to_numpy()
    keys = pd.concat(
        [parents.iloc[models["series"].to_numpy()[is_parent]][PARENT + ["product_class"]].assign(customer=""),
         children.iloc[models["series"].to_numpy()[~is_parent]][LEAF + ["product_class"]]],
        ignore_index=True,
    )
    models = pd.concat([models.drop(columns="series").reset_index(drop=True), keys], axis=1)
    models.insert(0, "cycle_date", cycle_date)
    fitted = pd.concat(
        [_fitted_frame(p_grid, base.parent_fitted, parents.assign(customer=""), "parent", period),
         _fitted_frame(c_grid, base.leaf_fitted, children, "leaf", period)],
        ignore_index=True,
    )
    fitted.insert(0, "cycle_date", cycle_date)
    return ForecastResult(
        parent=parent_out[PARENT_COLUMNS + ["strategy"]],
        leaf=leaf_out[LEAF_COLUMNS],
        negatives_clipped=base.negatives + reconciled_negatives,
        models=models[MODEL_COLUMNS],
        fitted=fitted[FITTED_COLUMNS],
    )


def _fitted_frame(grid: SeriesGrid, fitted: np.ndarray | None, keys: pd.DataFrame, grain: str, period: str) -> pd.DataFrame:
    """Long frame of the grid rows that have a fitted value: keys, period_start, actual, fitted."""
    if fitted is None:
        fitted = np.full(len(grid.y), np.nan)
    ok = np.isfinite(fitted)
    out = keys.iloc[grid.series[ok]][LEAF].reset_index(drop=True)
    out.insert(0, "grain", grain)
    out["product_class"] = keys["product_class"].to_numpy()[grid.series[ok]]
    out["period_start"] = ordinal_to_start(grid.ordinal[ok], period)
    out["actual"] = grid.y[ok]
    out["fitted"] = fitted[ok]
    return out


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
