"""Stage `backtest_accuracy`: which strategy forecasts each product class best.

Rolling origin (Tashman 2000; Hyndman & Athanasopoulos, FPP 3rd ed., section
5.10): `backtest.origins` origins, the last `backtest.horizon` periods before
the cycle date and each earlier one `backtest.step` periods before the next.
At each origin the history after it is held back; every series is re-classed
and re-forecast from the history before it with the class's models, at both
grains, and each strategy of `pipelines.engines.hierarchy` turns the base
forecasts into coherent parent and leaf forecasts for `horizon` periods:

- `top_down`: the parent forecast split by the class's share table computed
  at the origin (same method, window and fallbacks as the cycle's);
- `forecast_proportions`, `bottom_up`, `mint_shrink`, `wls_var` as documented
  there (MinT's residuals are the in-sample one-step residuals at the origin).

Seasonal naive at each grain (season length 52 weeks / 12 months where a
series holds one full season, else naive) is the benchmark.

Series are the active children of the cycle and their parents; only real
history counts (copied reference history shapes shares, it is not demand), and
a parent's actuals are the sum of its children's, so the two grains agree.

Accuracy per class, strategy and grain, pooled over all series, periods and
origins (`pipelines.engines.accuracy`): WMAPE, bias, MASE (scaled by each
series' in-sample naive differences at the origin, seasonal ones for a class
with `seasonal: true`) and forecast value added over seasonal naive.

Seasonality: every class is backtested with each seasonality it may follow
(`seasonal_base.seasonality_candidates`: its own setting, or for
`seasonality: auto` none - own where `models.seasonal` is true - and
`group`, the group seasonal indices estimated at each origin from the history
before it); the table has a row per seasonality. Seasonal naive does not
depend on it and is repeated under each.

Intervals: with `intervals.levels`, each strategy's intervals at each origin
(`pipelines.engines.forecast_intervals`, as the cycle makes them) are scored
by their coverage, the share of actual cells inside the bounds, bounds
included (metric `coverage_<level>`; a well calibrated 80 % interval covers
about 0.8).

The choice of a class's strategy and seasonality from this table
(`strategy: auto`, `seasonality: auto`) is the next stage, `strategy_choice`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipelines.calendar import ordinal_to_start, period_ordinal, season_length
from pipelines.config_sections import BacktestConfig
from pipelines.engines.accuracy import mase_scale
from pipelines.engines.base_forecasts import base_forecasts
from pipelines.engines.forecast_intervals import CoverageBook
from pipelines.engines.hierarchy import NEEDS_RESIDUALS, coherent_forecasts, parent_sums
from pipelines.engines.models import ModelSettings, run_model_groups, series_grid
from pipelines.engines.period_shares import period_shares
from pipelines.engines.seasonal_base import cycle_season_plan, seasonality_candidates
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.shares import compute_shares
from pipelines.keys import LEAF, PARENT, factorize, first_rows, lookup
from pipelines.results import Log, StageResult, quiet
from pipelines.vocabulary import BENCHMARK, Seasonality

ACCURACY_COLUMNS = [
    "product_class", "seasonality", "strategy", "grain", "metric", "value", "origins", "horizon", "series",
]
_SUMS = ("abs_error", "error", "actual", "scaled", "scaled_cells")


@dataclass(frozen=True)
class BacktestSettings:
    """What the backtest reads: its origins and strategies, the share engine's settings, the models."""

    backtest: BacktestConfig
    share: ShareSettings
    models: ModelSettings
    seasonality: Mapping[str, tuple[str, ...]] = field(default_factory=dict)  # class -> seasonalities compared
    seasonal_groups: Mapping[str, str] = field(default_factory=dict)
    levels: tuple[float, ...] = ()

    @classmethod
    def of(cls, config) -> BacktestSettings:
        """From a planning config (every class it holds); a BacktestSettings is returned as it is."""
        if isinstance(config, BacktestSettings):
            return config
        classes = config.product_classes
        return cls(
            config.backtest, ShareSettings.of(config), ModelSettings.of(config),
            {name: seasonality_candidates(pc) for name, pc in classes.items()},
            {name: pc.seasonal_group for name, pc in classes.items()}, tuple(config.intervals.levels),
        )

    def candidates(self, name: str) -> tuple[str, ...]:
        """The seasonalities compared for a class (its models' own setting where none is configured)."""
        own = Seasonality.OWN if self.models.choices[name].seasonal else Seasonality.NONE
        return tuple(self.seasonality.get(name, (own,)))


@dataclass(frozen=True)
class BacktestResult:
    accuracy: pd.DataFrame  # BacktestAccuracy
    origins: list[pd.Timestamp]  # origins evaluated


def origin_ordinals(settings: BacktestSettings, cycle_ord: int, first_ord: int) -> list[int]:
    """Origins (period ordinals), oldest first; an origin with no history before it is left out."""
    bt = settings.backtest
    last = cycle_ord - bt.horizon
    wanted = [last - i * bt.step for i in reversed(range(bt.origins))]
    return [o for o in wanted if o > first_ord]


def _dense(code: np.ndarray, ords: np.ndarray, qty: np.ndarray, n: int, start: int, width: int) -> np.ndarray:
    """(n, width) sums of qty per series for periods start..start+width-1."""
    inside = (ords >= start) & (ords < start + width)
    flat = np.bincount(code[inside] * width + (ords[inside] - start), weights=qty[inside], minlength=n * width)
    return flat.reshape(n, width)


def _scales(grid, cls: np.ndarray, settings: BacktestSettings) -> np.ndarray:
    """MASE scale per series: seasonal naive differences for seasonal classes, else naive (Hyndman & Koehler 2006)."""
    one = mase_scale(grid.series, grid.y, grid.n_series, 1)
    sl = season_length(settings.share.period)
    seasonal = np.isin(cls, [n for n, m in settings.models.choices.items() if m.seasonal])
    if not seasonal.any():
        return one
    m = mase_scale(grid.series, grid.y, grid.n_series, sl)
    return np.where(seasonal & np.isfinite(m), m, one)


def _seasonal_naive(grid, horizon: int, period: str, log) -> np.ndarray:
    sl = season_length(period)
    length = np.bincount(grid.series, minlength=grid.n_series)
    names = np.where(length > 0, "seasonal_naive", "zero").astype(object)
    season = np.where(length >= sl, sl, 1)
    return np.clip(run_model_groups(grid, names, season, horizon, log=log).forecast, 0, None)


def run_backtest(
    history: pd.DataFrame,
    children: pd.DataFrame,
    settings: BacktestSettings,
    cycle_date: pd.Timestamp,
    log: Callable[[str], None] | None = None,
    products: pd.DataFrame | None = None,
) -> BacktestResult:
    """The accuracy table (class x seasonality x strategy x grain x metric); see the module docstring.

    history: lifecycle history (all origins); children: the cycle's active
    children (leaf keys, product_class); products: the master data (for a
    seasonal_group that is one of its columns). One run per seasonality
    compared, each over the classes that compare it.
    """
    settings = BacktestSettings.of(settings)
    classes = list(settings.models.choices)
    variants = list(dict.fromkeys(v for c in classes for v in settings.candidates(c)))
    tables, origins = [], []
    for variant in variants:  # a loop over the two or three seasonalities
        mine = {c: variant for c in classes if variant in settings.candidates(c)}
        result = _run_one(history, children, settings, cycle_date, log, products, mine)
        table = result.accuracy.assign(seasonality=variant)
        tables.append(table[table["product_class"].isin(list(mine))])
        origins = result.origins
    accuracy = pd.concat(tables, ignore_index=True) if tables else pd.DataFrame(columns=ACCURACY_COLUMNS)
    return BacktestResult(accuracy=accuracy[ACCURACY_COLUMNS], origins=origins)


def _run_one(
    history: pd.DataFrame,
    children: pd.DataFrame,
    settings: BacktestSettings,
    cycle_date: pd.Timestamp,
    log: Callable[[str], None] | None,
    products: pd.DataFrame | None,
    modes: dict[str, str],
) -> BacktestResult:
    """The accuracy table of the classes of `modes` (class -> seasonality), each run with its seasonality."""
    period = settings.share.period
    bt = settings.backtest
    h = bt.horizon
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    children = children.reset_index(drop=True)
    parent_of_child, parents = factorize(children, PARENT)
    child_class = children["product_class"].to_numpy()
    parent_class = child_class[first_rows(parent_of_child)]
    n_parents, n_children = len(parents), len(children)
    classes = list(settings.models.choices)
    class_code = {name: i for i, name in enumerate(classes)}
    p_cls = np.array([class_code[c] for c in parent_class], dtype=np.int64) if n_parents else np.zeros(0, np.int64)
    c_cls = p_cls[parent_of_child]

    real = (history["origin"] != "reference").to_numpy()
    c_code = lookup(history, LEAF, children)
    ok = real & (c_code >= 0)
    ccode = c_code[ok]
    pcode = parent_of_child[ccode]
    ords = period_ordinal(history["period_start"], period)[ok]
    qty = history["quantity"].to_numpy(float)[ok]
    first_ord = int(ords.min()) if len(ords) else cycle_ord
    origins = origin_ordinals(settings, cycle_ord, first_ord)
    share_settings, models = settings.share, settings.models

    strategies = list(bt.strategies)
    names = strategies + [BENCHMARK]
    # sums[name][grain]: (n_classes, 5) running sums of abs error, error, actual, scaled error, scaled cells
    sums = {s: {g: np.zeros((len(classes), len(_SUMS))) for g in ("leaf", "parent")} for s in names}
    driver = "mint_shrink" if any(s in NEEDS_RESIDUALS for s in strategies) else "forecast_proportions"
    coverage = CoverageBook(settings.levels, len(classes))
    for o in origins:
        origin_date = ordinal_to_start(np.array([o]), period)[0]
        if log:
            log(f"backtest origin {origin_date.date()}")
        p_grid = series_grid(pcode, ords, qty, n_parents, o)
        c_grid = series_grid(ccode, ords, qty, n_children, o)
        season = cycle_season_plan(p_grid, parents.assign(product_class=parent_class), products, modes,
                                   settings.seasonal_groups, parent_of_child, period, o)
        base = base_forecasts(p_grid, c_grid, parent_class, child_class, {c: driver for c in modes}, models, h, log,
                              seasonality=modes, season=season, sd=bool(settings.levels))
        shares = compute_shares(history, children, share_settings, origin_date)
        share_lookup = lookup(children, LEAF, shares)
        # the period shares the cycle would split by (per-period methods differ from the base share)
        basis = period_shares(shares, share_settings, origin_date, None, history, horizon=h)[0][share_lookup]
        leaf_actual = _dense(ccode, ords, qty, n_children, o, h)
        parent_actual = parent_sums(leaf_actual, parent_of_child, n_parents)
        scale = {"leaf": _scales(c_grid, child_class, settings), "parent": _scales(p_grid, parent_class, settings)}
        fc = {}
        for s in strategies:
            p, l, _, _ = coherent_forecasts(
                s, base.parent_fc, base.leaf_fc, parent_of_child, basis, base.parent_res, base.leaf_res
            )
            fc[s] = {"parent": p, "leaf": l}
            coverage.add(s, base, p, l, parent_of_child, parent_actual, leaf_actual, p_cls, c_cls)
        fc[BENCHMARK] = {
            "parent": _seasonal_naive(p_grid, h, period, log),
            "leaf": _seasonal_naive(c_grid, h, period, log),
        }
        for s in names:
            for grain, actual, cls in (("leaf", leaf_actual, c_cls), ("parent", parent_actual, p_cls)):
                e = fc[s][grain] - actual
                q = scale[grain][:, None]
                good = np.isfinite(q) & (q > 0)
                scaled = np.divide(np.abs(e), q, out=np.zeros_like(e), where=good)
                per_series = np.stack(
                    [np.abs(e).sum(1), e.sum(1), actual.sum(1), scaled.sum(1), np.broadcast_to(good, e.shape).sum(1)],
                    axis=1,
                )
                np.add.at(sums[s][grain], cls, per_series)
    return BacktestResult(
        accuracy=pd.concat([_table(sums, classes, c_cls, p_cls, len(origins), h),
                            coverage.rows(classes, c_cls, p_cls, len(origins), h)], ignore_index=True),
        origins=[ordinal_to_start(np.array([o]), period)[0] for o in origins],
    )


def _table(sums, classes, c_cls, p_cls, n_origins: int, h: int) -> pd.DataFrame:
    rows = []
    counts = {"leaf": np.bincount(c_cls, minlength=len(classes)), "parent": np.bincount(p_cls, minlength=len(classes))}
    wmape = {}
    for s, by_grain in sums.items():
        for grain, m in by_grain.items():
            abs_e, err, act, scaled, cells = m.T
            with np.errstate(invalid="ignore", divide="ignore"):
                wmape[s, grain] = np.where(act > 0, abs_e / act, np.nan)
                bias = np.where(act > 0, err / act, np.nan)
                mase = np.where(cells > 0, scaled / cells, np.nan)
            for metric, values in (("wmape", wmape[s, grain]), ("bias", bias), ("mase", mase)):
                rows.append((s, grain, metric, values))
    for s, grain in list(wmape):
        rows.append((s, grain, "fva", wmape[BENCHMARK, grain] - wmape[s, grain]))
    out = []
    for s, grain, metric, values in rows:
        for i, name in enumerate(classes):
            out.append((name, s, grain, metric, float(values[i]), n_origins, h, int(counts[grain][i])))
    table = pd.DataFrame(out, columns=[c for c in ACCURACY_COLUMNS if c != "seasonality"])
    keep = table["series"] > 0  # a class without series in the data has nothing to report
    return table[keep].reset_index(drop=True)



def run(
    lifecycle_history: pd.DataFrame,
    share_tables: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: BacktestSettings,
    log: Log = quiet,
    products: pd.DataFrame | None = None,
) -> StageResult:
    """The accuracy table of every strategy and the benchmark, with the accuracy by class in the metadata."""
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    children = share_tables[["product", "site", "customer", "product_class"]]
    result = run_backtest(lifecycle_history, children, settings, cycle_date, log=log, products=products)
    table = result.accuracy
    wide = table.pivot_table(
        index=["product_class", "seasonality", "grain", "strategy"], columns="metric", values="value"
    ).reset_index()
    figures = {
        "origins": ", ".join(str(o.date()) for o in result.origins),
        "accuracy_by_class": wide.sort_values(["product_class", "seasonality", "grain", "wmape"])
        if len(wide)
        else wide,
    }
    return StageResult(outputs={"backtest_accuracy": table}, metadata={"backtest_accuracy": figures})
