"""The planning config: `config/planning.yaml` parsed once into frozen models.

Every model forbids unknown keys. Errors name the file, the key path and the
valid choices, so a planner can fix the YAML without reading this module.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Literal, get_args, get_origin

import yaml
from pydantic import BaseModel, ConfigDict, Field, PrivateAttr, ValidationError, ValidationInfo, field_validator, model_validator

from pipelines.errors import ConfigError

PeriodKind = Literal["week", "month"]
# How a child's share of its parent is computed from history (pipelines.stages.share_tables):
# one share per child (`pooled`, `mean_of_ratios`, `smoothed`) or one per horizon period
# (`seasonal`, `forecast_proportions`).
ShareMethod = Literal["pooled", "mean_of_ratios", "smoothed", "seasonal", "forecast_proportions"]
# a named share basis of a measure: the history methods that need no further keys
BasisShareMethod = Literal["pooled", "mean_of_ratios"]
PER_PERIOD_METHODS = ("seasonal", "forecast_proportions")
# `seasonal`: years of history read for each period of the year, when the class gives none.
# Three: each period of the year then rests on three observations (two on a two-year
# history); common practice, no source.
DEFAULT_SEASONAL_YEARS = 3
# `auto`: the backtest picks the strategy per class (pipelines.stages.backtest).
ForecastGrain = Literal["product_site", "product_site_customer", "auto"]
ModelName = Literal[
    "auto_ets",
    "ets_additive_season",
    "mstl_ets",
    "ses",
    "seasonal_naive",
    "croston_classic",
    "croston_sba",
    "croston_optimized",
    "tsb",
    "adida",
    "imapa",
]
# How leaf and parent forecasts are made coherent (pipelines.stages.hierarchy).
Strategy = Literal["top_down", "forecast_proportions", "bottom_up", "mint_shrink", "wls_var"]
OutlierRule = Literal["hampel", "tukey", "none"]
OutlierReplacement = Literal["limit", "median"]
OutlierSides = Literal["upper", "both"]
SeasonalAdjust = Literal["auto", "off"]
ReturnsRule = Literal["net_then_zero"]
ShortageRule = Literal["exclude", "fill_baseline"]
# How a measure's parent value reaches the leaf (pipelines.stages.plan_measures).
SplitRule = Literal["replicate", "even", "pro_rata"]
# What a pro_rata split is proportional to: the reinitialized target, a named share
# basis of `share_bases`, or the children's current values of another measure.
BasisKind = Literal["reinitialized_target", "share_table", "measure"]
# Where a measure's parent values come from: the statistical forecast's parent, or
# the rows of the adjustments input whose `measure` is the measure's name.
ParentValuesSource = Literal["parent_forecast", "adjustments"]
PinOverflowRule = Literal["error", "warn"]
LATEST_COMPLETE_PERIOD = "latest_complete_period"
STATISTICAL_FORECAST_MEASURE = "statistical_forecast"


class Frozen(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class PlausibilityConfig(Frozen):
    """Bounds a history line must lie within (pipelines/stages/cleaned_history.py); a line outside is rejected.

    The defaults are wide on purpose (common practice, no source): they catch
    typing slips such as a year 1900 or 2099 or a quantity of 1e12, never a
    real shipment.
    """

    years_before_cycle: float = Field(
        10, gt=0, le=200, description="a line dated more than this many years before the cycle date is rejected as date_before_window"
    )
    years_after_cycle: float = Field(
        2,
        gt=0,
        le=200,
        description="a line dated this many years or more after the cycle date is rejected as date_after_window "
        "(closer lines are on_or_after_cycle_date: kept for a later cycle)",
    )
    max_abs_quantity: float = Field(
        1e9, gt=0, description="a line whose quantity is larger than this in absolute value is rejected as quantity_out_of_bounds"
    )
    isolation_gap_years: float = Field(
        1.0,
        gt=0,
        le=200,
        description="lines at the start or end of the history cut off from the rest by a gap longer than this, "
        "holding a single line or at most 1% of the lines, set neither the cycle date nor the start of the "
        "history; they are rejected as isolated_date",
    )


class InputsConfig(Frozen):
    """Where the input files are (relative paths are taken from the working directory) and how they are read."""

    folder: Path = Path("data/demo")
    encoding: str = Field(
        "utf-8", description="text encoding of the CSV inputs, e.g. utf-8 (with or without BOM), latin-1, cp1252, utf-16"
    )
    max_line_bytes: int = Field(
        65536,
        ge=256,
        le=1 << 30,
        description="a CSV line (or Parquet cell) longer than this many bytes is rejected as line_too_long, never held whole",
    )
    plausible: PlausibilityConfig = PlausibilityConfig()

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, v: str) -> str:
        import codecs

        try:
            codecs.lookup(v)
        except LookupError:
            raise ValueError(f"{v!r} is not a known text encoding; use e.g. utf-8, latin-1, cp1252 or utf-16") from None
        return v


class StoreConfig(Frozen):
    """The DuckDB file holding one table per asset."""

    path: Path = Path("var/apportion.duckdb")


class CalendarConfig(Frozen):
    period: PeriodKind = "week"
    # Either an ISO date that starts a period, or the period after the latest
    # period found in history (the loader delivers complete periods only).
    cycle_date: dt.date | Literal["latest_complete_period"] = LATEST_COMPLETE_PERIOD
    horizon: int = Field(26, ge=1, le=520, description="periods to forecast")


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
    window: int = Field(ge=1, description="history window of the share table, in periods")
    method: ShareMethod = "pooled"
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
    forecast_grain: ForecastGrain = "product_site"
    models: ModelChoice = ModelChoice()
    outliers: OutlierConfig | None = Field(
        None,
        description="outlier rule of this class; replaces cleansing.outliers as a whole "
        "(keys left out take their defaults, not the values of cleansing.outliers)",
    )

    @model_validator(mode="after")
    def _fallbacks_grow(self) -> ProductClassConfig:
        previous = self.window
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
            if getattr(self, key) is not None and self.method != method:
                raise ValueError(
                    f"{key} applies only to method {method!r}, but method is {self.method!r}; "
                    f"remove {key} or set method: {method}"
                )
        if self.method == "smoothed" and self.smoothing is None:
            raise ValueError("method 'smoothed' needs smoothing, the constant alpha with 0 < alpha <= 1 (e.g. smoothing: 0.2)")
        return self

    @property
    def years(self) -> int:
        """Years of history pooled per period of the year (method seasonal)."""
        return self.seasonal_years if self.seasonal_years is not None else DEFAULT_SEASONAL_YEARS

    @property
    def band(self) -> int:
        """Neighbouring periods of the year pooled on each side (method seasonal)."""
        return self.seasonal_band or 0

    @property
    def longest_window(self) -> int:
        return max((self.window, *self.fallback_windows))

    def outlier_rule(self, cleansing: CleansingConfig) -> OutlierConfig:
        """The class's own outlier rule, else the cleansing default."""
        return self.outliers if self.outliers is not None else cleansing.outliers


class MonitoringConfig(Frozen):
    """Thresholds of the WARN checks a watcher looks at; a check fires above its threshold."""

    max_fallback_share: float = Field(
        0.10, ge=0, le=1, description="share of a class's parents whose shares came from a fallback (longer window or even split)"
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
    method: BasisShareMethod = "pooled"
    fallback_windows: tuple[int, ...] = Field(
        (),
        description="longer windows tried in order when a parent has no volume in the window; "
        "after them, an even split over the active children",
    )

    @model_validator(mode="after")
    def _fallbacks_grow(self) -> ShareBasisConfig:
        _check_fallbacks_grow(self.window, self.fallback_windows)
        return self

    @property
    def longest_window(self) -> int:
        return max((self.window, *self.fallback_windows))


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
    # give the other children 0 and list the rows in the WARN check pins_exceed_parent
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

    @property
    def periods_needed(self) -> int:
        """History periods the earliest origin's horizon reaches back from the cycle date."""
        return self.horizon + (self.origins - 1) * self.step


class PlanningConfig(Frozen):
    inputs: InputsConfig = InputsConfig()
    store: StoreConfig = StoreConfig()
    calendar: CalendarConfig = CalendarConfig()
    cleansing: CleansingConfig = CleansingConfig()
    lifecycle: LifecycleConfig = LifecycleConfig()
    product_classes: dict[str, ProductClassConfig] = Field(min_length=1)
    backtest: BacktestConfig = BacktestConfig()
    monitoring: MonitoringConfig = MonitoringConfig()
    share_bases: dict[str, ShareBasisConfig] = Field(
        default_factory=dict, description="named share tables that pro_rata measures may use as basis"
    )
    measures: dict[str, MeasureConfig] = Field(
        default_factory=lambda: dict(DEFAULT_MEASURES), min_length=1, description="the measures of the plan"
    )
    pins: PinsConfig = PinsConfig()
    _source: Path = PrivateAttr(Path("<memory>"))

    @property
    def source(self) -> Path:
        """The file this config was read from, for error messages."""
        return self._source

    def product_class(self, name: str) -> ProductClassConfig:
        try:
            return self.product_classes[name]
        except KeyError:
            raise ConfigError(
                f"{self.source}: product_classes has no class {name!r}; "
                f"known classes: {sorted(self.product_classes)}. Add it to the config "
                f"or correct the product_class column of the products file."
            ) from None

    def check_classes_known(self, classes_in_data: set[str], where: str) -> None:
        """Raise if the data name a product class the config does not define."""
        unknown = sorted(set(classes_in_data) - set(self.product_classes))
        if unknown:
            raise ConfigError(
                f"{self.source}: product_classes does not define {unknown}, used in {where}; "
                f"valid classes are {sorted(self.product_classes)}. Add a section for each "
                f"under product_classes, or correct the product_class column."
            )

    def measure_order(self) -> list[str]:
        """Measures in an order where each comes after the measure its basis reads.

        Raises ConfigError naming the keys when a basis names an unknown share
        basis or measure, or when measures read each other's values in a cycle.
        """
        for name, m in self.measures.items():
            if m.basis is None or m.basis.kind == "reinitialized_target":
                continue
            known = self.share_bases if m.basis.kind == "share_table" else self.measures
            section = "share_bases" if m.basis.kind == "share_table" else "measures"
            if m.basis.name not in known:
                raise ConfigError(
                    f"{self.source}: measures.{name}.basis.name is {m.basis.name!r}, not a key of {section}; "
                    f"valid names: {sorted(known)}. Add it under {section} or correct the name."
                )
        reads = {n: m.basis.name for n, m in self.measures.items() if m.basis is not None and m.basis.kind == "measure"}
        order: list[str] = []
        for start in self.measures:
            path = [start]
            while path[-1] in reads and reads[path[-1]] not in order:
                nxt = reads[path[-1]]
                if nxt in path:
                    loop = path[path.index(nxt):] + [nxt]
                    raise ConfigError(
                        f"{self.source}: measures read each other's values in a cycle: {' -> '.join(loop)} "
                        f"(each measure's basis.name). A pro_rata basis must be a measure that does not, "
                        f"directly or through others, read this one; change one basis of the cycle."
                    )
                path.append(nxt)
            for n in reversed(path):
                if n not in order:
                    order.append(n)
        return order

    @model_validator(mode="after")
    def _windows_inside_plausible_dates(self) -> PlanningConfig:
        """A window reaching further back than inputs.plausible keeps would find its oldest lines rejected."""
        per_year = 52 if self.calendar.period == "week" else 12
        keeps = int(self.inputs.plausible.years_before_cycle * per_year)
        windows = [(f"product_classes.{n}", pc.longest_window) for n, pc in self.product_classes.items()]
        windows += [(f"share_bases.{n}", b.longest_window) for n, b in self.share_bases.items()]
        windows += [("backtest", self.backtest.periods_needed)]
        for key, periods in windows:
            if periods > keeps:
                raise ValueError(
                    f"{key} reaches {periods} {self.calendar.period}s back but inputs.plausible.years_before_cycle "
                    f"({self.inputs.plausible.years_before_cycle:g}) keeps only {keeps}; raise years_before_cycle or "
                    f"shorten the window"
                )
        return self

    def check_windows_fit(self, history_periods: int) -> None:
        """Raise if a class window (not a fallback window) is longer than the history."""
        for name, pc in self.product_classes.items():
            self._check_window_fits(f"product_classes.{name}.window", pc.window, history_periods)

    def check_share_bases_fit(self, history_periods: int) -> None:
        """Raise if a share basis window (not a fallback window) is longer than the history."""
        for name, basis in self.share_bases.items():
            self._check_window_fits(f"share_bases.{name}.window", basis.window, history_periods)

    def _check_window_fits(self, key: str, window: int, history_periods: int) -> None:
        if window > history_periods:
            raise ConfigError(
                f"{self.source}: {key} is {window} periods but the history holds only {history_periods} "
                f"periods before the cycle date; set a window of at most {history_periods}."
            )


def _valid_keys(loc: tuple) -> list[str] | None:
    """The keys allowed where the unknown key `loc[-1]` was found."""
    model: type[BaseModel] = PlanningConfig
    parts = list(loc[:-1])
    while parts:
        field = model.model_fields.get(str(parts.pop(0)))
        if field is None:
            return None
        ann = field.annotation
        models = [a for a in get_args(ann) if isinstance(a, type) and issubclass(a, BaseModel)]
        if get_origin(ann) is not dict and models:  # `Model | None`: the model's keys
            ann = models[0]
        if get_origin(ann) is dict:
            ann = get_args(ann)[1]
            if parts:
                parts.pop(0)  # the dict key, e.g. a product class name
            else:
                return None
        if not (isinstance(ann, type) and issubclass(ann, BaseModel)):
            return None
        model = ann
    return sorted(model.model_fields)


def _format_error(source: Path, err: ValidationError) -> str:
    lines = [f"{source}: the planning config is not valid:"]
    for e in err.errors():
        key = ".".join(str(p) for p in e["loc"]) or "<top level>"
        msg = e["msg"]
        if e["type"] == "extra_forbidden":
            valid = _valid_keys(e["loc"])
            msg = "unknown key" + (f"; valid keys here: {valid}" if valid else "")
        elif e["type"] == "missing":
            msg = "required key is missing"
        lines.append(f"  - {key}: {msg} (got {e.get('input')!r})" if e["type"] != "missing" else f"  - {key}: {msg}")
    lines.append("Fix these keys in the file and run again.")
    return "\n".join(lines)


def parse_config(data: object, source: Path | str = "<memory>") -> PlanningConfig:
    source = Path(source)
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: expected a mapping of sections at the top level, got {type(data).__name__}")
    try:
        config = PlanningConfig.model_validate(data)
    except ValidationError as err:
        raise ConfigError(_format_error(source, err)) from None
    config._source = source
    config.measure_order()  # references and cycles between measures, named by key
    return config


def load_config(path: Path | str) -> PlanningConfig:
    """Read and validate the YAML planning config at `path`."""
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"{path}: planning config not found. Pass the path of config/planning.yaml.")
    try:
        data = yaml.safe_load(path.read_text())
    except yaml.YAMLError as err:
        raise ConfigError(f"{path}: not valid YAML: {err}") from None
    return parse_config(data, path)


VALID_MODELS: tuple[str, ...] = get_args(ModelName)
VALID_STRATEGIES: tuple[str, ...] = get_args(Strategy)
