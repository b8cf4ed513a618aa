"""The project's words: every allowed value of a config key or of a coded column, once.

Each set is a `str` Enum. The config models use them as field types (so an
error lists the valid choices), the pandera models take their `isin` lists from
`values(...)`, `explain` and the docs describe the same members. A member
equals its text (`Strategy.TOP_DOWN == "top_down"`), so frames hold plain
strings. DEVELOPERS.md's glossary explains each word.
"""

from __future__ import annotations

from enum import StrEnum

import numpy as np


def label_array(shape: int | tuple[int, ...], value: str) -> np.ndarray:
    """An object array holding one word in every cell (`np.full` with dtype object converts the text per cell:
    some thirty times slower on the millions of cells of a long table)."""
    out = np.empty(shape, dtype=object)
    out[...] = value
    return out


def values(*enums: type[StrEnum] | tuple[StrEnum, ...]) -> tuple[str, ...]:
    """The text of every member of the given Enums or tuples of members, in order (for `isin` lists)."""
    return tuple(str(m.value) for e in enums for m in e)


class PeriodKind(StrEnum):
    WEEK = "week"
    MONTH = "month"


class ShareMethod(StrEnum):
    """How a child's share of its parent is computed from history (`product_classes.<class>.method`)."""

    POOLED = "pooled"
    MEAN_OF_RATIOS = "mean_of_ratios"
    SMOOTHED = "smoothed"
    SEASONAL = "seasonal"
    CHILDREN_FORECAST = "children_forecast"


# methods that give the established children a share per horizon period (their period basis)
PER_PERIOD_METHODS = (ShareMethod.SEASONAL, ShareMethod.CHILDREN_FORECAST)
# methods whose shares need base forecasts of every leaf (a model fit per leaf series at each backtest origin)
LEAF_FIT_METHODS = (ShareMethod.CHILDREN_FORECAST,)
# the methods a named share basis (`share_bases`) may use: history methods without further keys
BASIS_SHARE_METHODS = (ShareMethod.POOLED, ShareMethod.MEAN_OF_RATIOS)


class Strategy(StrEnum):
    """How leaf and parent forecasts are made coherent (`pipelines.engines.hierarchy`)."""

    TOP_DOWN = "top_down"
    FORECAST_PROPORTIONS = "forecast_proportions"
    BOTTOM_UP = "bottom_up"
    MINT_SHRINK = "mint_shrink"
    WLS_VAR = "wls_var"


# `product_classes.<class>.strategy: auto`: the backtest picks the class's strategy
AUTO = "auto"


class Seasonality(StrEnum):
    """Where a class's seasonal shape comes from (`product_classes.<class>.seasonality`; `auto`: the backtest)."""

    NONE = "none"
    OWN = "own"
    GROUP = "group"


# `product_classes.<class>.seasonal_group` and `hierarchy.upper_levels`: names with a meaning of their own
# (any other name is a column of the products master data)
GROUP_PRODUCT = "product"  # the product across its sites
GROUP_CLASS = "product_class"  # the whole class
LEVEL_TOTAL = "total"  # everything of the class
# config keys and values of the last release, still read (with a warning) until the next one
FORECAST_GRAIN_STRATEGY = {"product_site": "top_down", "product_site_customer": "bottom_up", "auto": AUTO}
RENAMED_SHARE_METHODS = {"forecast_proportions": "children_forecast"}


class ModelName(StrEnum):
    AUTO_ETS = "auto_ets"
    ETS_ADDITIVE_SEASON = "ets_additive_season"
    MSTL_ETS = "mstl_ets"
    SES = "ses"
    SEASONAL_NAIVE = "seasonal_naive"
    CROSTON_CLASSIC = "croston_classic"
    CROSTON_SBA = "croston_sba"
    CROSTON_OPTIMIZED = "croston_optimized"
    TSB = "tsb"
    ADIDA = "adida"
    IMAPA = "imapa"


# the benchmark of the backtest and of forecast value added
BENCHMARK = ModelName.SEASONAL_NAIVE


class DemandClass(StrEnum):
    """Syntetos, Boylan & Croston (2005) class of a series; `no_demand` is forecast as 0."""

    SMOOTH = "smooth"
    ERRATIC = "erratic"
    INTERMITTENT = "intermittent"
    LUMPY = "lumpy"
    NO_DEMAND = "no_demand"


class Grain(StrEnum):
    """A forecast series' level: product x site (parent) or product x site x customer (leaf)."""

    LEAF = "leaf"
    PARENT = "parent"


class ModelGrain(StrEnum):
    """The grains a class's models ran at (`model_grain` of parent_forecast)."""

    PARENT = "parent"
    LEAF = "leaf"
    BOTH = "both"


class Metric(StrEnum):
    WMAPE = "wmape"
    BIAS = "bias"
    MASE = "mase"
    FVA = "fva"
    RMSSE = "rmsse"


class SelectionMetric(StrEnum):
    """The backtest measure a class's choices are judged by (`selection.metric`), lower is better."""

    WMAPE = "wmape"
    RMSSE = "rmsse"
    MASE = "mase"


class LeafFitCandidates(StrEnum):
    """Which classes' share tuning tries the methods fitting leaf models (`share_tuning.leaf_fit_candidates`)."""

    AUTO_ONLY = "auto_only"  # classes with window or method auto, and a class whose configured method is one
    ALWAYS = "always"  # every class (a fixed class's WARN check compares with them too)


class SwitchRule(StrEnum):
    """When a challenger replaces last cycle's choice (`selection.stability.switch_on`)."""

    EITHER = "either"  # gain above the tolerance, or significant by the DM-HLN test
    BOTH = "both"
    TOLERANCE = "tolerance"
    TEST = "test"


def coverage_metric(level: float) -> str:
    """The backtest metric of the level % prediction interval: the share of actuals inside it (`coverage_80`)."""
    return f"coverage_{level:g}"


COVERAGE_METRIC_PATTERN = r"coverage_\d+(\.\d+)?"


def interval_columns(level: float) -> tuple[str, str]:
    """The bound columns of the level % prediction interval in the forecast tables (`lower_80`, `upper_80`)."""
    return f"lower_{level:g}", f"upper_{level:g}"


INTERVAL_COLUMN_PATTERN = r"^(lower|upper)_\d+(\.\d+)?$"


class ModelEngine(StrEnum):
    """Where the statsforecast model runs go (config `models.engine`)."""

    LOCAL = "local"
    DASK = "dask"


class OutlierRule(StrEnum):
    HAMPEL = "hampel"
    TUKEY = "tukey"
    NONE = "none"


class OutlierReplacement(StrEnum):
    LIMIT = "limit"
    MEDIAN = "median"


class OutlierSides(StrEnum):
    UPPER = "upper"
    BOTH = "both"


class SeasonalAdjust(StrEnum):
    AUTO = "auto"
    OFF = "off"


class ReturnsRule(StrEnum):
    NET_THEN_ZERO = "net_then_zero"


class ShortageRule(StrEnum):
    EXCLUDE = "exclude"
    FILL_BASELINE = "fill_baseline"


class ReadError(StrEnum):
    """Why the reader could not split a line into the file's columns (`read_error` of raw_history)."""

    TOO_MANY_FIELDS = "too_many_fields"
    TOO_FEW_FIELDS = "too_few_fields"
    LINE_TOO_LONG = "line_too_long"
    CONTROL_CHARACTERS = "control_characters"


class RejectReason(StrEnum):
    """Why a raw history line was not used (`reason` of rejected_rows), in the order the reasons apply.

    The first four are the reader's (`ReadError`); the rest are cleaned_history's rules.
    """

    TOO_MANY_FIELDS = ReadError.TOO_MANY_FIELDS.value
    TOO_FEW_FIELDS = ReadError.TOO_FEW_FIELDS.value
    LINE_TOO_LONG = ReadError.LINE_TOO_LONG.value
    CONTROL_CHARACTERS = ReadError.CONTROL_CHARACTERS.value
    MISSING_KEY = "missing_key"
    BAD_DATE = "bad_date"
    BAD_QUANTITY = "bad_quantity"
    QUANTITY_OUT_OF_BOUNDS = "quantity_out_of_bounds"
    UNKNOWN_PRODUCT = "unknown_product"
    NO_CUSTOMER_SPAN = "no_customer_span"
    DUPLICATE_OF_OTHER_FILE = "duplicate_of_other_file"
    DATE_BEFORE_WINDOW = "date_before_window"
    DATE_AFTER_WINDOW = "date_after_window"
    ISOLATED_DATE = "isolated_date"
    ON_OR_AFTER_CYCLE_DATE = "on_or_after_cycle_date"


class CorrectionRule(StrEnum):
    """The rule that changed a value of cleaned history (`rule` of history_corrections)."""

    NEGATIVE_NET_TO_ZERO = "negative_net_to_zero"
    HAMPEL_CAP = "hampel_cap"
    TUKEY_CAP = "tukey_cap"
    SHORTAGE_FILL = "shortage_fill"


class Origin(StrEnum):
    """Where a lifecycle history row came from."""

    OWN = "own"
    SUCCESSOR = "successor"


class LifecycleAuditRule(StrEnum):
    """What the lifecycle stage dropped or moved (`rule` of lifecycle_audit)."""

    OUTSIDE_ACTIVE_SPAN = "outside_active_span"
    PHASED_OUT_BEFORE_CYCLE = "phased_out_before_cycle"
    RETIRED_PRODUCT_WITHOUT_SUCCESSOR = "retired_product_without_successor"
    SUCCESSOR_WITHOUT_SPAN = "successor_without_span"
    SUCCESSOR_HISTORY_MAPPED = "successor_history_mapped"


class LifecycleRule(StrEnum):
    """How a child's share is set over the horizon (`lifecycle_rule` of share_tables)."""

    NONE = "none"
    PHASE_IN = "phase_in"
    PHASE_OUT = "phase_out"
    REFERENCE = "reference"
    INITIAL_SHARE = "initial_share"
    AWAITING_HISTORY = "awaiting_history"


NEW_CUSTOMER_RULES = (LifecycleRule.REFERENCE, LifecycleRule.INITIAL_SHARE, LifecycleRule.AWAITING_HISTORY)


class Fallback(StrEnum):
    """The window fallback a parent's shares took (`fallback` of share_tables)."""

    NONE = "none"
    LONGER_WINDOW = "longer_window"
    EVEN = "even"


class ZeroReason(StrEnum):
    """Why every share of a parent is 0 in a horizon period, so its forecast is 0 (`zero_reason`)."""

    PRODUCT_NOT_ACTIVE = "product_not_active"
    NO_ACTIVE_CHILD = "no_active_child"
    AWAITING_HISTORY = "awaiting_history"
    NO_SHARE_AMONG_ACTIVE = "no_share_among_active"


class Basis(StrEnum):
    """What a value was made from: one vocabulary for the `basis` columns.

    statistical_forecast (`FORECAST_BASES`): how a leaf forecast was made;
    reinitialized_target and period_basis (`PERIOD_BASES`): what the
    established children's weights in a period came from; plan_measures
    (`MEASURE_BASES`, plus `share_table:<name>` and `measure:<name>`): what a
    plan measure was split by.
    """

    REINITIALIZED_TARGET = "reinitialized_target"
    PERIOD_SHARE = "period_share"
    LEAF_FORECAST = "leaf_forecast"
    CHILDREN_FORECAST = "children_forecast"
    RECONCILED = "reconciled"
    HISTORY_SHARE = "history_share"
    PERIOD_OF_YEAR = "period_of_year"
    POOLED_FALLBACK = "pooled_fallback"
    PARENT = "parent"
    EVEN = "even"
    PIN = "pin"


FORECAST_BASES = (
    Basis.REINITIALIZED_TARGET,
    Basis.PERIOD_SHARE,
    Basis.LEAF_FORECAST,
    Basis.CHILDREN_FORECAST,
    Basis.RECONCILED,
)
PERIOD_BASES = (Basis.HISTORY_SHARE, Basis.PERIOD_OF_YEAR, Basis.CHILDREN_FORECAST, Basis.POOLED_FALLBACK)
MEASURE_BASES = (Basis.PARENT, Basis.EVEN, Basis.PIN, Basis.REINITIALIZED_TARGET, Basis.LEAF_FORECAST)
# the period basis of a per-period share method where the parent has one
BASIS_OF_METHOD = {ShareMethod.SEASONAL: Basis.PERIOD_OF_YEAR, ShareMethod.CHILDREN_FORECAST: Basis.CHILDREN_FORECAST}


class SplitRule(StrEnum):
    """How a measure's parent value reaches the leaf."""

    REPLICATE = "replicate"
    EVEN = "even"
    PRO_RATA = "pro_rata"


class BasisKind(StrEnum):
    """What a pro_rata measure is proportional to (`measures.<m>.basis.kind`)."""

    REINITIALIZED_TARGET = "reinitialized_target"
    SHARE_TABLE = "share_table"
    MEASURE = "measure"


class ParentValuesSource(StrEnum):
    PARENT_FORECAST = "parent_forecast"
    ADJUSTMENTS = "adjustments"


class PinOverflowRule(StrEnum):
    ERROR = "error"
    WARN = "warn"


class MeasureFallback(StrEnum):
    """What a plan measure's split fell back to in a parent period."""

    NONE = "none"
    PERIOD_SHARE = "period_share"
    EVEN = "even"
    PINS_OVERFLOW = "pins_overflow"


class DriftStatus(StrEnum):
    BOTH = "both"
    NEW = "new"
    GONE = "gone"


class ReportFile(StrEnum):
    PARENTS = "parents"
    SHARES = "shares"
    HTML = "html"
