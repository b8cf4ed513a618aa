"""The pandera models of the cycle's outputs from the forecast on: forecast, backtest, plan, proofs, monitoring.

Inputs, history and shares are in `pipelines.schemas`, whose base models
these inherit.
"""

from typing import Optional

import pandera.pandas as pa
from pandera.typing import DateTime, Series

from pipelines.schemas import ZERO_REASONS, LeafIds, LeafKeys, LeafPeriod, ParentIds, _Strict
from pipelines.text_dtype import Text
from pipelines.vocabulary import (
    AUTO,
    BENCHMARK,
    COVERAGE_METRIC_PATTERN,
    FORECAST_BASES,
    INTERVAL_COLUMN_PATTERN,
    DemandClass,
    DriftStatus,
    Grain,
    MeasureFallback,
    Metric,
    ModelGrain,
    ReportFile,
    Seasonality,
    SplitRule,
    Strategy,
    values,
)

DEMAND_CLASSES = values(DemandClass)
GRAINS = values(Grain)
STRATEGIES = values(Strategy)


# ----------------------------------------------------------------- forecast
class ParentForecast(_Strict, ParentIds):
    """Statistical forecast at product x site grain."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    product_class: Series[Text] = pa.Field(description="product class")
    product: Series[Text] = pa.Field(description="product code")
    site: Series[Text] = pa.Field(description="site code")
    period_start: Series[DateTime] = pa.Field(description="forecast period")
    forecast: Series[float] = pa.Field(
        description="parent forecast: strategy_forecast, or 0 in a period the lifecycle set to 0 (zero_reason)"
    )
    strategy_forecast: Series[float] = pa.Field(
        description="the parent forecast as the class's strategy produced it, before the lifecycle: the model's "
        "forecast (top_down, forecast_proportions), the reconciled parent (mint_shrink, wls_var) or the sum of the "
        "active children's own forecasts (bottom_up); the leaves must sum to it wherever zero_reason is blank"
    )
    model: Series[Text] = pa.Field(description="statsforecast model used")
    demand_class: Series[Text] = pa.Field(isin=DEMAND_CLASSES, description="Syntetos-Boylan-Croston class")
    model_grain: Series[Text] = pa.Field(
        isin=values(ModelGrain),
        description="grains the class's models ran at: parent, leaf or both (the strategy's needs)",
    )
    strategy: Optional[Series[Text]] = pa.Field(isin=STRATEGIES, description="how parent and leaf were made coherent")
    zero_reason: Series[Text] = pa.Field(
        nullable=True, isin=ZERO_REASONS, description="why the forecast was set to 0 in this period (blank = not set)"
    )
    bounds: Optional[Series[float]] = pa.Field(
        alias=INTERVAL_COLUMN_PATTERN,
        regex=True,
        ge=0,
        description="prediction interval bounds, lower_<level> and upper_<level> per level of config intervals "
        "(pipelines.engines.forecast_intervals; 0 where the lifecycle set the period to 0)",
    )

    class Config:
        unique = ["product", "site", "period_start"]


class ForecastModels(_Strict):
    """One row per series the cycle forecast: its grain, demand class, model and parameters."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    grain: Series[Text] = pa.Field(
        isin=GRAINS, description="parent (product x site) or leaf (product x site x customer)"
    )
    product_class: Series[Text] = pa.Field(description="product class")
    product: Series[Text] = pa.Field(description="product code")
    site: Series[Text] = pa.Field(description="site code")
    customer: Series[Text] = pa.Field(description="customer code ('' for a parent)")
    demand_class: Series[Text] = pa.Field(isin=DEMAND_CLASSES, description="Syntetos-Boylan-Croston class")
    adi: Series[float] = pa.Field(nullable=True, description="average inter-demand interval (NaN without demand)")
    cv2: Series[float] = pa.Field(nullable=True, description="squared coefficient of variation of non-zero sizes")
    model: Series[Text] = pa.Field(description="model label")
    parameters: Series[Text] = pa.Field(description="parameters the library exposes ('' where it does not)")
    seasonality: Optional[Series[Text]] = pa.Field(
        isin=values(Seasonality), description="the class's seasonality in effect: none, own or group"
    )
    seasonal_strength: Optional[Series[float]] = pa.Field(
        nullable=True, ge=0, le=1, description="F_S of the series' own history (Wang, Smith & Hyndman 2006); NaN "
        "without two full seasons"
    )
    group_seasonal_strength: Optional[Series[float]] = pa.Field(
        nullable=True, ge=0, le=1, description="F_S of the sum of its seasonal group (NaN unless seasonality group)"
    )

    class Config:
        unique = ["grain", "product", "site", "customer"]


class StatisticalForecast(LeafPeriod, LeafIds):
    """Statistical forecast at leaf grain, split from the parent."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    product_class: Series[Text] = pa.Field(description="product class")
    forecast: Series[float] = pa.Field(description="leaf forecast")
    parent_forecast: Series[float] = pa.Field(description="the parent's forecast this was split from")
    basis: Series[Text] = pa.Field(isin=values(FORECAST_BASES), description="what the leaf value was made from")
    bounds: Optional[Series[float]] = pa.Field(
        alias=INTERVAL_COLUMN_PATTERN,
        regex=True,
        ge=0,
        description="prediction interval bounds, lower_<level> and upper_<level> per level of config intervals "
        "(pipelines.engines.forecast_intervals; 0 where the lifecycle set the period to 0)",
    )

    class Config:
        unique = ["product", "site", "customer", "period_start"]


class ForecastFittedValues(_Strict):
    """In-sample one-step fitted values of the series whose strategy reconciles with residuals (MinT, WLS)."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    grain: Series[Text] = pa.Field(isin=GRAINS, description="parent or leaf")
    product_class: Series[Text] = pa.Field(description="product class")
    product: Series[Text] = pa.Field(description="product code")
    site: Series[Text] = pa.Field(description="site code")
    customer: Series[Text] = pa.Field(description="customer code ('' for a parent)")
    period_start: Series[DateTime] = pa.Field(description="history period")
    actual: Series[float] = pa.Field(ge=0, description="history value (real history, no copied reference rows)")
    fitted: Series[float] = pa.Field(description="model's one-step fitted value")

    class Config:
        unique = ["grain", "product", "site", "customer", "period_start"]


class UpperLevelForecast(_Strict):
    """Forecasts of the levels above the parent (hierarchy.upper_levels), per node and period."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    product_class: Series[Text] = pa.Field(description="product class")
    level: Series[Text] = pa.Field(description="level: product, a products column (e.g. product_family) or total")
    node: Series[Text] = pa.Field(description="the node's key on its level (product, column value, class)")
    parent_node: Series[Text] = pa.Field(description="its node on the level above ('' on the top level)")
    period_start: Series[DateTime] = pa.Field(description="forecast period")
    base_forecast: Series[float] = pa.Field(ge=0, description="the node's own model forecast (its sum of history)")
    strategy_forecast: Series[float] = pa.Field(
        description="sum of its parents' strategy_forecast (for MinT / WLS: the tree's reconciled value)"
    )
    forecast: Series[float] = pa.Field(description="sum of its parents' final forecast")
    model: Series[Text] = pa.Field(description="model label of the base forecast")

    class Config:
        unique = ["level", "node", "period_start"]


class BacktestAccuracy(_Strict):
    """Rolling-origin backtest: one accuracy value per product class, strategy, grain and metric."""

    product_class: Series[Text] = pa.Field(description="product class")
    strategy: Series[Text] = pa.Field(
        isin=STRATEGIES + (str(BENCHMARK),), description="strategy, or the seasonal naive benchmark"
    )
    grain: Series[Text] = pa.Field(isin=GRAINS, description="grain the accuracy is measured at")
    metric: Series[Text] = pa.Field(
        description="wmape, bias, mase, fva (value added over seasonal naive, WMAPE points) or coverage_<level> "
        "(share of actuals inside the level % prediction interval)"
    )
    seasonality: Series[Text] = pa.Field(
        isin=values(Seasonality), description="the seasonality the class's models ran with (none, own, group)"
    )
    value: Series[float] = pa.Field(
        nullable=True, description="the metric's value (NaN where undefined, e.g. no volume)"
    )
    origins: Series[int] = pa.Field(ge=0, description="forecast origins evaluated")
    horizon: Series[int] = pa.Field(ge=1, description="periods forecast from each origin")
    series: Series[int] = pa.Field(ge=0, description="series of this grain in the class")
    value_cleaned: Series[float] = pa.Field(
        nullable=True, description="the metric against the cleaned actuals (value: against the raw ones)"
    )
    selection_metric: Series[Text] = pa.Field(
        isin=("wmape", "rmsse", "mase"), description="the metric the class's choices are made on (its demand classes)"
    )
    numerator: Series[float] = pa.Field(
        nullable=True, description="the sum `value` is the ratio of: |e|, e, scaled |e|, weighted RMSSE or cells "
        "inside the interval, over series, periods and origins (NaN for fva); additive over shards"
    )
    denominator: Series[float] = pa.Field(
        nullable=True, description="its divisor: actuals, scored cells or RMSSE weights (value NaN where not > 0)"
    )
    numerator_cleaned: Series[float] = pa.Field(nullable=True, description="numerator against the cleaned actuals")
    denominator_cleaned: Series[float] = pa.Field(
        nullable=True, description="denominator against the cleaned actuals"
    )
    leaf_series_wmape: Series[int] = pa.Field(
        ge=0, description="the class's leaf series whose demand class is judged by wmape (selection_metric: the "
        "metric of most; additive over shards)"
    )
    leaf_series_rmsse: Series[int] = pa.Field(ge=0, description="the same for rmsse")
    leaf_series_mase: Series[int] = pa.Field(ge=0, description="the same for mase")

    @pa.check("metric", name="metric_known")
    def _metric_known(cls, metric: Series[str]) -> Series[bool]:
        return metric.isin(values(Metric)) | metric.str.fullmatch(COVERAGE_METRIC_PATTERN)

    class Config:
        unique = ["product_class", "seasonality", "strategy", "grain", "metric"]


class StrategyChoice(_Strict):
    """Per product class: the strategy in effect, how it was decided and by how much it won."""

    product_class: Series[Text] = pa.Field(description="product class")
    configured_strategy: Series[Text] = pa.Field(
        isin=(AUTO,) + STRATEGIES, description="the class's configured strategy (auto: the backtest's choice)"
    )
    strategy: Series[Text] = pa.Field(isin=STRATEGIES, description="strategy the cycle follows")
    seasonality: Optional[Series[Text]] = pa.Field(
        isin=values(Seasonality), description="seasonality the cycle follows (for seasonality auto: the backtest's)"
    )
    leaf_wmape: Series[float] = pa.Field(nullable=True, description="its leaf-grain backtest WMAPE")
    runner_up: Series[Text] = pa.Field(description="next best strategy by the selection metric ('' if none)")
    margin: Series[float] = pa.Field(
        nullable=True, description="runner-up's score minus the chosen one's, in the selection metric"
    )
    seasonal_naive_wmape: Series[float] = pa.Field(nullable=True, description="leaf-grain WMAPE of seasonal naive")
    beats_seasonal_naive: Series[bool] = pa.Field(
        description="chosen WMAPE not above the benchmark's (true where undefined)"
    )
    metric: Series[Text] = pa.Field(isin=("wmape", "rmsse", "mase"), description="selection metric of the class")
    score: Series[float] = pa.Field(nullable=True, description="the strategy's value of that metric (leaf grain)")
    leaf_rmsse: Series[float] = pa.Field(nullable=True, description="its leaf-grain backtest RMSSE")
    best: Series[Text] = pa.Field(description="this cycle's best strategy by the selection metric")
    previous_strategy: Series[Text] = pa.Field(description="the class's strategy last cycle ('' if none)")
    decision: Series[Text] = pa.Field(isin=("first", "keep", "switch", "fixed"), description="how it was decided")
    reason: Series[Text] = pa.Field(description="why (forecast_comparison.Reason, or configured)")
    p_value: Series[float] = pa.Field(nullable=True, description="one-sided DM-HLN p-value that best beats previous")
    detail: Series[Text] = pa.Field(description="the decision in words")

    class Config:
        unique = ["product_class"]


class PlanMeasures(LeafPeriod):
    """Every measure of the plan at leaf grain, long format: one row per leaf, period and measure."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    measure: Series[Text] = pa.Field(description="measure name (a key of config measures)")
    value: Series[float] = pa.Field(description="the leaf's value")
    parent_value: Series[float] = pa.Field(
        nullable=True,
        description="the parent's value in this period (blank where it has none and only pins gave the row)",
    )
    rule: Series[Text] = pa.Field(isin=values(SplitRule), description="split rule of the measure")
    basis: Series[Text] = pa.Field(
        description="what the value came from: parent (replicate), even, pin, or the pro_rata basis "
        "(reinitialized_target, leaf_forecast, share_table:<name>, measure:<name>)"
    )
    fallback: Series[Text] = pa.Field(
        isin=values(MeasureFallback), description="fallback the parent period's split took"
    )
    pinned: Series[bool] = pa.Field(description="the value is a planner's pin, kept as given")

    class Config:
        unique = ["product", "site", "customer", "period_start", "measure"]


class Reconciliation(_Strict):
    """The leaves against the parent forecast the strategy produced, per parent and period."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    product: Series[Text] = pa.Field(description="product code")
    site: Series[Text] = pa.Field(description="site code")
    period_start: Series[DateTime] = pa.Field(description="period")
    parent_forecast: Series[float] = pa.Field(
        nullable=True, description="final parent forecast (blank: leaves without a parent row)"
    )
    strategy_forecast: Series[float] = pa.Field(
        nullable=True, description="the parent forecast as the strategy produced it (parent_forecast.strategy_forecast)"
    )
    zero_reason: Series[Text] = pa.Field(
        nullable=True,
        isin=ZERO_REASONS,
        description="why the lifecycle set the period to 0 (then left out of the comparison with strategy_forecast "
        "and judged on carrying no volume); blank = compared",
    )
    children_sum: Series[float] = pa.Field(description="sum of the stored leaf forecasts")
    children: Series[int] = pa.Field(ge=0, description="number of leaf rows")
    expected: Series[float] = pa.Field(
        nullable=True, description="what the leaves must sum to: strategy_forecast, or 0 where zero_reason is set"
    )
    difference: Series[float] = pa.Field(nullable=True, description="children_sum - expected")
    relative_difference: Series[float] = pa.Field(nullable=True, description="|difference| / max(|expected|, 1)")

    class Config:
        unique = ["product", "site", "period_start"]


# ----------------------------------------------------------------- monitoring
class ShareDrift(LeafKeys):
    """Each child's share now and in the previous cycle of its class, in percentage points."""

    product_class: Series[Text] = pa.Field(description="product class")
    previous_cycle: Series[Text] = pa.Field(description="cycle compared with (ISO date)")
    share_previous: Series[float] = pa.Field(
        ge=0, le=1, description="base share in the previous cycle (0 = not a child then)"
    )
    share_current: Series[float] = pa.Field(ge=0, le=1, description="base share in this cycle (0 = no longer a child)")
    change_pp: Series[float] = pa.Field(ge=-100, le=100, description="100 x (current - previous), percentage points")
    abs_change_pp: Series[float] = pa.Field(ge=0, le=100, description="size of the move, percentage points")
    status: Series[Text] = pa.Field(isin=values(DriftStatus), description="child in both cycles, only now or only then")

    class Config:
        unique = ["product", "site", "customer"]


class CycleReportFiles(_Strict):
    """The files the cycle report wrote for one class: its charts and the cycle's page."""

    product_class: Series[Text] = pa.Field(description="product class")
    kind: Series[Text] = pa.Field(isin=values(ReportFile), description="parents chart, shares chart, or the page")
    path: Series[Text] = pa.Field(description="file written, under var/reports/<cycle>/")
    bytes: Series[int] = pa.Field(gt=0, description="file size")


# ----------------------------------------------------------------- publication
class ClassPublication(_Strict):
    """The table versions one class of a cycle publishes, each with the proof that its blocking checks passed."""

    asset: Series[Text] = pa.Field(description="asset (store table)")
    shard: Series[Text] = pa.Field(description="shard of the class ('0' while classes are not cut into shards)")
    file: Series[Text] = pa.Field(
        nullable=True, description="Parquet file of the version, in the partition's folder; blank if never written"
    )
    rows: Series[int] = pa.Field(ge=0, description="rows of the version")
    run_id: Series[Text] = pa.Field(nullable=True, description="Dagster run that wrote the version")
    written_at: Series[Text] = pa.Field(nullable=True, description="when it was written (UTC, ISO)")
    proven: Series[bool] = pa.Field(description="its blocking checks passed in the run that wrote it")
    proof: Series[Text] = pa.Field(description="how that is known, or why it is not")

    class Config:
        unique = ["asset", "shard"]
