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
naive does not depend on it and is repeated under each. What does not depend
on the seasonality is made once per origin and shared by every seasonality
(`pipelines.engines.backtest_origins`: the history the origin saw, the
actuals, scales, seasonal naive and the period shares of every share
candidate); the share candidates are scored once, on the parent forecasts of
the class's first seasonality (its configured one, or `none`), and the
window and method chosen split the top-down forecasts of every seasonality.

Fixed strategy: a class with a configured strategy (not `auto`) is scored
with that strategy alone (and seasonal naive); the others could never be
chosen, so the models of a grain only they need are not run (a `top_down`
class fits no leaf models). Its share tuning, interval coverage and
seasonality choice are made as for an `auto` class, but a fixed window and
method leave out the `children_forecast` candidate and its leaf fits
(`selection.share_tuning.leaf_fit_candidates`, `pipelines.engines.share_tuning`).

Intervals: with `intervals.levels`, each strategy's intervals at each origin
(`pipelines.engines.forecast_intervals`, as the cycle makes them) are scored
by their coverage of the raw actuals, bounds included (metric
`coverage_<level>`; a well calibrated 80 % interval covers about 0.8).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipelines.calendar import ordinal_to_start, period_ordinal
from pipelines.checks import SHARE_CHOICE_NEAR_BEST
from pipelines.config_sections import BacktestConfig
from pipelines.config_selection import SelectionConfig
from pipelines.engines.backtest_combine import SELECTION_COUNT_COLUMNS, selection_counts
from pipelines.engines.backtest_origins import backtest_series, candidate_bases, origin_view
from pipelines.engines.backtest_scores import PART_COLUMNS, RAW, ScoreBook, accuracy_table
from pipelines.engines.base_forecasts import base_forecasts, series_to_fit
from pipelines.engines.children import active_children
from pipelines.engines.forecast_comparison import StabilityRule
from pipelines.engines.forecast_intervals import CoverageBook
from pipelines.engines.hierarchy import NEEDS_PARENT, NEEDS_RESIDUALS, coherent_forecasts
from pipelines.engines.models import ModelSettings
from pipelines.engines.origin_cleaning import ClassCleaning
from pipelines.engines.scaled_errors import MetricRule, class_metric
from pipelines.engines.seasonal_base import cycle_season_plan, seasonality_candidates
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.share_tuning import candidate_name, class_candidates, decide, left_out
from pipelines.progress import SeriesProgress
from pipelines.results import CheckRows, Log, StageResult, quiet
from pipelines.vocabulary import AUTO, BENCHMARK, Seasonality

ACCURACY_COLUMNS = [
    "product_class", "seasonality", "strategy", "grain", "metric", "value", "origins", "horizon", "series",
    "value_cleaned", "selection_metric", *PART_COLUMNS, *SELECTION_COUNT_COLUMNS,
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
    strategy: Mapping[str, str] = field(default_factory=dict)  # class -> configured strategy (absent: auto)
    # a shard of a class: its origins and MinT / WLS residual windows start at the class's first period (the
    # cycle_calendar's history_start), not its own lines' first, so its sums are the class's over its series
    class_window: bool = False

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
            tuple(config.intervals.levels), {n: pc.strategy for n, pc in classes},
        )

    def candidates(self, name: str) -> tuple[str, ...]:
        """The seasonalities compared for a class (its models' own setting where none is configured)."""
        own = Seasonality.OWN if self.models.choices[name].seasonal else Seasonality.NONE
        return tuple(self.seasonality.get(name, (own,)))

    def strategies_of(self, name: str) -> tuple[str, ...]:
        """The strategies a class is scored with: all of `backtest.strategies` for `strategy: auto`, else the one
        it is fixed to (the others could never be chosen, so their models are not run)."""
        fixed = self.strategy.get(name, AUTO)
        return tuple(self.backtest.strategies) if fixed == AUTO else (fixed,)

    def strategies_run(self, classes: list[str]) -> list[str]:
        """The strategies any of `classes` is scored with, in `backtest.strategies` order."""
        wanted = {s for c in classes for s in self.strategies_of(c)}
        listed = list(self.backtest.strategies)
        return [s for s in listed if s in wanted] + sorted(wanted - set(listed))

    def driver(self, name: str) -> str:
        """The strategy whose grains `base_forecasts` runs for a class: the grains and residuals its scored
        strategies need, and the parents the share tuning splits (a bottom-up class runs both grains)."""
        scored = self.strategies_of(name)
        if any(s in NEEDS_RESIDUALS for s in scored):
            return next(s for s in scored if s in NEEDS_RESIDUALS)
        if len(scored) == 1 and scored[0] in NEEDS_PARENT:
            return scored[0]
        return "forecast_proportions"

    def scored(self, table: pd.DataFrame, classes: list[str]) -> pd.DataFrame:
        """The rows of `classes` for the strategies each is scored with, and seasonal naive."""
        pairs = [(c, s) for c in classes for s in (*self.strategies_of(c), BENCHMARK)]
        keep = pd.MultiIndex.from_frame(table[["product_class", "strategy"]]).isin(pairs)
        return table[keep].reset_index(drop=True)

    def seasonal_classes(self) -> list[str]:
        """The classes whose models are seasonal (their errors are scaled by seasonal differences)."""
        return [n for n, m in self.models.choices.items() if m.seasonal]

    def stability(self) -> StabilityRule:
        stab = self.selection.stability
        return StabilityRule(stab.tolerance, stab.level, stab.switch_on)


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
    first_period: int | None = None,
) -> BacktestResult:
    """The accuracy table (class x seasonality x strategy x grain x metric), the losses and the share tuning.

    history: lifecycle history (all origins); children: the cycle's active
    children (leaf keys, product_class); cleaned: the cycle's cleaned history
    (its raw quantities are re-cleaned at each origin and scored against; None:
    the lifecycle history is both); previous_tuning: last cycle's share_tuning;
    products: the master data (for a seasonal_group that is one of its
    columns); first_period: the class's first period ordinal (a shard: where the origins and residual windows
    start; None: the first of `history`'s own rows). Each origin's view and share candidates are made once
    (`pipelines.engines.backtest_origins`), then each seasonality compared
    runs its base forecasts on them; see the module docstring.
    """
    settings = BacktestSettings.of(settings)
    period, h = settings.share.period, settings.backtest.horizon
    classes = list(settings.models.choices)
    variants = list(dict.fromkeys(v for c in classes for v in settings.candidates(c)))
    modes = {v: {c: v for c in classes if v in settings.candidates(c)} for v in variants}
    first = {c: settings.candidates(c)[0] for c in classes}  # the seasonality whose parents tune the shares
    data = backtest_series(history, children, classes, period, cycle_date, cleaned)
    origins = origin_ordinals(settings, data.cycle_ord, data.first_ord if first_period is None else first_period)
    grid, omitted = _candidate_grid(settings, history_periods if history_periods is not None else
                                    data.cycle_ord - data.first_ord, classes)
    union = list(dict.fromkeys((w, m) for cands in grid.values() for w, m, _ in cands))
    classes_of = {candidate_name(w, m): {c for c, cands in grid.items() if (w, m) in {x[:2] for x in cands}}
                  for w, m in union}
    drivers = {v: {c: settings.driver(c) for c in mine} for v, mine in modes.items()}
    books = {v: ScoreBook(classes, len(origins), h) for v in variants}
    coverage = {v: CoverageBook(settings.levels, len(classes)) for v in variants}
    tune = ScoreBook(classes, len(origins), h)
    per_origin = data.n_parents + data.n_children + sum(
        series_to_fit(data.parent_class, data.child_class, d) for d in drivers.values()
    )
    fits = SeriesProgress(len(origins) * per_origin, log)
    kept, demand = [], np.full(data.n_children, "", dtype=object)
    # an origin's share candidates (the children_forecast one waits on the model pool's leaf fits) are made on a
    # thread of their own while this one makes the origin's base forecasts and the next origin's view; at most one
    # origin's candidates are pending, so at most two origins' views are held
    with ThreadPoolExecutor(1, thread_name_prefix="share-candidates") as candidates:
        for k, o in enumerate(origins):
            if log:
                log(f"backtest origin {ordinal_to_start(np.array([o]), period)[0].date()}")
            view = origin_view(data, history, o, h, period, settings.cleaning, settings.seasonal_classes(),
                               cleaned is not None, log, fits.advance)
            demand = view.demand
            for v in variants:
                for grain in ("parent", "leaf"):
                    books[v].add(k, BENCHMARK, grain, view.bench[grain], view.actual[grain], data_cls(data, grain),
                                 view.scales[grain])
            if kept:
                kept[-1][1].result()  # the previous origin's candidates, before this one's are queued
            bases = candidates.submit(candidate_bases, view, data.children, settings.share, union, h, classes_of)
            base = {v: _base(data, view, settings, products, modes[v], drivers[v], o, log, fits.advance,
                             first_period) for v in variants}
            kept.append((base, bases, view.actual, view.scales))
        kept = [(base, bases.result(), actual, scales) for base, bases, actual, scales in kept]
    for k, (base, bases, actual, scales) in enumerate(kept):  # scored in origin order, as one after the other
        tuned = np.zeros_like(base[variants[0]].parent_fc)  # each class's parents under its first seasonality
        for v in variants:
            rows = np.isin(data.parent_class, [c for c in classes if first[c] == v])
            tuned[rows] = base[v].parent_fc[rows]
        for name, basis in bases.items():
            _, leaf, _, _ = coherent_forecasts("top_down", tuned, base[variants[0]].leaf_fc, data.parent_of_child,
                                               basis)
            tune.add(k, name, "leaf", leaf, actual["leaf"], data.c_cls, scales["leaf"])
    judged = class_metric(data.c_cls, demand, len(classes), MetricRule(**settings.selection.metric.model_dump()))
    metric, metric_of = judged.metric, dict(zip(classes, judged.metric, strict=True))
    tuning = decide(tune, grid, settings.configured, metric_of, _previous(previous_tuning), settings.stability(),
                    omitted)
    chosen = tuning[tuning["chosen"]].set_index("product_class")["candidate"].to_dict()
    for k, (base, bases, actual, scales) in enumerate(kept):
        basis = np.zeros((data.n_children, h))
        for name, cand in chosen.items():  # each class split by its chosen window and method
            rows = data.child_class == name
            basis[rows] = bases[cand][rows]
        for v in variants:
            for s in settings.strategies_run(list(modes[v])):
                b = base[v]
                p, leaf, _, _ = coherent_forecasts(
                    s, b.parent_fc, b.leaf_fc, data.parent_of_child, basis, b.parent_res, b.leaf_res
                )
                for grain, f in (("parent", p), ("leaf", leaf)):
                    books[v].add(k, s, grain, f, actual[grain], data_cls(data, grain), scales[grain])
                coverage[v].add(s, b, p, leaf, data.parent_of_child, actual["parent"][RAW], actual["leaf"][RAW],
                                data.p_cls, data.c_cls)
    dates = [ordinal_to_start(np.array([o]), period)[0] for o in origins]
    parts: dict[str, list[pd.DataFrame]] = {"accuracy": [], "losses": []}
    for v in variants:
        mine = list(modes[v])
        names = settings.strategies_run(mine) + [BENCHMARK]
        covered = coverage[v].rows(classes, data.c_cls, data.p_cls, len(origins), h)
        covered = covered.assign(value_cleaned=np.nan, selection_metric=covered["product_class"].map(metric_of),
                                 numerator_cleaned=np.nan, denominator_cleaned=np.nan)
        table = pd.concat([accuracy_table(books[v], names, metric, data.c_cls, data.p_cls, len(origins), h), covered],
                          ignore_index=True)
        table = selection_counts(table, classes, judged.mass)
        parts["accuracy"].append(settings.scored(table, mine).assign(seasonality=v))
        parts["losses"].append(settings.scored(books[v].loss_table(dates), mine).assign(seasonality=v))
    out = {name: pd.concat(frames, ignore_index=True) for name, frames in parts.items()}
    return BacktestResult(accuracy=out["accuracy"][ACCURACY_COLUMNS], origins=dates, losses=out["losses"],
                          tuning=tuning)


def data_cls(data, grain: str) -> np.ndarray:
    """The class code of each series of `grain`."""
    return data.c_cls if grain == "leaf" else data.p_cls


def _base(data, view, settings: BacktestSettings, products, modes: dict, drivers: dict, o: int, log, progress,
          first_period: int | None = None):
    """The base forecasts of one origin for the classes of `modes` (class -> seasonality) at their drivers' grains."""
    parents = data.parents.assign(product_class=data.parent_class)
    season = cycle_season_plan(view.p_grid, parents, products, modes, settings.seasonal_groups, data.parent_of_child,
                               settings.share.period, o)
    return base_forecasts(view.p_grid, view.c_grid, data.parent_class, data.child_class, drivers, settings.models,
                          settings.backtest.horizon, log, progress, seasonality=modes, season=season,
                          sd=bool(settings.levels), residual_start=first_period)


def _previous(previous_tuning: pd.DataFrame | None) -> dict:
    """Last cycle's chosen share candidate per class."""
    if previous_tuning is None or previous_tuning.empty:
        return {}
    return previous_tuning[previous_tuning["chosen"].astype(bool)].set_index("product_class")["candidate"].to_dict()


def _candidate_grid(settings: BacktestSettings, periods: int, classes: list[str]) -> tuple[dict, dict]:
    """Per class: the share candidates (window, method, own) of `share_tuning.class_candidates`, and the methods
    it leaves out (`share_tuning.left_out`: leaf fits of a class with a fixed window and method)."""
    tuning = settings.selection.share_tuning
    grid, omitted = {}, {}
    for name in classes:
        window, method = settings.configured.get(name, (AUTO, AUTO))
        rule, auto_window, auto_method = settings.share.rules[name], window == AUTO, method == AUTO
        omitted[name] = left_out(rule, auto_window, auto_method, tuning.methods, tuning.leaf_fit_candidates)
        grid[name] = class_candidates(rule, auto_window, auto_method, tuning.windows, tuning.methods, periods,
                                      omitted[name])
    return grid, omitted


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
    first = None
    if settings.class_window and pd.notna(cycle["history_start"]):
        first = int(period_ordinal(pd.DatetimeIndex([cycle["history_start"]]), settings.share.period)[0])
    result = run_backtest(
        lifecycle_history, children, settings, cycle_date, log=log, cleaned=cleaned_history,
        previous_tuning=previous_tuning, history_periods=int(cycle["history_periods"]), products=products,
        first_period=first,
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
