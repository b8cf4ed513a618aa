"""What the share engine reads: a small `ShareSettings` with one `ShareRule` per product class.

A named share basis runs the same engine with its own rule in place of the
classes' (`ShareSettings.with_rule`), without a copied config.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, replace

from pipelines.config_sections import DEFAULT_SEASONAL_YEARS
from pipelines.engines.models import ModelSettings
from pipelines.vocabulary import AUTO, ShortageRule


@dataclass(frozen=True)
class ShareRule:
    """How one product class (or one named share basis) computes history shares."""

    window: int
    method: str = "pooled"
    fallback_windows: tuple[int, ...] = ()
    smoothing: float | None = None
    years: int = DEFAULT_SEASONAL_YEARS
    band: int = 0

    @classmethod
    def of(cls, section, smoothing: float | None = None) -> ShareRule:
        """From a `ProductClassConfig` or a `ShareBasisConfig`; `window: auto` is held as window 0 until tuned.

        smoothing: alpha of the smoothed candidate of `method: auto` when the section gives none.
        """
        own = getattr(section, "smoothing", None)
        return cls(
            window=0 if section.window == AUTO else section.window,
            method=section.method,
            fallback_windows=tuple(section.fallback_windows),
            smoothing=own if own is not None else smoothing,  # alpha for a smoothed candidate
            years=getattr(section, "years", DEFAULT_SEASONAL_YEARS),
            band=getattr(section, "band", 0),
        )

    @property
    def tuned(self) -> bool:
        """Whether window and method are known (not `auto` waiting for the backtest's share tuning)."""
        return self.window > 0 and self.method != AUTO

    def with_choice(self, window: int, method: str) -> ShareRule:
        """The rule with a tuned window and method; fallback windows not longer than the window are dropped."""
        return replace(self, window=window, method=method, fallback_windows=tuple(w for w in self.fallback_windows
                                                                                   if w > window))


@dataclass(frozen=True)
class ShareSettings:
    """What the share engine reads: calendar, lifecycle thresholds, shortage rule, a rule per product class."""

    period: str
    horizon: int
    min_history_periods: int
    reference_scale: float
    exclude_shortages: bool
    rules: Mapping[str, ShareRule]
    # the per-period method `forecast_proportions` forecasts the children with their class's models
    models: ModelSettings = field(default_factory=lambda: ModelSettings(period="week", choices={}))

    @classmethod
    def of(cls, config) -> ShareSettings:
        """From a planning config (every class it holds); a ShareSettings is returned as it is."""
        if isinstance(config, ShareSettings):
            return config
        return cls(
            period=config.calendar.period,
            horizon=config.calendar.horizon,
            min_history_periods=config.lifecycle.min_history_periods,
            reference_scale=config.lifecycle.reference_scale,
            exclude_shortages=config.cleansing.shortages == ShortageRule.EXCLUDE,
            rules={name: ShareRule.of(pc, config.selection.share_tuning.smoothing)
                   for name, pc in config.product_classes.items()},
            models=ModelSettings.of(config),
        )

    def rule(self, name: str) -> ShareRule:
        """The share rule of class `name`; an error when its window or method is `auto` and not yet tuned."""
        rule = self.rules[name]
        if not rule.tuned:
            raise ValueError(
                f"product class {name!r} has window or method auto, but no share_tuning choice was given; the share "
                "tables of such a class follow the backtest's share_tuning table (run backtest_accuracy first)"
            )
        return rule

    def with_rules(self, chosen: Mapping[str, ShareRule]) -> ShareSettings:
        """The same settings with the classes of `chosen` following those rules (the share tuning's choice)."""
        return replace(self, rules={**self.rules, **chosen})

    def with_rule(self, rule: ShareRule) -> ShareSettings:
        """The same settings with `rule` in place of every class's own (a named share basis)."""
        return replace(self, rules={name: rule for name in self.rules})
