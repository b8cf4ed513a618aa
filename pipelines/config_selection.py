"""The `selection` section of the planning config: how the backtest's choices are judged and kept.

- `metric`: the backtest measure each demand class is judged by; a product
  class takes the measure of the demand classes holding most of its leaf
  series (`pipelines.engines.scaled_errors.class_metric`).
- `stability`: when this cycle's best strategy, share window or method
  replaces last cycle's (`pipelines.engines.forecast_comparison.stable_choice`).
- `share_tuning`: the candidates of `window: auto` and `method: auto` and the
  gain above which a fixed window or method is reported as worse than the best;
  `leaf_fit_candidates`: whether a class with a fixed window and method still
  scores the candidates that fit a model per leaf at every origin
  (`children_forecast`) for that report (`always`), or leaves them out unless
  it is configured with one (`auto_only`, the default: those fits were most of
  a fixed class's backtest).
"""

from __future__ import annotations

from pydantic import Field, field_validator

from pipelines.config_sections import Frozen
from pipelines.vocabulary import LeafFitCandidates, SelectionMetric, ShareMethod, SwitchRule, values


class MetricByDemandClass(Frozen):
    """WMAPE rewards a forecast of zero on intermittent demand (its optimum is the median), hence RMSSE there."""

    smooth: SelectionMetric = "wmape"
    erratic: SelectionMetric = "wmape"
    intermittent: SelectionMetric = "rmsse"
    lumpy: SelectionMetric = "rmsse"


class StabilityConfig(Frozen):
    """Keep last cycle's choice unless a challenger wins by more than `tolerance` or by the DM-HLN test."""

    tolerance: float = Field(
        0.01, ge=0, lt=1, description="relative gain a challenger needs, (previous - best) / previous; 0.01 = 1 %"
    )
    level: float = Field(0.05, gt=0, lt=1, description="significance level of the one-sided DM-HLN test")
    switch_on: SwitchRule = Field(
        "either", description="either (gain above tolerance or significant) | both | tolerance | test"
    )


class ShareTuningConfig(Frozen):
    """Candidates for `window: auto` / `method: auto`, and the WARN threshold for fixed ones."""

    windows: tuple[int, ...] = Field((4, 13, 26, 52, 104), min_length=1, description="candidate windows, periods")
    methods: tuple[ShareMethod, ...] = Field(tuple(values(ShareMethod)), min_length=1, description="candidate methods")
    smoothing: float = Field(
        0.2, gt=0, le=1, description="alpha of the smoothed candidate when the class gives no smoothing"
    )
    max_gain: float = Field(
        0.02,
        ge=0,
        description="WARN share_choice_near_best when the best candidate's score is more than this relative "
        "gain below a fixed window or method's",
    )
    leaf_fit_candidates: LeafFitCandidates = Field(
        "auto_only",
        description="auto_only: a class with a fixed window and method leaves out the candidates that fit a model "
        "per leaf at every origin (children_forecast) unless configured with one, and its share_choice_near_best "
        "compares with the rest of the grid; always: every class scores them",
    )

    @field_validator("windows", "methods")
    @classmethod
    def _distinct(cls, v: tuple) -> tuple:
        if len(set(v)) != len(v):
            raise ValueError(f"list each candidate once (got {list(v)})")
        if any(isinstance(w, int) and w < 1 for w in v):
            raise ValueError(f"candidate windows must be at least 1 period (got {list(v)})")
        return v


class SelectionConfig(Frozen):
    metric: MetricByDemandClass = MetricByDemandClass()
    stability: StabilityConfig = StabilityConfig()
    share_tuning: ShareTuningConfig = ShareTuningConfig()
