"""The planning config: `config/planning.yaml` parsed once into frozen models.

Every model forbids unknown keys. Errors name the file, the key path and the
valid choices, so a planner can fix the YAML without reading this module.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Literal, get_args, get_origin

import yaml
from pydantic import BaseModel, Field, PrivateAttr, ValidationError

from pipelines.config_sections import (
    DEFAULT_MEASURES,
    BacktestConfig,
    CleansingConfig,
    ExecutionConfig,
    Frozen,
    LifecycleConfig,
    MeasureConfig,
    MonitoringConfig,
    PinsConfig,
    ProductClassConfig,
    ShareBasisConfig,
)
from pipelines.errors import ConfigError
from pipelines.vocabulary import PeriodKind

LATEST_COMPLETE_PERIOD = "latest_complete_period"


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
    execution: ExecutionConfig = ExecutionConfig()
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

