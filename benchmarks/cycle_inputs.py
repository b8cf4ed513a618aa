"""The cycle benchmark's planner input and config: adjustments and pins for the scenario, three classes' config.

`plan_inputs` draws the adjustments and pins of the plan's measures for the
hierarchy `benchmarks/cycle_scenario.py` generates; `make_config` gives its
three classes a config like config/planning.yaml's.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from pipelines.config import PlanningConfig, parse_config
from pipelines.config_sections import ProductClassConfig

SHARE_METHODS = ("pooled", "mean_of_ratios", "smoothed", "seasonal", "children_forecast")
SMOOTHING = 0.1
MEASURES = {  # as config/planning.yaml has them
    "statistical_forecast": {
        "parent_values": "parent_forecast",
        "rule": "pro_rata",
        "basis": {"kind": "reinitialized_target"},
    },
    "list_price": {"rule": "replicate"},
    "promotion_uplift": {
        "rule": "pro_rata",
        "basis": {"kind": "share_table", "name": "promotions_52w"},
        "integer": {"pack_size": 1},
    },
    "planner_adjustment": {
        "rule": "pro_rata",
        "basis": {"kind": "measure", "name": "statistical_forecast"},
        "integer": {"pack_size": 5},
    },
}


ADJUSTED_SHARE = 0.03  # of parent x horizon weeks, per additive measure


def plan_inputs(
    rng: np.random.Generator,
    lay: dict[str, np.ndarray],
    n_par: int,
    successor: np.ndarray,
    safe: np.ndarray,
    prod_code: np.ndarray,
    site_code: np.ndarray,
    cust_code: np.ndarray,
    horizon: int,
    cycle_date: np.datetime64,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The adjustments and pins inputs, as the loaders deliver them (text dates, numeric values).

    Adjustments, at product x site per horizon week, on the parents of products
    that are not retired: `list_price` on every parent and week (one price per
    product, a tenth of the products changing it once in the horizon);
    `promotion_uplift` (10-400 units) and `planner_adjustment` (-60 to 300
    units, not multiples of its pack of 5) on ADJUSTED_SHARE of parent x weeks
    each. Pins: a handful per measure (max(4, leaves / 10,000)) on leaves
    active in the whole horizon, dated on a Wednesday inside the week: list
    price 5 % under the parent's, statistical forecast 1 unit, and on parents
    with a positive adjustment of that week 1 unit of promotion_uplift / one
    pack (5) of planner_adjustment.
    """
    H = horizon
    week = (cycle_date + 7 * np.arange(H).astype("timedelta64[D]")).astype("datetime64[D]")
    week_text = np.datetime_as_string(week, unit="D").astype(object)
    par_prod = lay["par_prod"][:n_par]
    live = successor[par_prod] < 0  # a retired product's parents get no plan input
    par = np.flatnonzero(live)
    n_prod = len(successor)
    price = np.round(rng.uniform(2.0, 80.0, n_prod), 2)
    changes = rng.random(n_prod) < 0.1
    change_week = rng.integers(1, max(2, H), n_prod)
    new_price = np.round(price * rng.uniform(0.85, 1.1, n_prod), 2)
    p_par, p_week = np.repeat(par, H), np.tile(np.arange(H), len(par))
    pp = par_prod[p_par]
    p_value = np.where(changes[pp] & (p_week >= change_week[pp]), new_price[pp], price[pp])
    cells = len(par) * H
    picked = {}
    for name, low, high in (("promotion_uplift", 10, 401), ("planner_adjustment", -60, 301)):  # two measures
        cell = np.flatnonzero(rng.random(cells) < ADJUSTED_SHARE)
        picked[name] = (par[cell // H], cell % H, rng.integers(low, high, len(cell)).astype(float))
    parts = [("list_price", p_par, p_week, p_value), *[(k, *v) for k, v in picked.items()]]
    adjustments = pd.DataFrame(
        {
            "measure": np.concatenate([np.full(len(a), k, dtype=object) for k, a, _, _ in parts]),
            "product": prod_code[par_prod[np.concatenate([a for _, a, _, _ in parts])]],
            "site": site_code[lay["par_site"][np.concatenate([a for _, a, _, _ in parts])]],
            "period_start": week_text[np.concatenate([w for _, _, w, _ in parts])],
            "value": np.concatenate([v for _, _, _, v in parts]),
        }
    )

    # pins: the first leaf of a parent that is active in the whole horizon
    leaf_par = lay["leaf_par"]
    ok = np.flatnonzero(safe & live[leaf_par])
    first_safe = np.full(n_par, -1)
    first_safe[leaf_par[ok][::-1]] = ok[::-1]
    k = max(4, len(leaf_par) // 10_000)
    pin_rows = []
    with_leaf = np.flatnonzero(first_safe >= 0)
    for name in ("list_price", "statistical_forecast"):  # per measure: leaf, week, value
        if not len(with_leaf):
            break
        pick = rng.choice(with_leaf, size=min(k, len(with_leaf)), replace=False)
        w = rng.integers(0, H, len(pick))
        pp = par_prod[pick]
        value = (
            np.round(np.where(changes[pp] & (w >= change_week[pp]), new_price[pp], price[pp]) * 0.95, 2)
            if name == "list_price"
            else np.ones(len(pick))
        )
        pin_rows.append((name, first_safe[pick], w, value))
    for name, pin in (("promotion_uplift", 1.0), ("planner_adjustment", 5.0)):
        a_par, a_week, a_value = picked[name]
        cand = np.flatnonzero((a_value >= 20) & (first_safe[a_par] >= 0))
        pick = rng.choice(cand, size=min(k, len(cand)), replace=False) if len(cand) else cand
        pin_rows.append((name, first_safe[a_par[pick]], a_week[pick], np.full(len(pick), pin)))
    leaf = np.concatenate([r[1] for r in pin_rows]).astype(np.int64)
    pin_day = week[np.concatenate([r[2] for r in pin_rows]).astype(np.int64)] + np.timedelta64(2, "D")  # a Wednesday
    pins = pd.DataFrame(
        {
            "product": prod_code[par_prod[leaf_par[leaf]]],
            "site": site_code[lay["par_site"][leaf_par[leaf]]],
            "customer": cust_code[lay["leaf_cust"][leaf]],
            "period_start": np.datetime_as_string(pin_day, unit="D").astype(object),
            "measure": np.concatenate([np.full(len(r[1]), r[0], dtype=object) for r in pin_rows]),
            "value": np.concatenate([r[3] for r in pin_rows]).astype(float),
        }
    )
    return adjustments, pins


def make_config(*args, **kwargs) -> PlanningConfig:
    """The parsed config of `config_data(...)` (same arguments)."""
    return parse_config(config_data(*args, **kwargs))


def config_data(
    periods: int,
    horizon: int,
    seasonal: bool,
    leaf_grain: str | None,
    shortage_rule: str | None = None,
    seasonal_model: str = "auto_ets",
    class_outliers: bool = True,
    share_method: str | None = None,
    n_jobs: int = 1,
) -> dict[str, Any]:
    """The benchmark's config as a YAML file would hold it: three classes like config/planning.yaml, at fixed
    grains (no backtest), non-seasonal unless `seasonal`.

    With `class_outliers` (and a config that has them) the classes carry the
    shipped config's own outlier rules: Tukey (window 25, fence 3) on
    `seasonal`, none on `slow`, the Hampel default on `fast`. `share_method`
    sets every class's share method (smoothing 0.1 for `smoothed`; None keeps
    pooled / mean_of_ratios / pooled). The share basis and the measures are
    the shipped config's (`promotions_52w`; statistical_forecast, list_price,
    promotion_uplift, planner_adjustment), pins.on_overflow warn.
    """

    def windows(window: int, fallbacks: list[int]) -> dict:
        w = min(window, periods)
        return {"window": w, "fallback_windows": [f for f in fallbacks if f > w]}

    seasonal_models = {"seasonal": seasonal}
    if seasonal:
        seasonal_models.update(smooth=seasonal_model, erratic=seasonal_model)
    classes = {
        "fast": {**windows(26, [52, 104]), "method": "pooled"},
        "seasonal": {**windows(52, [104]), "method": "mean_of_ratios", "models": seasonal_models},
        "slow": {**windows(104, [156]), "method": "pooled", "models": {"smooth": "ses", "erratic": "ses"}},
    }
    if share_method:
        for pc in classes.values():
            pc["method"] = share_method
            if share_method == "smoothed":
                pc["smoothing"] = SMOOTHING
    if class_outliers and "outliers" in ProductClassConfig.model_fields:
        classes["seasonal"]["outliers"] = {
            "rule": "tukey",
            "window": 25,
            "fence": 3.0,
            "replace_with": "limit",
            "sides": "upper",
        }
        classes["slow"]["outliers"] = {"rule": "none"}
    if leaf_grain:
        classes[leaf_grain]["strategy"] = "bottom_up"
    data: dict[str, Any] = {"calendar": {"horizon": horizon}, "product_classes": classes}
    data["models"] = {"n_jobs": n_jobs}
    if shortage_rule:
        data["cleansing"] = {"shortages": shortage_rule}
    if "measures" in PlanningConfig.model_fields:
        data["share_bases"] = {"promotions_52w": {**windows(52, [104]), "method": "pooled"}}
        data["measures"] = MEASURES
        data["pins"] = {"on_overflow": "warn"}
    return data
