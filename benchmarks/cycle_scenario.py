"""The synthetic hierarchy of the cycle benchmark: a seeded generator of history, master data and planner input.

`generate(n_leaves, seed, periods)` builds N leaf series (product x site x
customer, 5-15 customers per product x site, three product classes) with
`periods` weeks of history: smooth and intermittent series, seasonal ones in
one class, late starters, phased-out customers, new customers with a reference
customer, retired products with a successor, outliers, split lines, returns (a
few that outweigh the week), exact duplicate lines, a few bad lines and
recorded supply shortages, and the planner input of the plan's measures.
`make_config` gives the three classes a config like config/planning.yaml's.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pipelines.config import PlanningConfig, parse_config
from pipelines.config_sections import ProductClassConfig

CLASSES = ("fast", "seasonal", "slow")
PREFIX = np.array(["FST-", "SEA-", "SLW-"])
CLASS_MIX = (0.5, 0.25, 0.25)
N_SITES = 16
CYCLE_DATE = np.datetime64("2026-11-30", "D")  # a Monday: the first period of the horizon


# =================================================================== generator
@dataclass
class Scenario:
    raw: pd.DataFrame | None  # None with --csv (the lines are in `folder`)
    folder: Path | None
    lines: int
    products: pd.DataFrame
    spans: pd.DataFrame
    shortages: pd.DataFrame
    adjustments: pd.DataFrame
    pins: pd.DataFrame
    facts: dict[str, Any]


def _codes(prefix: str | np.ndarray, n: int, width: int) -> np.ndarray:
    """Codes prefix + zero-padded number, as an object array of str (vectorised)."""
    return np.char.add(prefix, np.char.zfill(np.arange(n).astype(str), width)).astype(object)


def _layout(rng: np.random.Generator, n_leaves: int) -> dict[str, np.ndarray]:
    """Products, their sites (parents) and customers (leaves), cut to exactly n_leaves leaves.

    Every few hundredth pair of products (even i, i + 1) is a retired product and
    its successor, sold at the same sites to the same customers.
    """
    n_customers = max(60, n_leaves // 40)
    estimate = n_leaves // 25 + 8
    while True:  # a retry with more products, not a loop over series
        n_prod = estimate
        idx = np.arange(n_prod)
        pclass = rng.choice(3, size=n_prod, p=CLASS_MIX)
        n_sites = rng.integers(1, 5, n_prod)
        site_base = rng.integers(0, N_SITES, n_prod)
        retired = (idx % 2 == 0) & (idx + 1 < n_prod) & (rng.random(n_prod) < 0.02)
        r = np.flatnonzero(retired)
        s = r + 1
        pclass[s], n_sites[s], site_base[s] = pclass[r], n_sites[r], site_base[r]
        p_start = np.concatenate([[0], np.cumsum(n_sites)[:-1]])
        n_par = int(n_sites.sum())
        par_prod = np.repeat(idx, n_sites)
        par_slot = np.arange(n_par) - p_start[par_prod]
        par_site = (site_base[par_prod] + par_slot) % N_SITES
        counts = rng.integers(5, 16, n_par)
        cust_off = rng.integers(0, n_customers, n_par)
        src_prod = idx.copy()
        src_prod[s] = r
        src_par = p_start[src_prod[par_prod]] + par_slot  # a successor's parents copy the retired product's
        counts, cust_off = counts[src_par], cust_off[src_par]
        if counts.sum() >= n_leaves:
            break
        estimate *= 2
    l_start = np.concatenate([[0], np.cumsum(counts)[:-1]])
    leaf_par = np.repeat(np.arange(n_par), counts)[:n_leaves]
    leaf_slot = np.arange(n_leaves) - l_start[leaf_par]
    leaf_cust = (cust_off[leaf_par] + leaf_slot) % n_customers
    used_prod = int(par_prod[leaf_par[-1]]) + 1
    successor = np.full(used_prod, -1)
    keep_r = r[s < used_prod]
    successor[keep_r] = keep_r + 1
    return {
        "n_customers": np.array(n_customers),
        "pclass": pclass[:used_prod],
        "successor": successor,
        "par_prod": par_prod,
        "par_site": par_site,
        "l_start": l_start,
        "leaf_par": leaf_par,
        "leaf_slot": leaf_slot,
        "leaf_cust": leaf_cust,
    }


def generate(n_leaves: int, seed: int, periods: int, csv_folder: Path | None = None, horizon: int = 26) -> Scenario:
    rng = np.random.default_rng(seed)
    P = periods
    first_week = CYCLE_DATE - np.timedelta64(7 * P, "D")
    lay = _layout(rng, n_leaves)
    n = n_leaves
    leaf_prod = lay["par_prod"][lay["leaf_par"]]
    pclass = lay["pclass"]
    successor = lay["successor"]
    cls = pclass[leaf_prod]
    n_prod = len(pclass)

    # --- lifecycle per leaf: active weeks [start_w, end_w)
    start_w = np.zeros(n, dtype=np.int64)
    end_w = np.full(n, P, dtype=np.int64)
    span_from = np.full(n, None, dtype=object)
    span_to = np.full(n, None, dtype=object)
    reference = np.full(n, None, dtype=object)
    late = rng.random(n) < 0.04
    start_w[late] = rng.integers(13, max(14, P - 26), late.sum())
    phased = ~late & (rng.random(n) < 0.02)
    end_w[phased] = rng.integers(P // 3, max(P // 3 + 1, P - 4), phased.sum())
    new = ~late & ~phased & (lay["leaf_slot"] > 0) & (rng.random(n) < 0.01)
    start_w[new] = max(0, P - 6)
    is_retired = np.isin(leaf_prod, np.flatnonzero(successor >= 0))
    is_successor = np.isin(leaf_prod, successor[successor >= 0])
    end_w[is_retired] = np.minimum(end_w[is_retired], max(1, P - 40))
    start_w[is_successor] = np.maximum(start_w[is_successor], max(0, P - 44))
    week_day = first_week + 7 * np.arange(P + 1).astype("timedelta64[D]")
    span_from[late | new] = np.datetime_as_string(week_day[start_w[late | new]], unit="D")
    span_to[phased] = np.datetime_as_string(week_day[end_w[phased]] - np.timedelta64(1, "D"), unit="D")
    # lifecycle inside the horizon: spans ending during it, customers starting during it (no history yet)
    plain = ~late & ~phased & ~new & ~is_retired & ~is_successor
    ends_in_horizon = plain & (rng.random(n) < 0.01)
    end_day = CYCLE_DATE + (7 * rng.integers(3, 21, n)).astype("timedelta64[D]") - np.timedelta64(1, "D")
    span_to[ends_in_horizon] = np.datetime_as_string(end_day[ends_in_horizon], unit="D")
    future = plain & ~ends_in_horizon & (lay["leaf_slot"] > 0) & (rng.random(n) < 0.005)
    start_w[future] = P  # no history before the cycle date
    start_day = CYCLE_DATE + (7 * rng.integers(2, 20, n)).astype("timedelta64[D]")
    span_from[future] = np.datetime_as_string(start_day[future], unit="D")
    by_reference = new | (future & (rng.random(n) < 0.5))
    initial_share = np.full(n, None, dtype=object)
    initial_share[future & ~by_reference] = "0.05"
    scale = np.full(n, None, dtype=object)
    scale[by_reference & (rng.random(n) < 0.3)] = "0.8"

    # --- demand parameters, as whole columns
    u = rng.random(n)
    intermittent = np.select([cls == 0, cls == 1], [u < 0.15, u < 0.2], u < 0.8)
    level = np.where(cls == 2, rng.lognormal(np.log(4.0), 0.5, n), rng.lognormal(np.log(25.0), 0.9, n)).clip(
        1.0, 2000.0
    )
    p_occ = rng.uniform(0.04, 0.45, n)
    size = rng.uniform(0.5, 6.0, n)
    growth = rng.uniform(-0.25, 0.3, n)
    amplitude = np.select([cls == 1, cls == 0], [rng.uniform(0.8, 1.6, n), rng.uniform(0.0, 0.2, n)], 0.0)
    peak = rng.uniform(0, 52, n)
    noise_k = rng.uniform(5.0, 25.0, n)
    weekday = rng.integers(0, 5, n)

    # --- weekly quantities, chunks of leaves to bound memory (not a loop over series)
    weeks = np.arange(P)
    chunk = max(1, 4_000_000 // P)
    parts = []
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        m = b - a
        phase = 2 * np.pi * (weeks[None, :] - peak[a:b, None]) / 52.0
        season = np.where(
            (cls[a:b] == 1)[:, None],
            np.exp(amplitude[a:b, None] * np.cos(phase)),
            1.0 + amplitude[a:b, None] * np.cos(phase),
        )
        season /= season.mean(axis=1, keepdims=True)
        mu = level[a:b, None] * season * (1.0 + growth[a:b, None]) ** (weeks[None, :] / 52.0)
        k = noise_k[a:b, None]
        smooth_q = rng.poisson(mu * rng.gamma(k, 1.0 / k, size=(m, P)))
        sparse_q = (rng.random((m, P)) < p_occ[a:b, None]) * (1 + rng.poisson(size[a:b, None], size=(m, P)))
        q = np.where(intermittent[a:b, None], sparse_q, smooth_q)
        q *= (weeks[None, :] >= start_w[a:b, None]) & (weeks[None, :] < end_w[a:b, None])
        spike = ~intermittent[a:b, None] & (rng.random((m, P)) < 0.0005)
        q = np.where(spike, q * rng.integers(6, 11, size=(m, P)), q)
        li, wi = np.nonzero(q > 0)
        parts.append((li + a, wi, q[li, wi]))
    leaf = np.concatenate([p[0] for p in parts]).astype(np.int64)
    week = np.concatenate([p[1] for p in parts]).astype(np.int64)
    qty = np.concatenate([p[2] for p in parts]).astype(np.int64)
    del parts

    # --- lines: usual weekday, split weeks, returns, duplicates, stray lines after a span
    L = len(leaf)
    day = np.where(rng.random(L) < 0.8, weekday[leaf], rng.integers(0, 6, L))
    split = (qty >= 6) & (rng.random(L) < 0.025)
    first_part = np.floor(qty[split] * rng.uniform(0.2, 0.8, split.sum())).astype(np.int64)
    ret = ~split & (qty >= 10) & (rng.random(L) < 0.001)
    big = rng.random(ret.sum()) < 0.1
    ret_qty = np.where(
        big,
        np.rint(qty[ret] * rng.uniform(1.3, 1.8, ret.sum())),
        np.maximum(1, np.rint(qty[ret] * rng.uniform(0.05, 0.4, ret.sum()))),
    )
    dup = ~split & ~ret & (rng.random(L) < 0.0005)
    stray = phased & (end_w < P) & (rng.random(n) < 0.3)
    stray_leaf = np.flatnonzero(stray)
    stray_week = rng.integers(end_w[stray], P)
    q_main = qty.copy()
    q_main[split] = first_part
    leaf = np.concatenate([leaf, leaf[split], leaf[ret], leaf[dup], stray_leaf])
    week = np.concatenate([week, week[split], week[ret], week[dup], stray_week])
    day = np.concatenate(
        [
            day,
            (day[split] + rng.integers(1, 6, split.sum())) % 6,
            (day[ret] + rng.integers(1, 6, ret.sum())) % 6,
            day[dup],
            rng.integers(0, 5, len(stray_leaf)),
        ]
    )
    qty = np.concatenate(
        [q_main, qty[split] - first_part, -ret_qty.astype(np.int64), q_main[dup], 1 + rng.poisson(level[stray_leaf])]
    )

    # --- files by calendar year, each sorted by leaf and date, rows numbered from 1
    date_idx = week * 7 + day
    all_days = first_week + np.arange(7 * P).astype("timedelta64[D]")
    year = all_days.astype("datetime64[Y]").astype(np.int64) + 1970
    file_year = year[date_idx]
    order = np.lexsort((date_idx, leaf, file_year))
    leaf, date_idx, qty, file_year = leaf[order], date_idx[order], qty[order], file_year[order]
    years, file_start, file_code = np.unique(file_year, return_index=True, return_inverse=True)
    source_row = np.arange(len(leaf)) - file_start[file_code] + 1
    file_names = np.char.add(np.char.add("history_", years.astype(str)), ".csv").astype(object)

    prod_code = np.char.add(PREFIX[pclass], np.char.zfill(np.arange(n_prod).astype(str), 6)).astype(object)
    site_code = _codes("SITE-", N_SITES, 2)
    cust_code = _codes("C", int(lay["n_customers"]) + 1, 6)
    leaf_site = lay["par_site"][lay["leaf_par"]]
    day_text = np.datetime_as_string(all_days, unit="D").astype(object)
    q_values, q_inverse = np.unique(qty, return_inverse=True)
    q_text = q_values.astype(str).astype(object)

    # bad lines, a few of each rejection reason, appended to the last file
    n_bad = max(1, n // 5000)
    pick = rng.integers(0, n, n_bad)
    g_prod, g_site, g_cust = prod_code[leaf_prod[pick]], site_code[leaf_site[pick]], cust_code[lay["leaf_cust"][pick]]
    g_date = day_text[rng.integers(0, 7 * P, n_bad)]

    def text(value: str) -> np.ndarray:
        return np.full(n_bad, value, dtype=object)

    bad = {  # missing_key, bad_date, bad_quantity, unknown_product, no_customer_span
        "product": np.concatenate([g_prod, g_prod, g_prod, text("ZZZ-999999"), g_prod]),
        "site": np.concatenate([g_site] * 5),
        "customer": np.concatenate([text(""), g_cust, g_cust, g_cust, text("X999999")]),
        "period_start": np.concatenate([g_date, text("2026-13-45"), g_date, g_date, g_date]),
        "quantity": np.concatenate([text("5"), text("5"), text("abc"), text("5"), text("5")]),
    }
    n_bad_lines = 5 * n_bad
    last_file = file_code[-1] if len(file_code) else 0
    last_row = int(source_row[-1]) if len(source_row) else 0
    columns = {
        "source_file": np.concatenate(
            [file_names[file_code], np.full(n_bad_lines, file_names[last_file], dtype=object)]
        ),
        "source_row": np.concatenate([source_row, last_row + 1 + np.arange(n_bad_lines)]).astype(np.int64),
    }
    del file_code, source_row
    columns["product"] = np.concatenate([prod_code[leaf_prod[leaf]], bad["product"]])
    columns["site"] = np.concatenate([site_code[leaf_site[leaf]], bad["site"]])
    columns["customer"] = np.concatenate([cust_code[lay["leaf_cust"][leaf]], bad["customer"]])
    del leaf
    columns["period_start"] = np.concatenate([day_text[date_idx], bad["period_start"]])
    del date_idx
    columns["quantity"] = np.concatenate([q_text[q_inverse], bad["quantity"]])
    del q_inverse
    lines = pd.DataFrame(columns)
    del columns

    # --- master data, every cell text or None as the loaders deliver it
    n_succ = int((successor >= 0).sum())
    p_from = np.full(n_prod, None, dtype=object)
    p_to = np.full(n_prod, None, dtype=object)
    p_succ = np.full(n_prod, None, dtype=object)
    r_idx = np.flatnonzero(successor >= 0)
    p_to[r_idx] = str(week_day[max(1, P - 40)] - np.timedelta64(1, "D"))
    p_from[successor[r_idx]] = str(week_day[max(0, P - 44)])
    p_succ[r_idx] = prod_code[successor[r_idx]]
    products = pd.DataFrame(
        {
            "product": prod_code,
            "product_class": np.array(CLASSES, dtype=object)[pclass],
            "active_from": p_from,
            "active_to": p_to,
            "successor": p_succ,
        }
    )
    reference[by_reference] = cust_code[lay["leaf_cust"][lay["l_start"][lay["leaf_par"][by_reference]]]]
    spans = pd.DataFrame(
        {
            "product": prod_code[leaf_prod],
            "site": site_code[leaf_site],
            "customer": cust_code[lay["leaf_cust"]],
            "active_from": span_from,
            "active_to": span_to,
            "reference_customer": reference,
            "scale": scale,
            "initial_share": initial_share,
        }
    )
    # recorded supply shortages: ~2 % of product x site, 1-4 consecutive weeks each, any day of the week
    n_par = int(lay["leaf_par"][-1]) + 1
    short_par = np.flatnonzero(rng.random(n_par) < 0.02)
    short_len = rng.integers(1, 5, len(short_par))
    short_start = rng.integers(0, max(1, P - 4), len(short_par))
    sp = np.repeat(short_par, short_len)
    sw = np.repeat(short_start, short_len) + (
        np.arange(len(sp)) - np.repeat(np.cumsum(short_len) - short_len, short_len)
    )
    shortages = pd.DataFrame(
        {
            "product": prod_code[lay["par_prod"][sp]],
            "site": site_code[lay["par_site"][sp]],
            "period_start": np.datetime_as_string(
                week_day[sw] + rng.integers(0, 7, len(sp)).astype("timedelta64[D]"), unit="D"
            ).astype(object),
        }
    )
    # planner input of plan_measures, drawn last so the history above does not depend on it
    safe = plain & ~ends_in_horizon & ~future  # active in every horizon period: pins land on them
    adjustments, pins = _plan_inputs(rng, lay, n_par, successor, safe, prod_code, site_code, cust_code, horizon)
    facts = {
        "leaves": n,
        "parents": int(lay["leaf_par"][-1]) + 1,
        "products": n_prod,
        "customers_pool": int(lay["n_customers"]),
        "lines": len(lines),
        "intermittent_leaves": int(intermittent.sum()),
        "late_starters": int(late.sum()),
        "phased_out": int(phased.sum()),
        "new_with_reference": int(new.sum()),
        "ending_in_horizon": int(ends_in_horizon.sum()),
        "starting_in_horizon": int(future.sum()),
        "retired_products": n_succ,
        "split_weeks": int(split.sum()),
        "return_lines": int(ret.sum()),
        "duplicate_lines": int(dup.sum()),
        "bad_lines": n_bad_lines,
        "shortage_records": len(shortages),
        "adjustment_rows": len(adjustments),
        "pins": len(pins),
    }
    master = {
        "products": products,
        "spans": spans,
        "shortages": shortages,
        "adjustments": adjustments,
        "pins": pins,
        "facts": facts,
    }
    if csv_folder is None:
        return Scenario(raw=lines, folder=None, lines=len(lines), **master)
    csv_folder.mkdir(parents=True, exist_ok=True)
    for name, part in lines.groupby("source_file", sort=True):
        part.drop(columns=["source_file", "source_row"]).to_csv(csv_folder / name, index=False, lineterminator="\n")
    return Scenario(raw=None, folder=csv_folder, lines=len(lines), **master)


ADJUSTED_SHARE = 0.03  # of parent x horizon weeks, per additive measure


def _plan_inputs(
    rng: np.random.Generator,
    lay: dict[str, np.ndarray],
    n_par: int,
    successor: np.ndarray,
    safe: np.ndarray,
    prod_code: np.ndarray,
    site_code: np.ndarray,
    cust_code: np.ndarray,
    horizon: int,
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
    week = (CYCLE_DATE + 7 * np.arange(H).astype("timedelta64[D]")).astype("datetime64[D]")
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


def make_config(
    periods: int,
    horizon: int,
    seasonal: bool,
    leaf_grain: str | None,
    shortage_rule: str | None = None,
    seasonal_model: str = "auto_ets",
    class_outliers: bool = True,
    share_method: str | None = None,
    n_jobs: int = 1,
) -> PlanningConfig:
    """Three classes like config/planning.yaml, at fixed grains (no backtest), non-seasonal unless `seasonal`.

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
    if n_jobs != 1:
        data["execution"] = {"n_jobs": n_jobs}
    if shortage_rule:
        data["cleansing"] = {"shortages": shortage_rule}
    if "measures" in PlanningConfig.model_fields:
        data["share_bases"] = {"promotions_52w": {**windows(52, [104]), "method": "pooled"}}
        data["measures"] = MEASURES
        data["pins"] = {"on_overflow": "warn"}
    return parse_config(data)


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
