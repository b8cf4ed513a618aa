"""Config sections of the forecast's uncertainty and tree: `intervals` (prediction interval levels) and
`hierarchy` (aggregation levels above the parent), and each class's seasonality.

Frozen pydantic models that forbid unknown keys, read into `pipelines.config.PlanningConfig`.
"""

from __future__ import annotations

from pydantic import Field, field_validator

from pipelines.config_sections import Frozen
from pipelines.vocabulary import AUTO, GROUP_PRODUCT, LEVEL_TOTAL, Seasonality


class IntervalsConfig(Frozen):
    """Prediction interval levels (percent) of the forecast: bounds in `parent_forecast` and
    `statistical_forecast` (`lower_80`, `upper_80`, ...), and their coverage in `backtest_accuracy`."""

    levels: tuple[float, ...] = Field(
        (80.0, 95.0), description="interval levels in percent, each strictly between 0 and 100; [] = no intervals"
    )

    @field_validator("levels")
    @classmethod
    def _levels(cls, v: tuple[float, ...]) -> tuple[float, ...]:
        bad = [x for x in v if not 0 < x < 100]
        if bad:
            raise ValueError(f"interval levels are percentages strictly between 0 and 100, got {bad}")
        if len(set(v)) != len(v):
            raise ValueError(f"interval levels must differ, got {list(v)}")
        return tuple(sorted(v))


class HierarchyConfig(Frozen):
    """Aggregation levels above the parent (product x site), bottom to top, that enter MinT and bottom-up.

    `product`: the product across its sites; `total`: the whole class (last
    only); any other name is a column of the products master data (e.g.
    `product_family`), whose blank cells form a group of their own. Every
    level must nest in the next: a group of a lower level lies in one group of
    the level above (checked when the forecast runs).
    """

    upper_levels: tuple[str, ...] = Field((), description="levels above the parent, bottom to top; [] = none")

    @field_validator("upper_levels")
    @classmethod
    def _order(cls, v: tuple[str, ...]) -> tuple[str, ...]:
        if len(set(v)) != len(v):
            raise ValueError(f"a level may be listed once, got {list(v)}")
        if LEVEL_TOTAL in v[:-1]:
            raise ValueError(f"'{LEVEL_TOTAL}' holds everything of the class, so it can only be the last level")
        if GROUP_PRODUCT in v[1:]:
            raise ValueError(f"'{GROUP_PRODUCT}' (the product across its sites) can only be the first level")
        if any(not name or not name.replace("_", "").isalnum() for name in v):
            raise ValueError(f"level names are 'product', 'total' or a products column name, got {list(v)}")
        return v


SEASONALITY_CHOICES = (AUTO,) + tuple(s.value for s in Seasonality)
