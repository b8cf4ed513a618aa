"""Stage `strategy_choice`: the strategy each product class follows this cycle, decided once and stored.

For a class with `strategy: auto` (or `seasonality: auto`) the backtest's winner: the strategy with
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
from pipelines.engines.seasonal_base import configured_seasonality
from pipelines.results import CheckRows, Log, StageResult, quiet
from pipelines.vocabulary import AUTO, BENCHMARK, Seasonality

CHOICE_COLUMNS = [
    "product_class", "configured_strategy", "strategy", "seasonality", "leaf_wmape", "runner_up", "margin",
    "seasonal_naive_wmape", "beats_seasonal_naive",
]


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
    """Per product class: the strategy and seasonality in effect (the backtest's winners where `auto`),
    runner-up and margin.

    The pairs (seasonality, strategy) the config allows compete by leaf-grain
    WMAPE; ties go to the strategy listed first, then to the seasonality the
    backtest compared first (the class's models' own setting before `group`).
    The runner-up is the best other strategy under the chosen seasonality.
    """
    settings = StrategySettings.of(settings)
    leaf = accuracy[(accuracy["grain"] == "leaf") & (accuracy["metric"] == "wmape")]
    if "seasonality" not in leaf.columns:
        leaf = leaf.assign(seasonality=Seasonality.NONE)
    rows = []
    candidates = list(settings.candidates)
    for name, configured in settings.configured.items():
        mine = leaf[leaf["product_class"] == name]
        if mine.empty:
            continue
        variants = list(dict.fromkeys(mine["seasonality"]))
        wanted = settings.seasonality.get(name, AUTO)
        allowed = variants if wanted == AUTO or wanted not in variants else [wanted]
        strategies = candidates if configured == AUTO else [configured]

        def score(v: str, s: str, table=mine) -> float:
            hit = table[(table["seasonality"] == v) & (table["strategy"] == s)]["value"]
            return float(hit.iloc[0]) if len(hit) and np.isfinite(hit.iloc[0]) else np.inf

        pairs = sorted(
            ((v, s) for v in allowed for s in strategies),
            key=lambda p: (score(*p), candidates.index(p[1]) if p[1] in candidates else 0, variants.index(p[0])),
        )
        season, chosen = pairs[0]
        best = score(season, chosen)
        best = np.nan if np.isinf(best) else best
        ranked = sorted(candidates, key=lambda s: (score(season, s), candidates.index(s)))
        others = [s for s in ranked if s != chosen]
        runner = others[0] if others else ""
        margin = float(score(season, runner) - best) if runner and np.isfinite(score(season, runner)) else np.nan
        sn = score(season, BENCHMARK)
        sn = np.nan if np.isinf(sn) else sn
        rows.append((name, configured, chosen, season, best, runner, margin, sn, not bool(best > sn)))
    return pd.DataFrame(rows, columns=CHOICE_COLUMNS)


def run(backtest_accuracy: pd.DataFrame, settings: StrategySettings, log: Log = quiet) -> StageResult:
    """The strategy_choice table and its WARN check (a chosen strategy that loses to seasonal naive)."""
    choice = choose_strategies(backtest_accuracy, settings)
    losing = choice[~choice["beats_seasonal_naive"].astype(bool)]
    return StageResult(
        outputs={"strategy_choice": choice},
        metadata={"strategy_choice": {"auto_classes": int((choice["configured_strategy"] == AUTO).sum())}},
        checks={CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE: CheckRows(losing, {"strategy_choice": choice})},
    )
