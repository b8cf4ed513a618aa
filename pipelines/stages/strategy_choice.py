"""Stage `strategy_choice`: the strategy each product class follows this cycle, decided once and stored.

Each class is judged by its selection metric (`backtest_accuracy.selection_metric`:
WMAPE for classes of mostly smooth and erratic series, RMSSE for mostly
intermittent and lumpy ones; `selection.metric`), at leaf grain, the grain
where the plan is used. For a class with `strategy: auto` the best strategy
of `backtest.strategies` by that metric (a tie goes to the strategy listed
first; a class without volume in the backtest takes the first) challenges the
class's strategy of its previous cycle, which it replaces only when it wins by
more than `selection.stability.tolerance` (relative) or by the one-sided
Diebold-Mariano test with the Harvey-Leybourne-Newbold correction on the
per-period losses of `backtest_losses` (`selection.stability`;
`pipelines.engines.forecast_comparison.stable_choice`): a pick does not flip
between cycles on noise. A class with a fixed strategy keeps it. Either way
the table gives the decision and its reason, the leaf-grain WMAPE and RMSSE,
the runner-up and the margin (the runner-up's score minus the chosen one's)
and seasonal naive's WMAPE. The backtest scores a fixed class with its own
strategy alone, so its runner-up is blank and its margin NaN. The forecast, the summary, the report and
`explain` read this table; none of them decides again from the current config.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipelines.checks import CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE
from pipelines.engines.forecast_comparison import StabilityRule, dm_test, stable_choice
from pipelines.engines.seasonal_base import choose_seasonality, configured_seasonality
from pipelines.results import CheckRows, Log, StageResult, quiet
from pipelines.vocabulary import AUTO, BENCHMARK

CHOICE_COLUMNS = [
    "product_class", "configured_strategy", "strategy", "leaf_wmape", "runner_up", "margin", "seasonal_naive_wmape",
    "beats_seasonal_naive", "metric", "score", "leaf_rmsse", "best", "previous_strategy", "decision", "reason",
    "p_value", "detail",
]
# the seasonality each class follows (`seasonal_base.choose_seasonality`: the backtest's for `seasonality: auto`);
# the strategy is chosen among the backtest rows of that seasonality
SEASONALITY_COLUMN = "seasonality"


@dataclass(frozen=True)
class StrategySettings:
    """The strategies the backtest compares (in order), each class's configured strategy (or `auto`), the rule."""

    candidates: tuple[str, ...]
    configured: Mapping[str, str]
    rule: StabilityRule = StabilityRule()
    seasonality: Mapping[str, str] = field(default_factory=dict)  # class -> configured seasonality (or auto)

    @classmethod
    def of(cls, config) -> StrategySettings:
        """From a planning config (every class it holds); a StrategySettings is returned as it is."""
        if isinstance(config, StrategySettings):
            return config
        configured = {name: pc.strategy for name, pc in config.product_classes.items()}
        stab = config.selection.stability
        rule = StabilityRule(stab.tolerance, stab.level, stab.switch_on)
        seasonality = {name: configured_seasonality(pc) for name, pc in config.product_classes.items()}
        return cls(tuple(config.backtest.strategies), configured, rule, seasonality)


def _p_value(losses: pd.DataFrame | None, name: str, incumbent: str, challenger: str, metric: str) -> float:
    """One-sided DM-HLN p-value that `challenger` has the lower leaf loss than `incumbent` (NaN: not testable)."""
    if losses is None or losses.empty or not incumbent or incumbent == challenger:
        return np.nan
    mine = losses[losses["product_class"] == name]
    column = "squared_scaled_loss" if metric == "rmsse" else "abs_loss"
    by = {s: g.sort_values(["origin", "step"])[column].to_numpy(float) for s, g in mine.groupby("strategy")}
    if incumbent not in by or challenger not in by or len(by[incumbent]) != len(by[challenger]):
        return np.nan
    d = by[incumbent] - by[challenger]
    h = int(mine["step"].max())
    if len(d) <= h:
        return np.nan
    return float(dm_test(d, h=h, alternative="greater").p_value[0])


def choose_strategies(
    accuracy: pd.DataFrame,
    settings: StrategySettings,
    losses: pd.DataFrame | None = None,
    previous: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Per product class: the strategy in effect with its decision and reason; see the module docstring.

    losses: backtest_losses (None: no test, the tolerance alone decides);
    previous: the class's strategy_choice of its previous cycle (None: first cycle).
    """
    settings = StrategySettings.of(settings)
    leaf = accuracy[accuracy["grain"] == "leaf"]
    before = {} if previous is None or previous.empty else previous.set_index("product_class")["strategy"].to_dict()
    rows = []
    candidates = list(settings.candidates)
    for name, configured in settings.configured.items():
        mine = leaf[leaf["product_class"] == name]
        if mine.empty:
            continue
        metric = str(mine["selection_metric"].iloc[0]) if "selection_metric" in mine else "wmape"
        value = {m: g.set_index("strategy")["value"] for m, g in mine.groupby("metric")}
        # a fixed class was backtested with its own strategy alone: the others are not ranked
        backtested = [s for s in candidates if s in value[metric].index] or candidates
        scores = value[metric].reindex(candidates)
        ranked = sorted(backtested, key=lambda s: (np.inf if np.isnan(scores[s]) else scores[s], candidates.index(s)))
        best = ranked[0]
        inc = str(before.get(name, ""))
        if configured == AUTO:
            p = _p_value(losses, name, inc, best, metric)
            offered = [inc in candidates]
            d = stable_choice(
                [inc], [best], [scores.get(inc, np.nan)], [scores[best]], [p], settings.rule, offered
            ).iloc[0]
            chosen, decision, reason, detail = d["chosen"], d["decision"], d["reason"], d["detail"]
        else:
            chosen, decision, reason, p = configured, "fixed", "configured", np.nan
            detail = f"configured {configured}; best by {metric} {best} ({scores[best]:.4g})" if len(backtested) > 1 \
                else f"configured {configured}; the other strategies are not backtested for a fixed class"
        score = float(scores.get(chosen, np.nan))
        others = [s for s in ranked if s != chosen]
        runner = others[0] if others else ""
        margin = float(scores[runner] - score) if runner else np.nan
        wm = value.get("wmape", pd.Series(dtype=float))
        chosen_wmape, sn = float(wm.get(chosen, np.nan)), float(wm.get(BENCHMARK, np.nan))
        rmsse = float(value.get("rmsse", pd.Series(dtype=float)).get(chosen, np.nan))
        rows.append((
            name, configured, chosen, chosen_wmape, runner, margin, sn, not bool(chosen_wmape > sn), metric, score,
            rmsse, best, inc, decision, reason, p, detail,
        ))
    return pd.DataFrame(rows, columns=CHOICE_COLUMNS)


def _losses_of(losses: pd.DataFrame | None, seasonality: dict[str, str]) -> pd.DataFrame | None:
    """The backtest losses under each class's seasonality in effect (all of them without a seasonality column)."""
    if losses is None or losses.empty or "seasonality" not in losses.columns:
        return losses
    wanted = losses["product_class"].map(seasonality)
    return losses[wanted.isna() | (losses["seasonality"] == wanted)]


def run(
    backtest_accuracy: pd.DataFrame,
    settings: StrategySettings,
    log: Log = quiet,
    backtest_losses: pd.DataFrame | None = None,
    previous: pd.DataFrame | None = None,
    previous_cycle: str | None = None,
) -> StageResult:
    """The strategy_choice table and its WARN check (a chosen strategy that loses to seasonal naive)."""
    settings = StrategySettings.of(settings)
    accuracy, seasonality = choose_seasonality(
        backtest_accuracy, settings.seasonality, settings.configured, settings.candidates
    )
    choice = choose_strategies(accuracy, settings, _losses_of(backtest_losses, seasonality), previous)
    choice[SEASONALITY_COLUMN] = choice["product_class"].map(seasonality).fillna("none")
    losing = choice[~choice["beats_seasonal_naive"].astype(bool)]
    return StageResult(
        outputs={"strategy_choice": choice},
        metadata={
            "strategy_choice": {
                "auto_classes": int((choice["configured_strategy"] == AUTO).sum()),
                "previous_cycle": previous_cycle or "none",
                "decisions": choice[["product_class", "strategy", "decision", "reason", "detail"]],
            }
        },
        checks={CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE: CheckRows(losing, {"strategy_choice": choice})},
    )
