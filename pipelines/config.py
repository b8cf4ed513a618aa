"""The planning config: `config/planning.yaml` parsed once into frozen models.

Every model forbids unknown keys. Errors name the file, the key path and the
valid choices, so a planner can fix the YAML without reading this module.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Literal, get_args, get_origin

import yaml
from pydantic import BaseModel, ConfigDict, Field, PrivateAttr, ValidationError, field_validator, model_validator

from pipelines.errors import ConfigError

PeriodKind = Literal["week", "month"]
ShareMethod = Literal["pooled", "mean_of_ratios"]
ForecastGrain = Literal["product_site", "product_site_customer"]
ModelName = Literal[
    "auto_ets",
    "ses",
    "seasonal_naive",
    "croston_classic",
    "croston_sba",
    "croston_optimized",
    "adida",
    "imapa",
]
OutlierRule = Literal["hampel", "none"]
OutlierReplacement = Literal["limit", "median"]
OutlierSides = Literal["upper", "both"]
ReturnsRule = Literal["net_then_zero"]
LATEST_COMPLETE_PERIOD = "latest_complete_period"


class Frozen(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class InputsConfig(Frozen):
    """Where the input files are (relative paths are taken from the working directory)."""

    folder: Path = Path("data/demo")


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
    """Hampel filter (Hampel 1974): flag |x - median| > k * 1.4826 * MAD in a centred window."""

    rule: OutlierRule = "hampel"
    window: int = Field(13, ge=3, le=105, description="centred window in periods; odd")
    k: float = Field(3.0, gt=0)
    replace_with: OutlierReplacement = "limit"
    # `upper` (default) corrects spikes only: a low value in shipments is more
    # often a supply gap than a demand outlier, and raising it would invent demand.
    sides: OutlierSides = "upper"

    @field_validator("window")
    @classmethod
    def _odd(cls, v: int) -> int:
        if v % 2 == 0:
            raise ValueError(f"must be odd so the window is centred (got {v}; use {v + 1})")
        return v


class CleansingConfig(Frozen):
    returns: ReturnsRule = "net_then_zero"
    outliers: OutlierConfig = OutlierConfig()


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


class ModelChoice(Frozen):
    """The statsforecast model per demand class (Syntetos, Boylan & Croston 2005)."""

    smooth: ModelName = "auto_ets"
    erratic: ModelName = "auto_ets"
    intermittent: ModelName = "croston_sba"
    lumpy: ModelName = "croston_sba"
    seasonal: bool = Field(
        False,
        description="let ETS and seasonal naive use one season of the calendar (52 weeks or "
        "12 months) where at least two full seasons of history exist",
    )


class ProductClassConfig(Frozen):
    window: int = Field(ge=1, description="history window of the share table, in periods")
    method: ShareMethod = "pooled"
    fallback_windows: tuple[int, ...] = Field(
        (),
        description="longer windows tried in order when a parent has no volume in its window; "
        "after them, an even split over the active children",
    )
    forecast_grain: ForecastGrain = "product_site"
    models: ModelChoice = ModelChoice()

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

    @property
    def longest_window(self) -> int:
        return max((self.window, *self.fallback_windows))


class PlanningConfig(Frozen):
    inputs: InputsConfig = InputsConfig()
    store: StoreConfig = StoreConfig()
    calendar: CalendarConfig = CalendarConfig()
    cleansing: CleansingConfig = CleansingConfig()
    lifecycle: LifecycleConfig = LifecycleConfig()
    product_classes: dict[str, ProductClassConfig] = Field(min_length=1)
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

    def check_windows_fit(self, history_periods: int) -> None:
        """Raise if a class window (not a fallback window) is longer than the history."""
        for name, pc in self.product_classes.items():
            if pc.window > history_periods:
                raise ConfigError(
                    f"{self.source}: product_classes.{name}.window is {pc.window} periods but "
                    f"the history holds only {history_periods} periods before the cycle date; "
                    f"set a window of at most {history_periods}."
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
