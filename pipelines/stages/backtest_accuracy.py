"""Stage `backtest_accuracy`: which strategy, share window and method forecast each product class best.

Rolling origin (Tashman 2000; Hyndman & Athanasopoulos, FPP 3rd ed., section
5.10): `backtest.origins` origins, the last `backtest.horizon` periods before
the cycle date and each earlier one `backtest.step` periods before the next.
At each origin the history after it is held back, and the history before it
is the raw history cleaned again from those periods alone
(`pipelines.engines.origin_cleaning`): the cycle's centred outlier window
would otherwise see up to half a window of the future it forecasts. Every
series is re-classed and re-forecast from it with the class's models, at both
grains, and each strategy of `pipelines.engines.hierarchy` turns the base
forecasts into coherent parent and leaf forecasts for `horizon` periods:

- `top_down`: the parent forecast split by the share table computed at the
  origin with the class's window and method; every candidate window x method
  of `selection.share_tuning` is scored the same way (`share_tuning`, the
  choice for `window: auto` / `method: auto`, `pipelines.engines.share_tuning`)
  and the strategies are scored with the class's chosen (or fixed) one;
- `forecast_proportions`, `bottom_up`, `mint_shrink`, `wls_var` as documented
  there (MinT's residuals are the in-sample one-step residuals at the origin).

Seasonal naive at each grain (season length 52 weeks / 12 months where a
series holds one full season, else naive) is the benchmark.

Series are the active children of the cycle and their parents; only real
history counts (copied reference history shapes shares, it is not demand), and
a parent's actuals are the sum of its children's, so the two grains agree.

Accuracy per class, strategy and grain, pooled over all series, periods and
origins (`pipelines.engines.backtest_scores`): WMAPE, bias, MASE and RMSSE
(scaled by each series' in-sample naive differences at the origin, seasonal
ones for a class with `seasonal: true`; RMSSE pooled by recent volume) and
forecast value added over seasonal naive; `value` against the raw actuals
(returns netted), `value_cleaned` against the cycle's cleaned ones. Each class
is judged by the metric of the demand classes holding most of its leaf series
(`selection.metric`; `scaled_errors.class_metric`), `selection_metric`.
`backtest_losses` keeps each strategy's leaf loss per backtest period for the
comparison test of the next stage, `strategy_choice`, which makes the choice.

Seasonality: every class is backtested with each seasonality it may follow
(`seasonal_base.seasonality_candidates`: its own setting, or for
`seasonality: auto` none - own where `models.seasonal` is true - and
`group`, the group seasonal indices estimated at each origin from the history
before it); the accuracy and loss tables have a row per seasonality. Seasonal
naive does not depend on it and is repeated under each. The share tuning is
that of the class's first seasonality (its configured one, or `none`).

Intervals: with `intervals.levels`, each strategy's intervals at each origin
(`pipelines.engines.forecast_intervals`, as the cycle makes them) are scored
by their coverage of the raw actuals, bounds included (metric
`coverage_<level>`; a well calibrated 80 % interval covers about 0.8).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipelines.calendar import ordinal_to_start, period_ordinal, season_length
from pipelines.checks import SHARE_CHOICE_NEAR_BEST
from pipelines.config_sections import BacktestConfig
from pipelines.config_selection import SelectionConfig
from pipelines.engines.backtest_scores import CLEANED, RAW, ScoreBook, accuracy_table, dense_window, error_scales
from pipelines.engines.base_forecasts import base_forecasts, series_to_fit
from pipelines.engines.children import active_children
from pipelines.engines.forecast_comparison import StabilityRule
from pipelines.engines.forecast_intervals import CoverageBook
from pipelines.engines.hierarchy import NEEDS_RESIDUALS, coherent_forecasts, parent_sums
from pipelines.engines.models import ModelSettings, demand_classes, run_model_groups, series_grid
from pipelines.engines.origin_cleaning import ClassCleaning, clean_before, raw_quantities
from pipelines.engines.period_shares import period_shares
from pipelines.engines.scaled_errors import MetricRule, class_metric
from pipelines.engines.seasonal_base import cycle_season_plan, seasonality_candidates
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.share_tuning import candidate_name, candidate_settings, class_candidates, decide
from pipelines.engines.shares import compute_shares
from pipelines.keys import LEAF, PARENT, factorize, first_rows, lookup
from pipelines.progress import SeriesProgress
from pipelines.results import CheckRows, Log, StageResult, quiet
from pipelines.vocabulary import AUTO, BENCHMARK, Seasonality

ACCURACY_COLUMNS = [
    "product_class", "seasonality", "strategy", "grain", "metric", "value", "origins", "horizon", "series",
    "value_cleaned", "selection_metric",
]


@dataclass(frozen=True)
class BacktestSettings:
    """What the backtest reads: its origins and strategies, the share engine's settings, the models."""

    backtest: BacktestConfig
    share: ShareSettings
    models: ModelSettings
    selection: SelectionConfig = SelectionConfig()
    configured: Mapping[str, tuple] = field(default_factory=dict)  # class -> (window, method) as configured
    cleaning: Mapping[str, ClassCleaning] = field(default_factory=dict)  # class -> outlier rule, at each origin
    seasonality: Mapping[str, tuple[str, ...]] = field(default_factory=dict)  # class -> seasonalities compared
    seasonal_groups: Mapping[str, str] = field(default_factory=dict)
    levels: tuple[float, ...] = ()

    @classmethod
    def of(cls, config) -> BacktestSettings:
        """From a planning config (every class it holds); a BacktestSettings is returned as it is."""
        if isinstance(config, BacktestSettings):
            return config
        classes = config.product_classes.items()
        return cls(
            config.backtest, ShareSettings.of(config), ModelSettings.of(config), config.selection,
            {n: (pc.window, pc.method) for n, pc in classes},
            {n: ClassCleaning(pc.outlier_rule(config.cleansing), pc.models.seasonal) for n, pc in classes},
            {n: seasonality_candidates(pc) for n, pc in classes}, {n: pc.seasonal_group for n, pc in classes},
            tuple(config.intervals.levels),
        )

    def candidates(self, name: str) -> tuple[str, ...]:
        """The seasonalities compared for a class (its models' own setting where none is configured)."""
        own = Seasonality.OWN if self.models.choices[name].seasonal else Seasonality.NONE
        return tuple(self.seasonality.get(name, (own,)))


@dataclass(frozen=True)
class BacktestResult:
    accuracy: pd.DataFrame  # BacktestAccuracy
    origins: list[pd.Timestamp]  # origins evaluated
    losses: pd.DataFrame  # BacktestLosses: leaf-grain class loss per scored period, for the DM-HLN test
    tuning: pd.DataFrame  # ShareTuning: every share candidate's score per class, and the choice


def origin_ordinals(settings: BacktestSettings, cycle_ord: int, first_ord: int) -> list[int]:
    """Origins (period ordinals), oldest first; an origin with no history before it is left out."""
    bt = settings.backtest
    last = cycle_ord - bt.horizon
    wanted = [last - i * bt.step for i in reversed(range(bt.origins))]
    return [o for o in wanted if o > first_ord]


def _seasonal_naive(grid, horizon: int, period: str, log, progress=None) -> np.ndarray:
    sl = season_length(period)
    length = np.bincount(grid.series, minlength=grid.n_series)
    names = np.where(length > 0, "seasonal_naive", "zero").astype(object)
    season = np.where(length >= sl, sl, 1)
    return np.clip(run_model_groups(grid, names, season, horizon, log=log, progress=progress).forecast, 0, None)


def run_backtest(
    history: pd.DataFrame,
    children: pd.DataFrame,
    settings: BacktestSettings,
    cycle_date: pd.Timestamp,
    log: Callable[[str], None] | None = None,
    cleaned: pd.DataFrame | None = None,
    previous_tuning: pd.DataFrame | None = None,
    history_periods: int | None = None,
    products: pd.DataFrame | None = None,
) -> BacktestResult:
    """The accuracy table (class x seasonality x strategy x grain x metric), the losses and the share tuning.

    history: lifecycle history (all origins); children: the cycle's active
    children (leaf keys, product_class); cleaned: the cycle's cleaned history
    (its raw quantities are re-cleaned at each origin and scored against; None:
    the lifecycle history is both); previous_tuning: last cycle's share_tuning;
    products: the master data (for a seasonal_group that is one of its
    columns). One run per seasonality compared, each over the classes that
    compare it; see the module docstring.
    """
    settings = BacktestSettings.of(settings)
    classes = list(settings.models.choices)
    variants = list(dict.fromkeys(v for c in classes for v in settings.candidates(c)))
    parts: dict[str, list[pd.DataFrame]] = {"accuracy": [], "losses": [], "tuning": []}
    origins: list[pd.Timestamp] = []
    for variant in variants:  # a loop over the two or three seasonalities
        mine = {c: variant for c in classes if variant in settings.candidates(c)}
        first = [c for c in mine if settings.candidates(c)[0] == variant]
        one = _run_one(history, children, settings, cycle_date, log, cleaned, previous_tuning, history_periods,
                       products, mine)
        parts["accuracy"].append(one.accuracy[one.accuracy["product_class"].isin(list(mine))].assign(seasonality=variant))
        parts["losses"].append(one.losses[one.losses["product_class"].isin(list(mine))].assign(seasonality=variant))
        parts["tuning"].append(one.tuning[one.tuning["product_class"].isin(first)])
        origins = one.origins
    out = {k: pd.concat(v, ignore_index=True) for k, v in parts.items() if v}
    return BacktestResult(
        accuracy=out["accuracy"][ACCURACY_COLUMNS], origins=origins, losses=out["losses"], tuning=out["tuning"]
    )


def _run_one(
    history: pd.DataFrame,
    children: pd.DataFrame,
    settings: BacktestSettings,
    cycle_date: pd.Timestamp,
    log: Callable[[str], None] | None,
    cleaned: pd.DataFrame | None,
    previous_tuning: pd.DataFrame | None,
    history_periods: int | None,
    products: pd.DataFrame | None,
    modes: dict[str, str],
) -> BacktestResult:
    """The tables of the classes of `modes` (class -> seasonality), each class run with its seasonality."""
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
    raw = qty
    if cleaned is not None:
        found = raw_quantities(history, cleaned)[ok]
        raw = np.where(np.isfinite(found), found, qty)
    shortage = history["shortage"].to_numpy(bool)[ok] if "shortage" in history else np.zeros(len(qty), dtype=bool)
    first_ord = int(ords.min()) if len(ords) else cycle_ord
    origins = origin_ordinals(settings, cycle_ord, first_ord)
    share_settings, models = settings.share, settings.models
    sl = season_length(period)
    seasonal = [n for n, m in models.choices.items() if m.seasonal]

    strategies = list(bt.strategies)
    book = ScoreBook(classes, len(origins), h)
    tune = ScoreBook(classes, len(origins), h)
    periods = history_periods if history_periods is not None else cycle_ord - first_ord
    grid = _candidate_grid(settings, periods, classes)
    union = list(dict.fromkeys((w, m) for cands in grid.values() for w, m, _ in cands))
    kept = []
    demand = np.full(n_children, "", dtype=object)
    cls = {"leaf": c_cls, "parent": p_cls}
    driver = "mint_shrink" if any(s in NEEDS_RESIDUALS for s in strategies) else "forecast_proportions"
    drivers = {c: driver for c in modes}
    coverage = CoverageBook(settings.levels, len(classes))
    # each origin: the base forecasts, then seasonal naive on every parent and child
    per_origin = series_to_fit(parent_class, child_class, drivers) + n_parents + n_children
    fits = SeriesProgress(len(origins) * per_origin, log)
    for k, o in enumerate(origins):
        origin_date = ordinal_to_start(np.array([o]), period)[0]
        if log:
            log(f"backtest origin {origin_date.date()}")
        # the history the origin saw: the raw history before it, cleaned from it alone
        seen = qty if cleaned is None else clean_before(
            ccode, ords, raw, shortage, child_class, settings.cleaning, o, sl
        )
        p_grid = series_grid(pcode, ords, seen, n_parents, o)
        c_grid = series_grid(ccode, ords, seen, n_children, o)
        demand = demand_classes(c_grid)[0]
        season = cycle_season_plan(p_grid, parents.assign(product_class=parent_class), products, modes,
                                   settings.seasonal_groups, parent_of_child, period, o)
        base = base_forecasts(p_grid, c_grid, parent_class, child_class, drivers, models, h, log, fits.advance,
                              seasonality=modes, season=season, sd=bool(settings.levels))
        as_seen_qty = history["quantity"].to_numpy(float).copy()
        as_seen_qty[ok] = seen
        as_seen = history.assign(quantity=as_seen_qty)  # the share tables as the origin would have made them
        # scored against the raw actuals, and against the cycle's cleaned ones as the second column
        leaf_actual = {RAW: dense_window(ccode, ords, raw, n_children, o, h)}
        leaf_actual[CLEANED] = dense_window(ccode, ords, qty, n_children, o, h)
        parent_actual = {b: parent_sums(a, parent_of_child, n_parents) for b, a in leaf_actual.items()}
        actual = {"leaf": leaf_actual, "parent": parent_actual}
        scales = {
            "leaf": error_scales(c_grid, child_class, seasonal, period, h),
            "parent": error_scales(p_grid, parent_class, seasonal, period, h),
        }
        bench = {
            "parent": _seasonal_naive(p_grid, h, period, log, fits.advance),
            "leaf": _seasonal_naive(c_grid, h, period, log, fits.advance),
        }
        for grain, f in bench.items():
            book.add(k, BENCHMARK, grain, f, actual[grain], cls[grain], scales[grain])
        bases: dict[str, np.ndarray] = {}
        share_lookup = None
        for w, m in union:
            candidate = candidate_settings(share_settings, w, m)
            shares = compute_shares(as_seen, children, candidate, origin_date)
            share_lookup = lookup(children, LEAF, shares) if share_lookup is None else share_lookup
            # the period shares the cycle would split by (per-period methods differ from the base share)
            bases[candidate_name(w, m)] = period_shares(shares, candidate, origin_date, None, as_seen, horizon=h)[0][
                share_lookup
            ]
            _, leaf, _, _ = coherent_forecasts("top_down", base.parent_fc, base.leaf_fc, parent_of_child,
                                               bases[candidate_name(w, m)])
            tune.add(k, candidate_name(w, m), "leaf", leaf, actual["leaf"], c_cls, scales["leaf"])
        kept.append((base, bases, actual, scales))
    metric = class_metric(c_cls, demand, len(classes), MetricRule(**settings.selection.metric.model_dump())).metric
    metric_of = dict(zip(classes, metric, strict=True))
    previous = {} if previous_tuning is None or previous_tuning.empty else (
        previous_tuning[previous_tuning["chosen"].astype(bool)].set_index("product_class")["candidate"].to_dict()
    )
    stab = settings.selection.stability
    rule = StabilityRule(stab.tolerance, stab.level, stab.switch_on)
    tuning = decide(tune, grid, settings.configured, metric_of, previous, rule)
    chosen = tuning[tuning["chosen"]].set_index("product_class")["candidate"].to_dict()
    for k, (base, bases, actual, scales) in enumerate(kept):
        basis = np.zeros((n_children, h))
        for name, cand in chosen.items():  # each class split by its chosen window and method
            rows = child_class == name
            basis[rows] = bases[cand][rows]
        for s in strategies:
            p, l, _, _ = coherent_forecasts(
                s, base.parent_fc, base.leaf_fc, parent_of_child, basis, base.parent_res, base.leaf_res
            )
            for grain, f in (("parent", p), ("leaf", l)):
                book.add(k, s, grain, f, actual[grain], cls[grain], scales[grain])
            coverage.add(s, base, p, l, parent_of_child, actual["parent"][RAW], actual["leaf"][RAW], p_cls, c_cls)
    dates = [ordinal_to_start(np.array([o]), period)[0] for o in origins]
    names = [s for s in strategies] + [BENCHMARK]
    covered = coverage.rows(classes, c_cls, p_cls, len(origins), h)
    covered = covered.assign(value_cleaned=np.nan, selection_metric=covered["product_class"].map(metric_of))
    return BacktestResult(
        accuracy=pd.concat(
            [accuracy_table(book, names, metric, c_cls, p_cls, len(origins), h), covered], ignore_index=True
        ),
        origins=dates,
        losses=book.loss_table(dates),
        tuning=tuning,
    )


def _candidate_grid(settings: BacktestSettings, periods: int, classes: list[str]) -> dict:
    """Per class: the share candidates (window, method, own) of `share_tuning.class_candidates`."""
    tuning = settings.selection.share_tuning
    out = {}
    for name in classes:
        window, method = settings.configured.get(name, (AUTO, AUTO))
        out[name] = class_candidates(
            settings.share.rules[name], window == AUTO, method == AUTO, tuning.windows, tuning.methods, periods
        )
    return out


def run(
    lifecycle_history: pd.DataFrame,
    cleaned_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: BacktestSettings,
    log: Log = quiet,
    previous_tuning: pd.DataFrame | None = None,
) -> StageResult:
    """The accuracy, loss and share tuning tables, the accuracy by class in the metadata, the share WARN check.

    The children are the cycle's active children (those the share table will
    hold); previous_tuning: the class's share_tuning of its previous cycle
    (None for its first), whose choice `window: auto` / `method: auto` keep
    unless a candidate wins clearly.
    """
    settings = BacktestSettings.of(settings)
    cycle = cycle_calendar.iloc[0]
    cycle_date = pd.Timestamp(cycle["cycle_date"])
    children = active_children(customer_spans, products, lifecycle_history, settings.share, cycle_date)
    children = children[["product", "site", "customer", "product_class"]]
    result = run_backtest(
        lifecycle_history, children, settings, cycle_date, log=log, cleaned=cleaned_history,
        previous_tuning=previous_tuning, history_periods=int(cycle["history_periods"]), products=products,
    )
    table, tuning = result.accuracy, result.tuning
    wide = table.pivot_table(
        index=["product_class", "seasonality", "grain", "strategy"], columns="metric", values="value"
    ).reset_index()
    figures = {
        "origins": ", ".join(str(o.date()) for o in result.origins),
        "accuracy_by_class": wide.sort_values(["product_class", "seasonality", "grain", "wmape"])
        if len(wide) else wide,
    }
    limit = settings.selection.share_tuning.max_gain
    fixed = tuning[tuning["configured"].astype(bool) & (tuning["gain"] > limit)]
    best = tuning[tuning["best"].astype(bool)]
    return StageResult(
        outputs={"backtest_accuracy": table, "backtest_losses": result.losses, "share_tuning": tuning},
        metadata={
            "backtest_accuracy": figures,
            "share_tuning": {"chosen": tuning[tuning["chosen"].astype(bool)], "best": best},
        },
        checks={
            SHARE_CHOICE_NEAR_BEST: CheckRows(
                fixed, {"max_gain": f"{limit:.1%} (selection.share_tuning.max_gain)", "best_candidates": best}
            )
        },
    )
