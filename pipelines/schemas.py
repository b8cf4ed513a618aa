"""One pandera model per stage boundary.

Later stages inherit their key columns from earlier ones. Every asset is
validated against its model by a blocking asset check named
`<asset>_matches_schema`; failing rows go into that check's metadata.
"""

from typing import Optional

import pandas as pd
import pandera.pandas as pa
from pandera.typing import DateTime, Series

# why the reader could not split a line into the file's columns (pipelines.stages.reader)
READ_ERRORS = ("too_many_fields", "too_few_fields", "line_too_long", "control_characters")
# why a raw history line was not used (pipelines.stages.cleaned_history.reject_lines), in the order they apply
REJECT_REASONS = READ_ERRORS + (
    "missing_key",
    "bad_date",
    "bad_quantity",
    "quantity_out_of_bounds",
    "unknown_product",
    "no_customer_span",
    "duplicate_of_other_file",
    "date_before_window",
    "date_after_window",
    "isolated_date",
    "on_or_after_cycle_date",
)
CORRECTION_RULES = ("negative_net_to_zero", "hampel_cap", "tukey_cap", "shortage_fill")
ORIGINS = ("own", "successor")
LIFECYCLE_RULES = (
    "outside_active_span",
    "phased_out_before_cycle",
    "retired_product_without_successor",
    "successor_without_span",
    "successor_history_mapped",
)
FALLBACKS = ("none", "longer_window", "even")
SHARE_METHODS = ("pooled", "mean_of_ratios", "smoothed", "seasonal", "forecast_proportions")
# what the established children's weights of a parent came from in a horizon period
# (reinitialized_target `share_basis`; pipelines.stages.share_tables.period_basis)
SHARE_BASES = ("history_share", "period_of_year", "children_forecast", "pooled_fallback")
# how a child's share is set over the horizon (share table `lifecycle_rule`)
SHARE_RULES = ("none", "phase_in", "phase_out", "reference", "initial_share", "awaiting_history")
# why every share of a parent is 0 in a horizon period (`zero_share_reason`)
ZERO_SHARE_REASONS = ("product_not_active", "no_active_child", "awaiting_history", "no_share_among_active")
DEMAND_CLASSES = ("smooth", "erratic", "intermittent", "lumpy", "no_demand")
SPLIT_BASES = ("target", "share", "own_forecast", "forecast_proportions", "reconciled")
STRATEGIES = ("top_down", "forecast_proportions", "bottom_up", "mint_shrink", "wls_var")
BENCHMARK = "seasonal_naive"
GRAINS = ("leaf", "parent")
METRICS = ("wmape", "bias", "mase", "fva")
SPLIT_RULES = ("replicate", "even", "pro_rata")
# what a plan measure's split fell back to in a parent period (pipelines.stages.plan_measures)
MEASURE_FALLBACKS = ("none", "period_share", "even", "pins_overflow")


class _Strict(pa.DataFrameModel):
    class Config:
        strict = True
        coerce = True


# ----------------------------------------------------------------- inputs
class RawHistory(_Strict):
    """History lines exactly as read: every cell text, blanks as ''."""

    source_file: Series[str] = pa.Field(description="input file the line came from")
    source_row: Series[int] = pa.Field(ge=1, description="1-based data row within that file: its line number minus the header line")
    product: Series[str] = pa.Field(description="product code as written")
    site: Series[str] = pa.Field(description="site code as written")
    customer: Series[str] = pa.Field(description="customer code as written")
    period_start: Series[str] = pa.Field(description="ISO date as written")
    quantity: Series[str] = pa.Field(description="quantity as written; negative is a return")
    # the loader always supplies it; optional so that hand-built frames without malformed lines validate too
    read_error: Optional[Series[str]] = pa.Field(
        isin=("",) + READ_ERRORS,
        description="'' for a line split into the file's columns; else why it could not be (its cells then hold "
        "the line's first fields, cut short), and cleaned_history rejects it with that reason",
    )

    class Config:
        unique = ["source_file", "source_row"]


class Products(_Strict):
    """Product master: class and active span of each product."""

    product: Series[str] = pa.Field(unique=True, str_length={"min_value": 1}, description="product code")
    product_class: Series[str] = pa.Field(str_length={"min_value": 1}, description="class key of the planning config")
    active_from: Series[DateTime] = pa.Field(nullable=True, description="first day sold; blank = always")
    active_to: Series[DateTime] = pa.Field(nullable=True, description="last day sold; blank = open")
    successor: Series[str] = pa.Field(nullable=True, description="product taking over this one's history")

    @pa.dataframe_check(description="active_to is not before active_from")
    def span_ordered(cls, df: pd.DataFrame) -> Series[bool]:
        return ~(df["active_to"] < df["active_from"])

    @pa.dataframe_check(description="a product is not its own successor")
    def successor_differs(cls, df: pd.DataFrame) -> Series[bool]:
        return df["successor"].isna() | (df["successor"] != df["product"])


class LeafKeys(_Strict):
    product: Series[str] = pa.Field(description="product code")
    site: Series[str] = pa.Field(description="site code")
    customer: Series[str] = pa.Field(description="customer code")


class CustomerSpans(LeafKeys):
    """Which customer buys which product at which site, and when."""

    active_from: Series[DateTime] = pa.Field(nullable=True, description="first day of the active span")
    active_to: Series[DateTime] = pa.Field(nullable=True, description="last day of the active span; blank = open")
    reference_customer: Series[str] = pa.Field(
        nullable=True, description="existing customer of the same product and site a new customer takes its share from"
    )
    # the loader always supplies the two optional columns (blank when the file lacks
    # them); required=False lets hand-built frames without them validate too
    scale: Series[float] = pa.Field(
        nullable=True,
        required=False,
        gt=0,
        le=1,
        description="optional: fraction of the reference's share the new customer takes (blank = config "
        "lifecycle.reference_scale); at most 1, the reference cannot give more than it has",
    )
    initial_share: Series[float] = pa.Field(
        nullable=True,
        required=False,
        ge=0,
        lt=1,
        description="optional: planner-given share of a new customer without reference; the others are scaled by 1 - it",
    )

    class Config:
        unique = ["product", "site", "customer"]

    @pa.dataframe_check(description="active_to is not before active_from")
    def span_ordered(cls, df: pd.DataFrame) -> Series[bool]:
        return ~(df["active_to"] < df["active_from"])

    @pa.dataframe_check(description="a customer is not its own reference")
    def reference_differs(cls, df: pd.DataFrame) -> Series[bool]:
        return df["reference_customer"].isna() | (df["reference_customer"] != df["customer"])


class Adjustments(_Strict):
    """Parent-grain values a planner entered."""

    measure: Series[str] = pa.Field(description="measure name")
    product: Series[str] = pa.Field(description="product code")
    site: Series[str] = pa.Field(description="site code")
    period_start: Series[DateTime] = pa.Field(description="period start")
    value: Series[float] = pa.Field(description="value at product x site grain")


class Pins(_Strict):
    """Leaf values a planner fixed: the split keeps them and spreads the rest of the parent over the others."""

    product: Series[str] = pa.Field(str_length={"min_value": 1}, description="product code")
    site: Series[str] = pa.Field(str_length={"min_value": 1}, description="site code")
    customer: Series[str] = pa.Field(str_length={"min_value": 1}, description="customer code")
    period_start: Series[DateTime] = pa.Field(description="any day inside the pinned period")
    measure: Series[str] = pa.Field(str_length={"min_value": 1}, description="measure name (a key of config measures)")
    value: Series[float] = pa.Field(description="the value the leaf keeps")


class Shortages(_Strict):
    """Recorded supply shortages: one row per product x site and period that was short."""

    product: Series[str] = pa.Field(str_length={"min_value": 1}, description="product code")
    site: Series[str] = pa.Field(str_length={"min_value": 1}, description="site code")
    period_start: Series[DateTime] = pa.Field(description="any day inside the short period")


# ----------------------------------------------------------------- history
class LeafPeriod(LeafKeys):
    period_start: Series[DateTime] = pa.Field(description="start of the calendar period")


class CleanedHistory(LeafPeriod):
    """History bucketed to the calendar, one row per leaf and period."""

    quantity: Series[float] = pa.Field(ge=0, description="cleaned quantity")
    raw_quantity: Series[float] = pa.Field(description="net quantity of the raw lines (0 where filled)")
    lines: Series[int] = pa.Field(ge=0, description="raw lines summed into this period")
    filled: Series[bool] = pa.Field(description="period had no line and was filled with zero")
    corrected: Series[bool] = pa.Field(description="a correction changed this period")
    shortage: Series[bool] = pa.Field(description="a supply shortage is recorded for this product x site and period")

    class Config:
        unique = ["product", "site", "customer", "period_start"]


class CycleCalendar(_Strict):
    """The cycle in one row: its date, calendar and history range."""

    cycle_date: Series[DateTime] = pa.Field(description="first period of the horizon")
    period: Series[str] = pa.Field(isin=("week", "month"), description="period kind")
    horizon: Series[int] = pa.Field(ge=1, description="periods forecast")
    horizon_end: Series[DateTime] = pa.Field(description="start of the last horizon period")
    history_start: Series[DateTime] = pa.Field(nullable=True, description="first period of cleaned history")
    history_periods: Series[int] = pa.Field(ge=0, description="periods from history_start to the cycle date")


class RejectedRows(_Strict):
    """Raw lines that could not be used, each with its reason."""

    source_file: Series[str] = pa.Field(description="input file")
    source_row: Series[int] = pa.Field(ge=1, description="1-based data row")
    product: Series[str] = pa.Field(description="as written")
    site: Series[str] = pa.Field(description="as written")
    customer: Series[str] = pa.Field(description="as written")
    period_start: Series[str] = pa.Field(description="as written")
    quantity: Series[str] = pa.Field(description="as written")
    reason: Series[str] = pa.Field(isin=REJECT_REASONS, description="why the line was not used")


class HistoryCorrections(LeafPeriod):
    """One row per changed period: the quantity a rule moved."""

    rule: Series[str] = pa.Field(isin=CORRECTION_RULES, description="rule that changed the value")
    before: Series[float] = pa.Field(description="value before the rule")
    after: Series[float] = pa.Field(description="value after the rule")
    delta: Series[float] = pa.Field(description="after - before")
    parameters: Series[str] = pa.Field(description="the rule's parameter values")


class LifecycleHistory(LeafPeriod):
    """History inside each active span, remapped to successors."""

    quantity: Series[float] = pa.Field(ge=0, description="quantity in the share basis")
    origin: Series[str] = pa.Field(isin=ORIGINS, description="own, or successor (mapped from a retired product)")
    source_product: Series[str] = pa.Field(description="product the history was recorded on")
    source_customer: Series[str] = pa.Field(description="customer the history was recorded on")
    shortage: Series[bool] = pa.Field(
        description="a supply shortage was recorded for the source product x site x period; "
        "such periods do not count toward shares or the parent baseline"
    )

    class Config:
        unique = ["product", "site", "customer", "period_start", "origin", "source_product"]


class LifecycleAudit(_Strict):
    """What the lifecycle stage moved or left out, per key and rule."""

    product: Series[str] = pa.Field(description="product code")
    site: Series[str] = pa.Field(description="site code")
    customer: Series[str] = pa.Field(description="customer code")
    rule: Series[str] = pa.Field(isin=LIFECYCLE_RULES, description="lifecycle rule applied")
    periods: Series[int] = pa.Field(ge=0, description="periods affected")
    quantity: Series[float] = pa.Field(description="quantity affected")
    detail: Series[str] = pa.Field(description="what happened, in words")


# ----------------------------------------------------------------- shares
class ShareTable(LeafKeys):
    """One base share per child for the cycle, with the window, method and lifecycle rule behind it."""

    cycle_date: Series[DateTime] = pa.Field(description="first period of the cycle's horizon")
    product_class: Series[str] = pa.Field(description="product class")
    share: Series[float] = pa.Field(
        ge=0,
        le=1,
        description="base share: child's fraction of its parent in a period where every child is active "
        "(per-period methods: from their pooled history_share)",
    )
    history_share: Series[float] = pa.Field(
        ge=0,
        le=1,
        description="share from history over the established children, before the new-customer rules; for the "
        "per-period methods (seasonal, forecast_proportions) the pooled share over the window, which is their summary "
        "here and their fallback in a period without a basis (the per-period basis is in reinitialized_target)",
    )
    method: Series[str] = pa.Field(isin=SHARE_METHODS, description="share method of the class")
    window: Series[int] = pa.Field(ge=1, description="configured window, periods")
    window_used: Series[int] = pa.Field(ge=0, description="window that gave volume (0 = even split)")
    window_start: Series[DateTime] = pa.Field(description="first period of the window used")
    fallback: Series[str] = pa.Field(isin=FALLBACKS, description="fallback taken for this parent")
    child_volume: Series[float] = pa.Field(ge=0, description="child's volume in the window used")
    parent_volume: Series[float] = pa.Field(ge=0, description="parent's volume in the window used")
    lifecycle_rule: Series[str] = pa.Field(isin=SHARE_RULES, description="how the share is set over the horizon")
    first_active_period: Series[DateTime] = pa.Field(description="first horizon period the child is active")
    last_active_period: Series[DateTime] = pa.Field(description="last horizon period the child is active")
    own_periods: Series[int] = pa.Field(ge=0, description="distinct periods of the child's own history")
    reference_customer: Series[str] = pa.Field(nullable=True, description="reference the share was taken from")
    scale: Series[float] = pa.Field(nullable=True, gt=0, le=1, description="fraction of the reference's share taken")
    initial_share: Series[float] = pa.Field(nullable=True, ge=0, lt=1, description="planner-given share used")
    lifecycle_detail: Series[str] = pa.Field(description="the rule in words, for the planner")

    class Config:
        unique = ["product", "site", "customer"]


class ReinitializedTarget(LeafPeriod):
    """Target measure for the horizon: the period's share x the parent's baseline."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    target: Series[float] = pa.Field(ge=0, description="share x parent_baseline")
    share: Series[float] = pa.Field(
        ge=0, le=1, description="share in this period: base shares of the children active in it, renormalised"
    )
    parent_baseline: Series[float] = pa.Field(ge=0, description="parent's mean per period over the window used")
    zero_share_reason: Series[str] = pa.Field(
        nullable=True, isin=ZERO_SHARE_REASONS, description="why every share of the parent is 0 in this period (blank = they sum to 1)"
    )
    share_basis: Optional[Series[str]] = pa.Field(
        isin=SHARE_BASES,
        description="what the established children's weights of the parent came from in this period: history_share "
        "(the share table's, every period alike), period_of_year (seasonal), children_forecast (forecast_proportions) "
        "or pooled_fallback (a per-period method without a basis in this period: the pooled history share)",
    )

    class Config:
        unique = ["product", "site", "customer", "period_start"]


# ----------------------------------------------------------------- forecast
class ParentForecast(_Strict):
    """Statistical forecast at product x site grain."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    product_class: Series[str] = pa.Field(description="product class")
    product: Series[str] = pa.Field(description="product code")
    site: Series[str] = pa.Field(description="site code")
    period_start: Series[DateTime] = pa.Field(description="forecast period")
    forecast: Series[float] = pa.Field(description="parent forecast")
    model: Series[str] = pa.Field(description="statsforecast model used")
    demand_class: Series[str] = pa.Field(isin=DEMAND_CLASSES, description="Syntetos-Boylan-Croston class")
    forecast_grain: Series[str] = pa.Field(description="grain the model ran at (`both` for split or reconciled strategies)")
    strategy: Optional[Series[str]] = pa.Field(isin=STRATEGIES, description="how parent and leaf were made coherent")
    zero_reason: Series[str] = pa.Field(
        nullable=True, isin=ZERO_SHARE_REASONS, description="why the forecast was set to 0 in this period (blank = not set)"
    )

    class Config:
        unique = ["product", "site", "period_start"]


class ForecastModels(_Strict):
    """One row per series the cycle forecast: its grain, demand class, model and parameters."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    grain: Series[str] = pa.Field(isin=GRAINS, description="parent (product x site) or leaf (product x site x customer)")
    product_class: Series[str] = pa.Field(description="product class")
    product: Series[str] = pa.Field(description="product code")
    site: Series[str] = pa.Field(description="site code")
    customer: Series[str] = pa.Field(description="customer code ('' for a parent)")
    demand_class: Series[str] = pa.Field(isin=DEMAND_CLASSES, description="Syntetos-Boylan-Croston class")
    adi: Series[float] = pa.Field(nullable=True, description="average inter-demand interval (NaN without demand)")
    cv2: Series[float] = pa.Field(nullable=True, description="squared coefficient of variation of non-zero sizes")
    model: Series[str] = pa.Field(description="model label")
    parameters: Series[str] = pa.Field(description="parameters the library exposes ('' where it does not)")

    class Config:
        unique = ["grain", "product", "site", "customer"]


class StatisticalForecast(LeafPeriod):
    """Statistical forecast at leaf grain, split from the parent."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    product_class: Series[str] = pa.Field(description="product class")
    forecast: Series[float] = pa.Field(description="leaf forecast")
    parent_forecast: Series[float] = pa.Field(description="the parent's forecast this was split from")
    split_basis: Series[str] = pa.Field(isin=SPLIT_BASES, description="what the split was proportional to")

    class Config:
        unique = ["product", "site", "customer", "period_start"]


class ForecastFittedValues(_Strict):
    """In-sample one-step fitted values of the series whose strategy reconciles with residuals (MinT, WLS)."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    grain: Series[str] = pa.Field(isin=GRAINS, description="parent or leaf")
    product_class: Series[str] = pa.Field(description="product class")
    product: Series[str] = pa.Field(description="product code")
    site: Series[str] = pa.Field(description="site code")
    customer: Series[str] = pa.Field(description="customer code ('' for a parent)")
    period_start: Series[DateTime] = pa.Field(description="history period")
    actual: Series[float] = pa.Field(ge=0, description="history value (real history, no copied reference rows)")
    fitted: Series[float] = pa.Field(description="model's one-step fitted value")

    class Config:
        unique = ["grain", "product", "site", "customer", "period_start"]


class BacktestAccuracy(_Strict):
    """Rolling-origin backtest: one accuracy value per product class, strategy, grain and metric."""

    product_class: Series[str] = pa.Field(description="product class")
    strategy: Series[str] = pa.Field(isin=STRATEGIES + (BENCHMARK,), description="strategy, or the seasonal naive benchmark")
    grain: Series[str] = pa.Field(isin=GRAINS, description="grain the accuracy is measured at")
    metric: Series[str] = pa.Field(isin=METRICS, description="wmape, bias, mase or fva (value added over seasonal naive, WMAPE points)")
    value: Series[float] = pa.Field(nullable=True, description="the metric's value (NaN where undefined, e.g. no volume)")
    origins: Series[int] = pa.Field(ge=0, description="forecast origins evaluated")
    horizon: Series[int] = pa.Field(ge=1, description="periods forecast from each origin")
    series: Series[int] = pa.Field(ge=0, description="series of this grain in the class")

    class Config:
        unique = ["product_class", "strategy", "grain", "metric"]


class StrategyChoice(_Strict):
    """Per product class: the strategy in effect, how it was decided and by how much it won."""

    product_class: Series[str] = pa.Field(description="product class")
    forecast_grain: Series[str] = pa.Field(description="configured forecast_grain")
    strategy: Series[str] = pa.Field(isin=STRATEGIES, description="strategy the cycle follows")
    leaf_wmape: Series[float] = pa.Field(nullable=True, description="its leaf-grain backtest WMAPE")
    runner_up: Series[str] = pa.Field(description="next best strategy by leaf-grain WMAPE ('' if none)")
    margin: Series[float] = pa.Field(nullable=True, description="runner-up WMAPE minus the chosen one's (>= 0 for auto)")
    seasonal_naive_wmape: Series[float] = pa.Field(nullable=True, description="leaf-grain WMAPE of seasonal naive")
    beats_seasonal_naive: Series[bool] = pa.Field(description="chosen WMAPE not above the benchmark's (true where undefined)")

    class Config:
        unique = ["product_class"]


class PlanMeasures(LeafPeriod):
    """Every measure of the plan at leaf grain, long format: one row per leaf, period and measure."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    measure: Series[str] = pa.Field(description="measure name (a key of config measures)")
    value: Series[float] = pa.Field(description="the leaf's value")
    parent_value: Series[float] = pa.Field(
        nullable=True, description="the parent's value in this period (blank where it has none and only pins gave the row)"
    )
    rule: Series[str] = pa.Field(isin=SPLIT_RULES, description="split rule of the measure")
    basis: Series[str] = pa.Field(
        description="what the value came from: parent (replicate), even, pin, or the pro_rata basis "
        "(reinitialized_target, forecast_leaf, share_table:<name>, measure:<name>)"
    )
    fallback: Series[str] = pa.Field(isin=MEASURE_FALLBACKS, description="fallback the parent period's split took")
    pinned: Series[bool] = pa.Field(description="the value is a planner's pin, kept as given")

    class Config:
        unique = ["product", "site", "customer", "period_start", "measure"]


class Reconciliation(_Strict):
    """Parent value against the sum of its children, per parent and period."""

    cycle_date: Series[DateTime] = pa.Field(description="cycle date")
    product: Series[str] = pa.Field(description="product code")
    site: Series[str] = pa.Field(description="site code")
    period_start: Series[DateTime] = pa.Field(description="period")
    parent_forecast: Series[float] = pa.Field(description="parent value")
    children_sum: Series[float] = pa.Field(description="sum of leaf forecasts")
    children: Series[int] = pa.Field(ge=0, description="number of leaf rows")
    difference: Series[float] = pa.Field(description="children_sum - parent_forecast")
    relative_difference: Series[float] = pa.Field(description="|difference| / max(|parent|, 1)")

    class Config:
        unique = ["product", "site", "period_start"]


# ----------------------------------------------------------------- monitoring
class ShareDrift(LeafKeys):
    """Each child's share now and in the previous cycle of its class, in percentage points."""

    product_class: Series[str] = pa.Field(description="product class")
    previous_cycle: Series[str] = pa.Field(description="cycle compared with (ISO date)")
    share_previous: Series[float] = pa.Field(ge=0, le=1, description="base share in the previous cycle (0 = not a child then)")
    share_current: Series[float] = pa.Field(ge=0, le=1, description="base share in this cycle (0 = no longer a child)")
    change_pp: Series[float] = pa.Field(ge=-100, le=100, description="100 x (current - previous), percentage points")
    abs_change_pp: Series[float] = pa.Field(ge=0, le=100, description="size of the move, percentage points")
    status: Series[str] = pa.Field(isin=("both", "new", "gone"), description="child in both cycles, only now, or only then")

    class Config:
        unique = ["product", "site", "customer"]


class CycleReportFiles(_Strict):
    """The files the cycle report wrote for one class: its charts and the cycle's page."""

    product_class: Series[str] = pa.Field(description="product class")
    kind: Series[str] = pa.Field(isin=("parents", "shares", "html"), description="parents chart, shares chart, or the page")
    path: Series[str] = pa.Field(description="file written, under var/reports/<cycle>/")
    bytes: Series[int] = pa.Field(gt=0, description="file size")
