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
from pipelines.engines.accuracy import mase_scale
from pipelines.engines.backtest_scores import CLEANED, RAW, Scales, ScoreBook
from pipelines.engines.base_forecasts import base_forecasts
from pipelines.engines.children import active_children
from pipelines.engines.forecast_comparison import StabilityRule
from pipelines.engines.hierarchy import NEEDS_RESIDUALS, coherent_forecasts, parent_sums
from pipelines.engines.models import ModelSettings, demand_classes, run_model_groups, series_grid
from pipelines.engines.origin_cleaning import ClassCleaning, clean_before, raw_quantities
from pipelines.engines.period_shares import period_shares
from pipelines.engines.scaled_errors import MetricRule, class_metric, rmsse_scale, volume_weights
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.share_tuning import candidate_name, candidate_settings, class_candidates, decide
from pipelines.engines.shares import compute_shares
from pipelines.keys import LEAF, PARENT, factorize, first_rows, lookup
from pipelines.results import CheckRows, Log, StageResult, quiet
from pipelines.vocabulary import AUTO, BENCHMARK

ACCURACY_COLUMNS = [
    "product_class", "strategy", "grain", "metric", "value", "origins", "horizon", "series", "value_cleaned",
    "selection_metric",
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
        )


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


def _dense(code: np.ndarray, ords: np.ndarray, qty: np.ndarray, n: int, start: int, width: int) -> np.ndarray:
    """(n, width) sums of qty per series for periods start..start+width-1."""
    inside = (ords >= start) & (ords < start + width)
    flat = np.bincount(code[inside] * width + (ords[inside] - start), weights=qty[inside], minlength=n * width)
    return flat.reshape(n, width)


def _seasonal_naive(grid, horizon: int, period: str, log) -> np.ndarray:
    sl = season_length(period)
    length = np.bincount(grid.series, minlength=grid.n_series)
    names = np.where(length > 0, "seasonal_naive", "zero").astype(object)
    season = np.where(length >= sl, sl, 1)
    return np.clip(run_model_groups(grid, names, season, horizon, log=log).forecast, 0, None)


def _scales(grid, cls: np.ndarray, settings: BacktestSettings, h: int) -> Scales:
    """MASE and RMSSE scales per series (seasonal differences for seasonal classes) and RMSSE's volume weights."""
    sl = season_length(settings.share.period)
    seasonal = np.isin(cls, [n for n, m in settings.models.choices.items() if m.seasonal])
    q = mase_scale(grid.series, grid.y, grid.n_series, 1)
    q2 = rmsse_scale(grid.series, grid.y, grid.n_series, 1)
    if seasonal.any():
        qs = mase_scale(grid.series, grid.y, grid.n_series, sl)
        q2s = rmsse_scale(grid.series, grid.y, grid.n_series, sl)
        q, q2 = np.where(seasonal & np.isfinite(qs), qs, q), np.where(seasonal & np.isfinite(q2s), q2s, q2)
    return Scales(q=q, q2=q2, weight=volume_weights(grid.series, grid.y, grid.n_series, h))


def run_backtest(
    history: pd.DataFrame,
    children: pd.DataFrame,
    settings: BacktestSettings,
    cycle_date: pd.Timestamp,
    log: Callable[[str], None] | None = None,
    cleaned: pd.DataFrame | None = None,
    previous_tuning: pd.DataFrame | None = None,
    history_periods: int | None = None,
) -> BacktestResult:
    """The accuracy table (class x strategy x grain x metric), the losses and the share tuning; see the docstring.

    history: lifecycle history (all origins); children: the cycle's active
    children (leaf keys, product_class); cleaned: the cycle's cleaned history
    (its raw quantities are re-cleaned at each origin and scored against; None:
    the lifecycle history is both); previous_tuning: last cycle's share_tuning.
    """
    settings = BacktestSettings.of(settings)
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
        base = base_forecasts(p_grid, c_grid, parent_class, child_class, {c: driver for c in classes}, models, h, log)
        as_seen_qty = history["quantity"].to_numpy(float).copy()
        as_seen_qty[ok] = seen
        as_seen = history.assign(quantity=as_seen_qty)  # the share tables as the origin would have made them
        # scored against the raw actuals, and against the cycle's cleaned ones as the second column
        leaf_actual = {RAW: _dense(ccode, ords, raw, n_children, o, h)}
        leaf_actual[CLEANED] = _dense(ccode, ords, qty, n_children, o, h)
        parent_actual = {b: parent_sums(a, parent_of_child, n_parents) for b, a in leaf_actual.items()}
        actual = {"leaf": leaf_actual, "parent": parent_actual}
        scales = {
            "leaf": _scales(c_grid, child_class, settings, h), "parent": _scales(p_grid, parent_class, settings, h)
        }
        bench = {"parent": _seasonal_naive(p_grid, h, period, log), "leaf": _seasonal_naive(c_grid, h, period, log)}
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
    dates = [ordinal_to_start(np.array([o]), period)[0] for o in origins]
    names = [s for s in strategies] + [BENCHMARK]
    return BacktestResult(
        accuracy=_table(book, names, metric, c_cls, p_cls, len(origins), h),
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


def _table(book: ScoreBook, names, metric: np.ndarray, c_cls, p_cls, n_origins: int, h: int) -> pd.DataFrame:
    classes = book.classes
    counts = {"leaf": np.bincount(c_cls, minlength=len(classes)), "parent": np.bincount(p_cls, minlength=len(classes))}
    out = []
    for grain in ("leaf", "parent"):
        bench = {b: book.metrics(BENCHMARK, grain, b) for b in (RAW, CLEANED)}
        for s in names:
            values = {b: book.metrics(s, grain, b) for b in (RAW, CLEANED)}
            for b in (RAW, CLEANED):
                values[b]["fva"] = bench[b]["wmape"] - values[b]["wmape"]
            for name_metric in ("wmape", "bias", "mase", "rmsse", "fva"):
                for i, name in enumerate(classes):
                    out.append((
                        name, s, grain, name_metric, float(values[RAW][name_metric][i]), n_origins, h,
                        int(counts[grain][i]), float(values[CLEANED][name_metric][i]), metric[i],
                    ))
    table = pd.DataFrame(out, columns=ACCURACY_COLUMNS)
    keep = table["series"] > 0  # a class without series in the data has nothing to report
    return table[keep].reset_index(drop=True)


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
        previous_tuning=previous_tuning, history_periods=int(cycle["history_periods"]),
    )
    table, tuning = result.accuracy, result.tuning
    wide = table.pivot_table(
        index=["product_class", "grain", "strategy"], columns="metric", values="value"
    ).reset_index()
    figures = {
        "origins": ", ".join(str(o.date()) for o in result.origins),
        "accuracy_by_class": wide.sort_values(["product_class", "grain", "wmape"]) if len(wide) else wide,
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
