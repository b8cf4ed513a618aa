"""Stage `strategy_choice`: the strategy each product class follows this cycle, decided once and stored.

For a class with `strategy: auto` the backtest's winner: the strategy with
the lowest leaf-grain WMAPE among `backtest.strategies` (the leaf being where
the plan is used); a tie goes to the strategy listed first, a class without
volume in the backtest takes the first. A class with a fixed strategy keeps
it. Either way the table gives its leaf-grain WMAPE, the runner-up and the
margin (the runner-up's WMAPE minus the chosen one's, in WMAPE points) and
seasonal naive's WMAPE. The forecast, the summary, the report and `explain`
read this table; none of them decides again from the current config.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipelines.checks import CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE
from pipelines.engines.seasonal_base import choose_seasonality, configured_seasonality
from pipelines.results import CheckRows, Log, StageResult, quiet
from pipelines.vocabulary import AUTO, BENCHMARK

CHOICE_COLUMNS = [
    "product_class", "configured_strategy", "strategy", "leaf_wmape", "runner_up", "margin", "seasonal_naive_wmape",
    "beats_seasonal_naive",
]
# the seasonality each class follows (`seasonal_base.choose_seasonality`: the backtest's for `seasonality: auto`);
# the strategy is chosen among the backtest rows of that seasonality
SEASONALITY_COLUMN = "seasonality"


@dataclass(frozen=True)
class StrategySettings:
    """The strategies the backtest compares (in order) and each class's configured strategy (or `auto`)."""

    candidates: tuple[str, ...]
    configured: Mapping[str, str]
    seasonality: Mapping[str, str] = field(default_factory=dict)  # class -> configured seasonality (or auto)

    @classmethod
    def of(cls, config) -> StrategySettings:
        """From a planning config (every class it holds); a StrategySettings is returned as it is."""
        if isinstance(config, StrategySettings):
            return config
        configured = {name: pc.strategy for name, pc in config.product_classes.items()}
        seasonality = {name: configured_seasonality(pc) for name, pc in config.product_classes.items()}
        return cls(tuple(config.backtest.strategies), configured, seasonality)


def choose_strategies(accuracy: pd.DataFrame, settings: StrategySettings) -> pd.DataFrame:
    """Per product class: the strategy in effect (the backtest's winner for `auto`), runner-up and margin."""
    settings = StrategySettings.of(settings)
    leaf = accuracy[(accuracy["grain"] == "leaf") & (accuracy["metric"] == "wmape")]
    rows = []
    candidates = list(settings.candidates)
    for name, configured in settings.configured.items():
        mine = leaf[leaf["product_class"] == name].set_index("strategy")["value"]
        if mine.empty:
            continue
        scores = mine.reindex(candidates)
        ranked = sorted(candidates, key=lambda s: (np.inf if np.isnan(scores[s]) else scores[s], candidates.index(s)))
        chosen = ranked[0] if configured == AUTO else configured
        score = float(mine.get(chosen, np.nan))
        others = [s for s in ranked if s != chosen]
        runner = others[0] if others else ""
        margin = float(scores[runner] - score) if runner else np.nan
        sn = float(mine.get(BENCHMARK, np.nan))
        rows.append((name, configured, chosen, score, runner, margin, sn, not bool(score > sn)))
    return pd.DataFrame(rows, columns=CHOICE_COLUMNS)


def run(backtest_accuracy: pd.DataFrame, settings: StrategySettings, log: Log = quiet) -> StageResult:
    """The strategy_choice table and its WARN check (a chosen strategy that loses to seasonal naive)."""
    settings = StrategySettings.of(settings)
    accuracy, seasonality = choose_seasonality(
        backtest_accuracy, settings.seasonality, settings.configured, settings.candidates
    )
    choice = choose_strategies(accuracy, settings)
    choice[SEASONALITY_COLUMN] = choice["product_class"].map(seasonality).fillna("none")
    losing = choice[~choice["beats_seasonal_naive"].astype(bool)]
    return StageResult(
        outputs={"strategy_choice": choice},
        metadata={"strategy_choice": {"auto_classes": int((choice["configured_strategy"] == AUTO).sum())}},
        checks={CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE: CheckRows(losing, {"strategy_choice": choice})},
    )
