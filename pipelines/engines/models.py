"""Statistical models of many series at once: dense grids, demand classes, the model per class, the runs.

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

The model per demand class comes from the config (`ModelSettings`) and runs
through statsforecast, in this process or in chunks on `n_jobs` worker processes for a large
group of costly models or on a Dask cluster (config `models`,
`pipelines/engines/model_engine.py`); a model that fails on a series falls
back to the naive forecast. Negative forecasts (possible from a trended ETS) are set to 0.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd
from numba import njit
from scipy.stats import norm

from pipelines.calendar import season_length
from pipelines.config_sections import ModelChoice, TSBConfig
from pipelines.engines.intermittent import croston_states
from pipelines.engines.model_engine import EngineSettings, chunks, local_jobs, map_on_cluster, map_on_pool
from pipelines.engines.series_grids import SeriesGrid
from pipelines.engines.statsforecast_lib import StatsForecast, sfm  # statsforecast without dask.dataframe


@dataclass(frozen=True)
class ModelSettings:
    """What the model runs read: the calendar's period, each product class's models, where they run."""

    period: str
    choices: Mapping[str, ModelChoice]
    engine: EngineSettings = EngineSettings()

    @classmethod
    def of(cls, config) -> ModelSettings:
        """From a planning config (every class it holds)."""
        choices = {name: pc.models for name, pc in config.product_classes.items()}
        return cls(period=config.calendar.period, choices=choices, engine=EngineSettings.of(config))

ADI_CUTOFF = 1.32


CV2_CUTOFF = 0.49


SEASONAL_MODELS = ("auto_ets", "ets_additive_season", "mstl_ets", "seasonal_naive")


ETS_MODELS = ("auto_ets", "ets_additive_season")


# models that take milliseconds per series or more (the others take microseconds): worth a process pool
COSTLY_MODELS = ("auto_ets", "ets_additive_season", "mstl_ets")


# models whose prediction intervals statsforecast computes itself (normal), and the level read for their sd
NATIVE_INTERVALS = ("auto_ets", "ets_additive_season", "mstl_ets", "seasonal_naive")
SD_LEVEL = 80


CROSTON_ALPHA = 0.1  # statsforecast's CrostonClassic and CrostonSBA smooth both series with alpha = 0.1


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
    sd: np.ndarray | None = None  # (n, horizon) forecast standard deviations (with `sd=True`)


def demand_classes(grid: SeriesGrid) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(demand_class, adi, cv2) per series; see the module docstring for the conventions."""
    n = grid.n_series
    series = np.asarray(grid.series)
    if len(series) and (int(series.min()) < 0 or int(series.max()) >= n):
        raise IndexError(f"grid series codes must lie in 0..{n - 1}")
    length, count, total, squares = _series_moments(series, np.asarray(grid.y, dtype=np.float64), n)
    with np.errstate(invalid="ignore", divide="ignore"):
        adi = np.where(count > 0, length / count, np.nan)
        mean = total / count
        var = np.clip(squares / count - mean**2, 0, None)
        cv2 = np.where(count > 0, var / mean**2, np.nan)
    cls = np.where(
        adi < ADI_CUTOFF,
        np.where(cv2 < CV2_CUTOFF, "smooth", "erratic"),
        np.where(cv2 < CV2_CUTOFF, "intermittent", "lumpy"),
    ).astype(object)
    cls[count == 0] = "no_demand"
    return cls, adi, cv2


@njit(cache=True)
def _series_moments(series, y, n):
    """Per series: its rows, its rows with y > 0, and their sum and sum of squares, added in row order from 0
    as `np.bincount` adds them (the same bits), in one pass."""
    length = np.zeros(n, dtype=np.int64)
    count = np.zeros(n, dtype=np.int64)
    total = np.zeros(n)
    squares = np.zeros(n)
    for i in range(len(series)):
        s = series[i]
        length[s] += 1
        if y[i] > 0:
            count[s] += 1
            total[s] += y[i]
            squares[s] += y[i] ** 2
    return length, count, total, squares


def make_model(name: str, season: int, tsb: TSBConfig | None = None):
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


def assign_models(
    demand: np.ndarray, length: np.ndarray, choice: ModelChoice, period: str
) -> tuple[np.ndarray, np.ndarray]:
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


def _ets_parameters(model) -> str:
    """'ETS(A,N,N) alpha=0.1234' from a fitted statsforecast AutoETS (or '' for a fallback model)."""
    fit = getattr(model, "model_", None)
    if not isinstance(fit, dict) or "method" not in fit:
        return "fallback: naive"
    par = np.asarray(fit["par"], dtype=float)
    names = ("alpha", "beta", "gamma", "phi")
    values = [f"{n}={v:.4g}" for n, v in zip(names, par[:4], strict=False) if np.isfinite(v)]
    return " ".join([fit["method"], *values])


def run_model_groups(
    grid: SeriesGrid,
    names: np.ndarray,
    season: np.ndarray,
    horizon: int,
    log: Callable[[str], None] | None = None,
    tsb: TSBConfig | None = None,
    fitted: bool = False,
    n_jobs: int = 1,
    progress: Callable[[int], None] | None = None,
    sd: bool = False,
    engine: EngineSettings | None = None,
) -> ModelRun:
    """Forecasts (and, with `fitted`, in-sample fitted values) of every series, one statsforecast call per
    (model, season) group, or per chunk of a group on a Dask cluster (`engine`, pipelines/engines/model_engine.py;
    without it, this process with `n_jobs`).

    ETS groups go through `fit`/`predict` so the chosen component string and
    smoothing parameters can be read back; the other groups use the
    memory-efficient `forecast`. A model that fails on a series falls back to
    the naive forecast. `progress(n)` is told after each group (or chunk) how
    many of the grid's series it finished (every series once, the all-zero ones
    included).

    `sd` (needs `fitted`): each forecast's standard deviation. Models with
    their own prediction intervals in statsforecast (`NATIVE_INTERVALS`: ETS,
    MSTL, seasonal naive, and the naive fallback) give it from their normal
    80 % interval, sd = (hi - lo) / (2 z_0.9); the others (Croston, TSB,
    ADIDA, IMAPA, SES) only have conformal intervals there, which refit the
    model on held-back windows and need a long history, so their sd is the
    root mean square of the in-sample one-step residuals, the same over the
    horizon (statsforecast's `_calculate_sigma`, which its fitted intervals
    use): an assumption, whose coverage the backtest reports.
    """
    engine = engine or EngineSettings(n_jobs=n_jobs)
    fc = np.zeros((grid.n_series, horizon))
    sds = np.zeros((grid.n_series, horizon))
    fit_values = np.full(len(grid.y), np.nan)
    parameters = np.full(grid.n_series, "", dtype=object)
    labels = np.full(grid.n_series, "zero", dtype=object)
    # where each series' rows start in the grid (rows are sorted by series, then period)
    starts = np.searchsorted(grid.series, np.arange(grid.n_series + 1))

    def take(res: GroupFit) -> None:
        fc[res.ids] = res.forecast
        parameters[res.ids] = res.parameters
        if sd:
            sds[res.ids] = res.sd
        if fitted:
            fit_values[_series_rows(starts, res.ids)] = res.fitted
        if progress:
            progress(len(res.ids))

    groups = pd.DataFrame({"name": names, "season": season})
    for (name, s), idx in groups.groupby(["name", "season"], sort=True).groups.items():
        ids = np.sort(np.asarray(idx))
        labels[ids] = model_label(name, int(s))
        if name == "zero":
            if progress:
                progress(len(ids))
            continue
        without_rows = starts[ids + 1] == starts[ids]  # nothing to fit: forecast 0, counted done
        if progress and without_rows.any():
            progress(int(without_rows.sum()))
        ids = ids[~without_rows]
        if not len(ids):
            continue
        options = dict(name=name, season=int(s), horizon=horizon, tsb=tsb, fitted=fitted, sd=sd)
        started = time.perf_counter()
        if engine.on_cluster:
            frames = [_group_frame(grid, starts, part) for part in chunks(ids)]
            map_on_cluster(engine, fit_group, frames, options, take)
        else:
            jobs = local_jobs(engine, len(ids), costly=name in COSTLY_MODELS)
            if jobs > 1:  # chunks on worker processes that are not forks of this one (model_engine.map_on_pool)
                parts = chunks(ids, -(-len(ids) // (4 * jobs)))  # four chunks a worker: the faster ones take more
                map_on_pool(jobs, fit_group, [_group_frame(grid, starts, part) for part in parts], options, take)
            else:
                take(fit_group(_group_frame(grid, starts, ids), **options))
        if log:
            where = f" on the cluster ({len(chunks(ids))} chunks)" if engine.on_cluster else ""
            log(f"{model_label(name, int(s))}: {len(ids)} series in {time.perf_counter() - started:.1f} s{where}")
    return ModelRun(forecast=fc, fitted=fit_values, parameters=parameters, label=labels, sd=sds if sd else None)


def _series_rows(starts: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """The grid rows of the series `ids`, in order (`starts[i]`: the first row of series i)."""
    length = starts[ids + 1] - starts[ids]
    first = np.repeat(starts[ids] - np.concatenate([[0], np.cumsum(length)[:-1]]), length)
    return first + np.arange(int(length.sum()))


def _group_frame(grid: SeriesGrid, starts: np.ndarray, ids: np.ndarray) -> pd.DataFrame:
    """statsforecast's long frame of the series `ids` (sorted), in grid order."""
    rows = _series_rows(starts, ids)
    return pd.DataFrame({"unique_id": grid.series[rows], "ds": grid.ordinal[rows], "y": grid.y[rows]})


@dataclass(frozen=True)
class GroupFit:
    """One model group's (or chunk's) results for its series `ids` (sorted): forecast and sd (k, horizon),
    parameters (k,), fitted values of the frame's rows (NaN where the library gives none)."""

    ids: np.ndarray
    forecast: np.ndarray
    parameters: np.ndarray
    fitted: np.ndarray | None
    sd: np.ndarray | None


def fit_group(
    frame: pd.DataFrame, name: str, season: int, horizon: int, tsb: TSBConfig | None = None,
    fitted: bool = False, sd: bool = False,
) -> GroupFit:
    """Fit one model to the series of `frame` (`unique_id`, `ds`, `y`, sorted by series then period).

    Each series is fitted alone, so a chunk of a group gives its series the same numbers as the whole group.
    Always in this process (statsforecast's own `n_jobs` pool forks it; parallel work goes through
    `model_engine.map_on_pool` or the cluster).
    """
    sf = StatsForecast(models=[make_model(name, season, tsb)], freq=1, n_jobs=1, fallback_model=sfm.Naive())
    ids = np.unique(frame["unique_id"].to_numpy())
    parameters = np.full(len(ids), "", dtype=object)
    fit_values = None
    level = [SD_LEVEL] if sd and name in NATIVE_INTERVALS else None
    if name in ETS_MODELS:
        sf.fit(df=frame)
        out = sf.predict(h=horizon, level=level)
        fitted_models = sf.fitted_[:, 0]
        parameters[:] = [_ets_parameters(m) for m in fitted_models]  # reads the library's results
        if fitted:
            fit_values = np.concatenate([m.model_["fitted"] for m in fitted_models])
    else:
        out = sf.forecast(df=frame, h=horizon, fitted=fitted, level=level)
        if fitted:
            fit_values = sf.forecast_fitted_values().iloc[:, 3].to_numpy(float)
        if name in ("croston_classic", "croston_sba"):
            # the final smoothed size and interval behind the forecast, which the library does not return
            size, gap, _ = croston_states(
                frame["y"].to_numpy(float), CROSTON_ALPHA, CROSTON_ALPHA,
                series=np.searchsorted(ids, frame["unique_id"].to_numpy()), n_series=len(ids),
            )
            parameters[:] = [
                f"alpha={CROSTON_ALPHA:g} size={a:.4g} interval={b:.4g}" for a, b in zip(size, gap, strict=False)
            ]
        elif name == "tsb":
            t = tsb or TSBConfig()
            parameters[:] = f"alpha_d={t.alpha_d:g} alpha_p={t.alpha_p:g}"
    order = out["unique_id"].to_numpy()[::horizon]
    if not np.array_equal(order, ids):  # statsforecast returns the series sorted; anything else is a bug here
        raise RuntimeError("statsforecast returned the series in another order than their sorted codes")
    forecast = out.iloc[:, 2].to_numpy(float).reshape(-1, horizon)
    sds = _forecast_sd(out, level, frame, fit_values, ids, horizon) if sd else None
    return GroupFit(ids=ids, forecast=forecast, parameters=parameters, fitted=fit_values, sd=sds)


def _forecast_sd(out: pd.DataFrame, level, frame: pd.DataFrame, fit_values, ids, horizon: int) -> np.ndarray:
    """(len(ids), horizon) sd from the library's interval, or the in-sample residuals' root mean square."""
    if level:
        lo = out.filter(regex=rf"-lo-{SD_LEVEL}$").iloc[:, 0].to_numpy(float)
        hi = out.filter(regex=rf"-hi-{SD_LEVEL}$").iloc[:, 0].to_numpy(float)
        sd = (hi - lo) / (2 * norm.ppf(0.5 + SD_LEVEL / 200))
        return np.nan_to_num(np.clip(sd, 0, None)).reshape(-1, horizon)
    res = frame["y"].to_numpy(float) - fit_values
    ok = np.isfinite(res)
    series = np.searchsorted(ids, frame["unique_id"].to_numpy())[ok]
    square = np.bincount(series, weights=res[ok] ** 2, minlength=len(ids))
    count = np.bincount(series, minlength=len(ids))
    sigma = np.sqrt(np.divide(square, count, out=np.zeros(len(ids)), where=count > 0))
    return np.repeat(sigma[:, None], horizon, axis=1)
