"""The planning config: `config/planning.yaml` parsed once into frozen models.

Every model forbids unknown keys. Errors name the file, the key path and the
valid choices, so a planner can fix the YAML without reading this module.
"""

from __future__ import annotations

import copy
import datetime as dt
import re
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Literal, get_args, get_origin

import yaml
from pydantic import BaseModel, Field, PrivateAttr, ValidationError, field_validator, model_validator

from pipelines.config_forecast import HierarchyConfig, IntervalsConfig
from pipelines.config_inputs import InputsConfig
from pipelines.config_models import ModelsConfig
from pipelines.config_scale import ScaleConfig
from pipelines.config_sections import (
    DEFAULT_MEASURES,
    BacktestConfig,
    CleansingConfig,
    Frozen,
    LifecycleConfig,
    MeasureConfig,
    MonitoringConfig,
    PinsConfig,
    ProductClassConfig,
    ShareBasisConfig,
)
from pipelines.config_selection import SelectionConfig
from pipelines.errors import ConfigError, hide_passwords
from pipelines.shards import check_scale
from pipelines.vocabulary import AUTO, FORECAST_GRAIN_STRATEGY, RENAMED_SHARE_METHODS, PeriodKind

LATEST_COMPLETE_PERIOD = "latest_complete_period"
# one field of a cron string: *, numbers, ranges, lists and steps (names such as MON are not accepted)
CRON_FIELD = re.compile(r"(\*|\d+(-\d+)?)(/\d+)?(,(\*|\d+(-\d+)?)(/\d+)?)*")


class StoreConfig(Frozen):
    """The store folder: a Parquet file per asset partition, cycles published whole (pipelines/store/)."""

    path: Path = Path("var/store")
    # a run launched by the daemon or the UI waits this long for a partition another run is writing,
    # then fails naming that run (the command line asks with --if-busy wait|stop)
    lock_wait_minutes: float = Field(60.0, ge=0, description="minutes a run waits for a busy partition")


# What a calendar gives when the config leaves a key out; an explicit value always wins.
# horizon: a weekly plan looks half a year ahead (26), a monthly one the coming year, a full season of 12
# (common practice, no source). backtest horizon and step: half the forecast horizon, origins not overlapping.
# schedule: the cycle starts at 06:00 UTC on the first day of each period (ISO weeks start on Monday).
PERIOD_DEFAULTS: dict[str, dict[str, object]] = {
    "week": {"horizon": 26, "backtest_horizon": 13, "backtest_step": 13, "schedule": "0 6 * * 1"},
    "month": {"horizon": 12, "backtest_horizon": 6, "backtest_step": 6, "schedule": "0 6 1 * *"},
}


class CalendarConfig(Frozen):
    period: PeriodKind = "week"
    # Either an ISO date that starts a period, or the period after the latest
    # period found in history (the loader delivers complete periods only).
    cycle_date: dt.date | Literal["latest_complete_period"] = LATEST_COMPLETE_PERIOD
    horizon: int = Field(26, ge=1, le=520, description="periods to forecast (default: 26 weekly, 12 monthly)")
    schedule: str = Field(
        "0 6 * * 1",
        description="cron (UTC) of the schedule that starts a cycle (default: the first day of each period, 06:00)",
    )

    @model_validator(mode="before")
    @classmethod
    def _period_defaults(cls, data: object) -> object:
        """horizon and schedule, when left out, follow the period."""
        if isinstance(data, dict):
            defaults = PERIOD_DEFAULTS.get(data.get("period", "week"))
            if defaults:
                data = {"horizon": defaults["horizon"], "schedule": defaults["schedule"], **data}
        return data

    @field_validator("schedule")
    @classmethod
    def _cron(cls, v: str) -> str:
        fields = v.split()
        if len(fields) != 5 or not all(CRON_FIELD.fullmatch(f) for f in fields):
            raise ValueError(
                f"not a cron string of 5 fields (minute hour day-of-month month day-of-week), e.g. "
                f"'0 6 * * 1' (Monday 06:00) or '0 6 1 * *' (the first of the month 06:00); got {v!r}"
            )
        return v


def class_section(classes: Mapping[str, ProductClassConfig], name: str, source) -> ProductClassConfig:
    """The section of product class `name`; a ConfigError naming the file and the known classes if none."""
    try:
        return classes[name]
    except KeyError:
        raise ConfigError(
            f"{source}: product_classes has no class {name!r}; "
            f"known classes: {sorted(classes)}. Add it to the config "
            f"or correct the product_class column of the products file."
        ) from None


class PlanningConfig(Frozen):
    inputs: InputsConfig = InputsConfig()
    store: StoreConfig = StoreConfig()
    calendar: CalendarConfig = CalendarConfig()
    cleansing: CleansingConfig = CleansingConfig()
    lifecycle: LifecycleConfig = LifecycleConfig()
    product_classes: dict[str, ProductClassConfig] = Field(min_length=1)
    backtest: BacktestConfig = BacktestConfig()
    selection: SelectionConfig = SelectionConfig()
    monitoring: MonitoringConfig = MonitoringConfig()
    share_bases: dict[str, ShareBasisConfig] = Field(
        default_factory=dict, description="named share tables that pro_rata measures may use as basis"
    )
    measures: dict[str, MeasureConfig] = Field(
        default_factory=lambda: dict(DEFAULT_MEASURES), min_length=1, description="the measures of the plan"
    )
    pins: PinsConfig = PinsConfig()
    models: ModelsConfig = ModelsConfig()
    intervals: IntervalsConfig = IntervalsConfig()
    hierarchy: HierarchyConfig = HierarchyConfig()
    scale: ScaleConfig = ScaleConfig()
    _source: Path = PrivateAttr(Path("<memory>"))

    @property
    def source(self) -> Path:
        """The file this config was read from, for error messages."""
        return self._source

    def product_class(self, name: str) -> ProductClassConfig:
        return class_section(self.product_classes, name, self.source)

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

    @model_validator(mode="before")
    @classmethod
    def _backtest_follows_the_period(cls, data: object) -> object:
        """backtest.horizon and backtest.step, when left out, follow calendar.period (PERIOD_DEFAULTS)."""
        if not isinstance(data, dict):
            return data
        calendar = data.get("calendar")
        period = calendar.get("period", "week") if isinstance(calendar, dict) else getattr(calendar, "period", "week")
        backtest = data.get("backtest", {})
        defaults = PERIOD_DEFAULTS.get(period)
        if defaults and isinstance(backtest, dict):
            filled = {"horizon": defaults["backtest_horizon"], "step": defaults["backtest_step"], **backtest}
            data = {**data, "backtest": filled}
        return data

    @model_validator(mode="after")
    def _windows_inside_plausible_dates(self) -> PlanningConfig:
        """A window reaching further back than inputs.plausible keeps would find its oldest lines rejected."""
        per_year = 52 if self.calendar.period == "week" else 12
        keeps = int(self.inputs.plausible.years_before_cycle * per_year)
        reach = self.backtest.horizon + (self.backtest.origins - 1) * self.backtest.step
        classes = self.product_classes.items()
        tried = max(self.selection.share_tuning.windows)  # window: auto tries every candidate
        windows = [
            (f"product_classes.{n}", max((tried if c.window == AUTO else c.window, *c.fallback_windows)))
            for n, c in classes
        ]
        windows += [(f"share_bases.{n}", max((b.window, *b.fallback_windows))) for n, b in self.share_bases.items()]
        windows += [("backtest", reach)]
        for key, periods in windows:
            if periods > keeps:
                raise ValueError(
                    f"{key} reaches {periods} {self.calendar.period}s back but inputs.plausible.years_before_cycle "
                    f"({self.inputs.plausible.years_before_cycle:g}) keeps only {keeps}; raise years_before_cycle or "
                    f"shorten the window"
                )
        return self

    def class_windows(self) -> dict[str, int]:
        """key -> window of every product class (not the fallback windows)."""
        # a window: auto class only takes the candidates that fit (pipelines.engines.share_tuning)
        return {f"product_classes.{n}.window": pc.window for n, pc in self.product_classes.items() if pc.window != AUTO}

    def basis_windows(self) -> dict[str, int]:
        """key -> window of every share basis (not the fallback windows)."""
        return {f"share_bases.{name}.window": basis.window for name, basis in self.share_bases.items()}

    def check_windows_fit(self, history_periods: int) -> None:
        """Raise if a class window (not a fallback window) is longer than the history."""
        check_windows_fit(self.class_windows(), history_periods, self.source)

    def check_share_bases_fit(self, history_periods: int) -> None:
        """Raise if a share basis window (not a fallback window) is longer than the history."""
        check_windows_fit(self.basis_windows(), history_periods, self.source)


def check_windows_fit(windows: Mapping[str, int], history_periods: int, source) -> None:
    """Raise a ConfigError naming the key when a window (key -> periods) is longer than the history."""
    for key, window in windows.items():
        if window > history_periods:
            raise ConfigError(
                f"{source}: {key} is {window} periods but the history holds only {history_periods} "
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
    return hide_passwords("\n".join(lines))


class ConfigDeprecationWarning(FutureWarning):
    """A config key or value of the last release: still read, under its new name, until the next release."""


def upgrade_renamed(data: dict, source: Path) -> tuple[dict, list[str]]:
    """A copy of the raw config with last release's key and value names replaced by this release's.

    Returns the copy and one message per rename, naming the file, the old key
    and the new key to write. Giving both the old and the new key is an error.
    """
    data = copy.deepcopy(data)
    messages = []
    execution = data.get("execution")
    if isinstance(execution, dict) and "n_jobs" in execution:
        models = data.setdefault("models", {})
        if isinstance(models, dict) and "n_jobs" in models:
            raise ConfigError(f"{source}: gives both models.n_jobs and execution.n_jobs (its name of the last "
                              f"release); remove execution.n_jobs.")
        if isinstance(models, dict):
            models["n_jobs"] = execution.pop("n_jobs")
            if not execution:
                del data["execution"]
            messages.append(f"{source}: execution.n_jobs is renamed models.n_jobs; write models: {{n_jobs: "
                            f"{models['n_jobs']}}}. execution.n_jobs is read until the next release.")
    classes = data.get("product_classes")
    for name, section in (classes.items() if isinstance(classes, dict) else ()):
        if not isinstance(section, dict):
            continue
        if "forecast_grain" in section:
            old = section.pop("forecast_grain")
            if "strategy" in section:
                raise ConfigError(
                    f"{source}: product_classes.{name} gives both strategy and forecast_grain (its name of the last "
                    f"release); remove forecast_grain."
                )
            new = FORECAST_GRAIN_STRATEGY.get(old, old)
            section["strategy"] = new
            messages.append(
                f"{source}: product_classes.{name}.forecast_grain is renamed strategy; write strategy: {new} "
                f"(product_site -> top_down, product_site_customer -> bottom_up, auto -> auto). "
                f"forecast_grain is read until the next release."
            )
        if section.get("method") in RENAMED_SHARE_METHODS:
            old, new = section["method"], RENAMED_SHARE_METHODS[section["method"]]
            section["method"] = new
            messages.append(
                f"{source}: product_classes.{name}.method {old} is renamed {new}; write method: {new}. "
                f"{old} is read until the next release."
            )
    return data, messages


def parse_config(data: object, source: Path | str = "<memory>") -> PlanningConfig:
    source = Path(source)
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: expected a mapping of sections at the top level, got {type(data).__name__}")
    data, renamed = upgrade_renamed(data, source)
    for message in renamed:
        warnings.warn(message, ConfigDeprecationWarning, stacklevel=2)
    try:
        config = PlanningConfig.model_validate(data)
    except ValidationError as err:
        raise ConfigError(_format_error(source, err)) from None
    config._source = source
    config.measure_order()  # references and cycles between measures, named by key
    check_scale(config)  # a class cut into shards needs nothing of the whole class
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

