"""History as a backtest origin would have seen it: the raw history before the origin, cleaned from it alone.

The cycle cleans its history once with a centred outlier window
(`pipelines.stages.cleaned_history`), which near a backtest origin looks up to
half a window past it: a backtest on that history knows part of the future it
forecasts. Here, at each origin, each leaf's raw quantities before the origin
(returns netted, negatives at 0: `cleaned_history.raw_quantity`) are cleaned
again by the class's outlier rule on that truncated history only, so the
centred window is cut at the origin and the seasonal component (for
`seasonal_adjust: auto`) is estimated from the same periods.

The lifecycle history (successor remapping, copied reference history) is kept
as it is; a leaf period made of several lifecycle rows (own and successor
history) is cleaned as one value, and each row gets its part of the cleaned
value in proportion to its raw quantity. Shortage periods are not judged, as
in the cycle. Series are laid out from their first row to the origin; cells
without a row are not judged (NaN), as outside a span in the cycle.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.config_sections import OutlierConfig
from pipelines.engines.outliers import judge_outliers, seasonal_component
from pipelines.keys import LEAF


@dataclass(frozen=True)
class ClassCleaning:
    """One class's outlier rule and whether its seasonal component is taken out first."""

    rule: OutlierConfig
    seasonal: bool


def raw_quantities(history: pd.DataFrame, cleaned: pd.DataFrame) -> np.ndarray:
    """Per lifecycle history row: the raw quantity it was recorded with (negatives at 0; NaN where not found).

    Rows are matched on their source leaf (source_product, site, source_customer) and period.
    """
    raw = cleaned[LEAF + ["period_start"]].copy()
    raw["raw"] = np.clip(cleaned["raw_quantity"].to_numpy(float), 0, None)
    keys = history[["source_product", "site", "source_customer", "period_start"]].rename(
        columns={"source_product": "product", "source_customer": "customer"}
    )
    return keys.merge(raw, on=LEAF + ["period_start"], how="left")["raw"].to_numpy(float)


def clean_before(
    code: np.ndarray,
    ords: np.ndarray,
    raw: np.ndarray,
    shortage: np.ndarray,
    series_class: np.ndarray,
    rules: Mapping[str, ClassCleaning],
    origin: int,
    season: int,
) -> np.ndarray:
    """Per row (aligned with `code`): its quantity after cleaning the history before `origin` alone.

    code: series code per row; ords: period ordinal; raw: raw quantity (NaN
    counts as 0); shortage: the row's period is a recorded shortage (not
    judged); series_class: product class per series code; rules: class ->
    ClassCleaning. Rows at or after `origin` keep their raw quantity.
    """
    out = np.nan_to_num(np.asarray(raw, dtype=float))
    before = ords < origin
    if not before.any():
        return out
    first = int(ords[before].min())
    t = origin - first
    n = len(series_class)
    cell = code[before] * t + (ords[before] - first)
    total = np.bincount(cell, weights=out[before], minlength=n * t).reshape(n, t)
    has = np.bincount(cell, minlength=n * t).reshape(n, t) > 0
    skip = np.bincount(cell, weights=shortage[before].astype(float), minlength=n * t).reshape(n, t) > 0
    x = np.where(has, total, np.nan)
    cleaned = x.copy()
    for name, how in rules.items():  # a few classes, not a loop over series
        rows = np.flatnonzero(series_class == name)
        if how.rule.rule == "none" or not len(rows):
            continue
        xs = x[rows]
        if how.seasonal and how.rule.seasonal_adjust == "auto":
            s, _, _ = seasonal_component(xs, season, exclude=skip[rows])
        else:
            s = np.zeros_like(xs)
        judged = judge_outliers(np.where(skip[rows], np.nan, xs - s), how.rule, s)
        cleaned[rows] = np.where(judged.flagged, judged.replacement, xs)
    ratio = np.divide(cleaned, x, out=np.zeros_like(x), where=np.isfinite(x) & (x > 0))
    out[before] = out[before] * ratio.reshape(-1)[cell]
    return out
