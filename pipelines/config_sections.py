"""The sections of the planning config: cleansing, lifecycle, classes and their models, backtest, monitoring, plan.

Frozen pydantic models that forbid unknown keys; every choice is a `str`
Enum of `pipelines.vocabulary`, so an error lists the valid values. Assembled
and read from YAML in `pipelines.config`.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationInfo, field_validator, model_validator

from pipelines.config_scale import ScaleConfig
from pipelines.vocabulary import (
    AUTO,
    BASIS_SHARE_METHODS,
    BasisKind,
    ModelName,
    OutlierReplacement,
    OutlierRule,
    OutlierSides,
    ParentValuesSource,
    PinOverflowRule,
    ReturnsRule,
    SeasonalAdjust,
    Seasonality,
    ShareMethod,
    ShortageRule,
    SplitRule,
    Strategy,
    values,
)

# `seasonal`: years of history read for each period of the year, when the class gives none. Three: each period of
# the year then rests on three observations (two on a two-year history); common practice, no source.
DEFAULT_SEASONAL_YEARS = 3


STATISTICAL_FORECAST_MEASURE = "statistical_forecast"


class Frozen(BaseModel):
    # the Enums validate; the model keeps their text, so frames and messages hold plain strings
    model_config = ConfigDict(extra="forbid", frozen=True, use_enum_values=True)


class OutlierConfig(Frozen):
    """The outlier rule over a centred window (pipelines/stages/cleaned_history.py).

    `hampel` (Hampel 1974): flag |x - median| > k * 1.4826 * MAD.
    `tukey` (Tukey 1977): flag x outside [Q1 - fence * IQR, Q3 + fence * IQR].
    `none`: no outlier rule.
    """

    rule: OutlierRule = "hampel"
    window: int = Field(13, ge=3, le=105, description="centred window in periods; odd")
    k: float = Field(3.0, gt=0, description="hampel: limits at median +/- k * 1.4826 * MAD")
    fence: float = Field(1.5, gt=0, description="tukey: fences at Q1 - fence * IQR and Q3 + fence * IQR")
    replace_with: OutlierReplacement = "limit"
    # `upper` (default) corrects spikes only: a low value in shipments is more
    # often a supply gap than a demand outlier, and raising it would invent demand.
    sides: OutlierSides = "upper"
    # `auto`: a class with models.seasonal true is judged on its deseasonalised
    # series where two full seasons of history exist, so a seasonal peak is not cut.
    seasonal_adjust: SeasonalAdjust = "auto"

    @field_validator("window")
    @classmethod
    def _odd(cls, v: int) -> int:
        if v % 2 == 0:
            raise ValueError(f"must be odd so the window is centred (got {v}; use {v + 1})")
        return v


class CleansingConfig(Frozen):
    returns: ReturnsRule = "net_then_zero"
    outliers: OutlierConfig = OutlierConfig()
    # Periods of a recorded supply shortage (optional shortages input):
    # `exclude` keeps the values and flags them for the share basis to leave out;
    # `fill_baseline` replaces them by the child's rolling median of its other periods.
    shortages: ShortageRule = "exclude"


class LifecycleConfig(Frozen):
    min_history_periods: int = Field(
        13,
        ge=1,
        description="a customer with fewer distinct periods of its own history is new: its share "
        "comes from its reference customer, else from its initial_share, else it gets no share "
        "until it has this many periods",
    )
    # Our default: a new customer and its reference split the reference's share
    # evenly (0.5); 1 is a like-for-like replacement. The share is taken from the
    # reference, which cannot give more than it has, hence at most 1.
    reference_scale: float = Field(
        0.5,
        gt=0,
        le=1,
        description="fraction of its reference customer's share a new customer takes over, "
        "when its customer span gives no `scale`",
    )


class TSBConfig(Frozen):
    """Smoothing parameters of TSB (Teunter, Syntetos & Babai 2011).

    `alpha_d` smooths the size of a non-zero demand, `alpha_p` the probability
    that a period has demand (updated every period, so an item that stops
    selling decays towards 0, unlike Croston).
    """

    alpha_d: float = Field(0.1, gt=0, le=1, description="smoothing of the demand size")
    alpha_p: float = Field(0.1, gt=0, le=1, description="smoothing of the demand probability")


class ModelChoice(Frozen):
    """The statsforecast model per demand class (Syntetos, Boylan & Croston 2005).

    Seasonal models (`auto_ets`, `mstl_ets`, `seasonal_naive`) use a season only
    when `seasonal` is true and the series holds two full seasons; otherwise
    `auto_ets` and `mstl_ets` run non-seasonal and `seasonal_naive` is the naive
    forecast.
    """

    smooth: ModelName = "auto_ets"
    erratic: ModelName = "auto_ets"
    intermittent: ModelName = "croston_sba"
    lumpy: ModelName = "croston_sba"
    seasonal: bool = Field(
        False,
        description="let ETS and seasonal naive use one season of the calendar (52 weeks or "
        "12 months) where at least two full seasons of history exist",
    )
    tsb: TSBConfig = TSBConfig()


class ProductClassConfig(Frozen):
    # auto: chosen by the backtest from selection.share_tuning's candidates (pipelines/engines/share_tuning.py)
    window: Annotated[int, Field(ge=1)] | Literal[AUTO] = Field(description="share table's history window, periods")
    method: Literal[values(ShareMethod) + (AUTO,)] = "pooled"
    fallback_windows: tuple[int, ...] = Field(
        (),
        description="longer windows tried in order when a parent has no volume in its window; "
        "after them, an even split over the active children",
    )
    smoothing: float | None = Field(
        None,
        description="method smoothed only (required there): the smoothing constant alpha of "
        "p_t = alpha x y_t / Y_t + (1 - alpha) x p_(t-1), 0 < alpha <= 1",
    )
    seasonal_years: int | None = Field(
        None,
        description=f"method seasonal only: years of history pooled per period of the year "
        f"(1 to 10; default {DEFAULT_SEASONAL_YEARS})",
    )
    seasonal_band: int | None = Field(
        None,
        description="method seasonal only: neighbouring periods of the year pooled on each side "
        "of the period (0 to 4; default 0 = the period of the year alone)",
    )
    strategy: Literal[(AUTO,) + values(Strategy)] = Field(
        "top_down",
        description="how the class's leaf and parent forecasts are made coherent; auto: the backtest's winner by "
        "leaf-grain WMAPE (strategy_choice)",
    )
    models: ModelChoice = ModelChoice()
    seasonality: Literal[(AUTO,) + values(Seasonality)] | None = Field(
        None, description="none | own (each series' seasonal model) | group (index of seasonal_group) | auto "
        "(the backtest's choice); blank: own with models.seasonal true, else none",
    )
    seasonal_group: str = Field("product", description="index group: product, product_class or a products column")
    scale: ScaleConfig | None = Field(None, description="this class's shards; blank: the config's scale")
    outliers: OutlierConfig | None = Field(
        None,
        description="outlier rule of this class; replaces cleansing.outliers as a whole "
        "(keys left out take their defaults, not the values of cleansing.outliers)",
    )

    @model_validator(mode="after")
    def _fallbacks_grow(self) -> ProductClassConfig:
        previous = 0 if self.window == AUTO else self.window
        for w in self.fallback_windows:
            if w <= previous:
                raise ValueError(
                    f"fallback_windows must each be longer than the one before "
                    f"(window {self.window}, fallback_windows {list(self.fallback_windows)})"
                )
            previous = w
        return self

    @field_validator("smoothing", "seasonal_years", "seasonal_band")
    @classmethod
    def _method_key_range(cls, v: float | None, info: ValidationInfo) -> float | None:
        if v is None:
            return v
        inside, valid = {
            "smoothing": (0 < v <= 1, "greater than 0 and at most 1 (0 < alpha <= 1, e.g. 0.2)"),
            "seasonal_years": (1 <= v <= 10, "a whole number of years from 1 to 10"),
            "seasonal_band": (0 <= v <= 4, "0 to 4 neighbouring periods on each side"),
        }[info.field_name]
        if not inside:
            raise ValueError(f"{info.field_name} must be {valid}")
        return v

    @model_validator(mode="after")
    def _method_keys(self) -> ProductClassConfig:
        # a key of another method is refused rather than ignored: it would otherwise look like it acts
        owners = {"smoothing": "smoothed", "seasonal_years": "seasonal", "seasonal_band": "seasonal"}
        for key, method in owners.items():
            if getattr(self, key) is not None and self.method not in (method, AUTO):
                raise ValueError(
                    f"{key} applies only to method {method!r}, but method is {self.method!r}; "
                    f"remove {key} or set method: {method}"
                )
        if self.method == "smoothed" and self.smoothing is None:
            raise ValueError(
                "method 'smoothed' needs smoothing, the constant alpha with 0 < alpha <= 1 (e.g. smoothing: 0.2)"
            )
        return self

    @property
    def years(self) -> int:
        """Years of history pooled per period of the year (method seasonal)."""
        return self.seasonal_years if self.seasonal_years is not None else DEFAULT_SEASONAL_YEARS

    @property
    def band(self) -> int:
        """Neighbouring periods of the year pooled on each side (method seasonal)."""
        return self.seasonal_band or 0

    def outlier_rule(self, cleansing: CleansingConfig) -> OutlierConfig:
        """The class's own outlier rule, else the cleansing default."""
        return self.outliers if self.outliers is not None else cleansing.outliers


class MonitoringConfig(Frozen):
    """Thresholds of the WARN checks a watcher looks at; a check fires above its threshold."""

    max_fallback_share: float = Field(
        0.10,
        ge=0,
        le=1,
        description="share of a class's parents whose shares came from a fallback (longer window or even split)",
    )
    max_rejected_share: float = Field(0.01, ge=0, le=1, description="rejected raw lines / raw lines of a class")
    max_share_drift_pp: float = Field(
        10.0, gt=0, le=100, description="percentage points a child's share may move from the previous cycle's"
    )


def _check_fallbacks_grow(window: int, fallback_windows: tuple[int, ...]) -> None:
    previous = window
    for w in fallback_windows:
        if w <= previous:
            raise ValueError(
                f"fallback_windows must each be longer than the one before "
                f"(window {window}, fallback_windows {list(fallback_windows)})"
            )
        previous = w


class ShareBasisConfig(Frozen):
    """A named share table of its own, a basis for pro_rata measures (e.g. promotions on 52 weeks).

    Computed by the share engine of `pipelines.stages.share_tables` with this
    window, method and fallbacks in place of each product class's own; the
    lifecycle rules (new customers, spans inside the horizon) are the same.
    """

    window: int = Field(ge=1, description="history window of this share table, in periods")
    method: Literal[values(BASIS_SHARE_METHODS)] = "pooled"
    fallback_windows: tuple[int, ...] = Field(
        (),
        description="longer windows tried in order when a parent has no volume in the window; "
        "after them, an even split over the active children",
    )

    @model_validator(mode="after")
    def _fallbacks_grow(self) -> ShareBasisConfig:
        _check_fallbacks_grow(self.window, self.fallback_windows)
        return self


class BasisConfig(Frozen):
    """What a pro_rata split is proportional to.

    `reinitialized_target`: the target of `reinitialized_target` (the statistical
    forecast's own basis); `share_table`: the period shares of the share basis
    `name` (a key of `share_bases`); `measure`: the children's current values
    of the measure `name` (a key of `measures`).
    """

    kind: BasisKind
    name: str | None = Field(None, description="the share basis (kind share_table) or the measure (kind measure)")

    @model_validator(mode="after")
    def _name_fits_kind(self) -> BasisConfig:
        if self.kind == "reinitialized_target" and self.name is not None:
            raise ValueError(f"basis kind reinitialized_target takes no name (got name {self.name!r})")
        if self.kind != "reinitialized_target" and not self.name:
            what = "a key of share_bases" if self.kind == "share_table" else "a key of measures"
            raise ValueError(f"basis kind {self.kind} needs a name: {what}")
        return self

    @property
    def label(self) -> str:
        """The basis as written in the `basis` column of plan_measures."""
        return self.kind if self.name is None else f"{self.kind}:{self.name}"


class IntegerSplitConfig(Frozen):
    """Split in whole multiples of `pack_size` by the largest remainder (Hamilton) method."""

    pack_size: int = Field(1, ge=1, description="parts are multiples of this many units (1 = whole units)")


class MeasureConfig(Frozen):
    """One measure of the plan: where its parent values come from and how they reach the leaf."""

    rule: SplitRule
    basis: BasisConfig | None = Field(None, description="pro_rata only: what the split is proportional to")
    parent_values: ParentValuesSource = Field(
        "adjustments",
        description="parent_forecast: the statistical forecast per product x site; adjustments: the rows "
        "of the adjustments input whose measure column is this measure's name",
    )
    integer: IntegerSplitConfig | None = Field(
        None, description="even / pro_rata only: split in whole units or packs (largest remainder method)"
    )

    @model_validator(mode="after")
    def _rule_fits(self) -> MeasureConfig:
        if self.rule == "pro_rata" and self.basis is None:
            raise ValueError(
                "rule pro_rata needs a basis: {kind: reinitialized_target}, {kind: share_table, name: ...} "
                "or {kind: measure, name: ...}"
            )
        if self.rule != "pro_rata" and self.basis is not None:
            raise ValueError(f"rule {self.rule} takes no basis (only pro_rata does); remove the basis key")
        if self.rule == "replicate" and self.integer is not None:
            raise ValueError("rule replicate copies the parent value to every child; an integer split applies "
                             "to even and pro_rata only; remove the integer key")
        return self


class PinsConfig(Frozen):
    """Leaf values a planner fixed (optional pins input)."""

    # error: stop with the parent, period, pins and overflow named; warn: keep the pins,
    # give the other children 0 and list the rows in the WARN check pins_within_parent
    on_overflow: PinOverflowRule = "error"


DEFAULT_MEASURES = {
    STATISTICAL_FORECAST_MEASURE: MeasureConfig(
        rule="pro_rata", basis=BasisConfig(kind="reinitialized_target"), parent_values="parent_forecast"
    )
}


class BacktestConfig(Frozen):
    """Rolling-origin backtest (Tashman 2000): `origins` forecast origins, each `horizon` periods ahead.

    The last origin is `horizon` periods before the cycle date, so its whole
    horizon lies inside history; earlier origins step back `step` periods each.
    """

    origins: int = Field(4, ge=1, le=52, description="number of forecast origins (k)")
    horizon: int = Field(13, ge=1, le=104, description="periods forecast from each origin (h)")
    step: int = Field(13, ge=1, le=104, description="periods between consecutive origins")
    strategies: tuple[Strategy, ...] = Field(
        ("top_down", "forecast_proportions", "bottom_up", "mint_shrink", "wls_var"),
        min_length=1,
        description="strategies compared; `auto` picks the one with the lowest leaf-grain WMAPE",
    )

    @field_validator("strategies")
    @classmethod
    def _distinct(cls, v: tuple[str, ...]) -> tuple[str, ...]:
        if len(set(v)) != len(v):
            raise ValueError(f"list each strategy once (got {list(v)})")
        return v
