"""Time and size every stage of the weekly cycle on a synthetic hierarchy.

    .venv/bin/python benchmarks/cycle.py --leaves 10000 [--seed 7] [--periods 156] [--horizon 26]
        [--stages raw,clean,lifecycle,shares,target,forecast,reconcile,plan,drift,report] [--seasonal]
        [--leaf-grain CLASS] [--share-method pooled|mean_of_ratios|smoothed|seasonal|forecast_proportions]
        [--shortage-rule exclude|fill_baseline] [--no-shortages] [--csv]
        [--store [PATH]] [--no-validate] [--trace rerun|inline|off] [--no-warmup]
        [--rss-sample-ms MS] [--json PATH]

A seeded generator builds N leaf series (product x site x customer, 5-15
customers per product x site, three product classes) with `--periods` weeks of
history: smooth and intermittent series, seasonal ones in one class, late
starters, phased-out customers, new customers with a reference customer,
retired products with a successor, outliers, split lines, returns (a few that
outweigh the week), exact duplicate lines, a few bad lines and recorded supply
shortages (passed to `clean_history`), and the planner input of the plan's
measures: a list price on every parent and week, promotion uplifts and
planner adjustments on a few percent of parent x weeks, a handful of pins. The
lines are
raw text, as `load_raw_history` delivers them (`--csv` writes them to CSV files
in a temporary folder and times the real loader on them).

Then the pure stage functions run in the order of the asset graph, each stage
output validated with its pandera model as the assets do (`validate ...`
lines) and the assets' rule checks run (`checks ...` lines): after the
reconciliation the plan's measures (`share_basis_tables`, `plan_measures`,
with the measures of config/planning.yaml), the share drift against a share
table computed at the cycle date minus one period (outside the total: the
cycle reads it from the store) and one `parent_chart` and `share_chart` per
product class. `--share-method` sets every class's share method, so the
per-period methods' cost shows in the target step (`forecast_proportions`
forecasts every established child there with statsforecast). Columns:

    wall s    wall time of the step (untraced run)
    sf s      of that, time inside StatsForecast.forecast (wrapped in this process only);
              one `sf <model>` line per statsforecast call follows the forecast step
    py peak   tracemalloc peak of the step's own allocations (above what it was given),
              from a second, traced run of the step in a forked child process
    py out    what that run allocated and still held at its end (its output)
    rss       process RSS after the step
    rss pk    process RSS peak during the step (sampled every --rss-sample-ms)
    rss max   getrusage ru_maxrss: the process high-water mark so far
    rows in / rows out

Memory is measured without distorting the times (`--trace rerun`, the
default): each step runs once untraced in this process (wall time, RSS) and
once more under tracemalloc in a forked child (Python heap peak, output size),
so neither tracemalloc's slowdown nor a second copy of the output lands in the
parent's times or RSS. In the forecast step's traced rerun,
`StatsForecast.forecast` replays the results of the timed run, so `py peak`
is that of our code; the memory statsforecast (numba) needs itself shows in
the `rss pk` (sampled) and `rss max` (getrusage) columns.

Numba compiles the statsforecast models on their first call; a warm-up on a
tiny frame runs before the cycle and is reported on its own line (outside the
total) unless `--no-warmup` is given.

tracemalloc slows allocation-heavy Python code (pandas string columns, pandera)
three to ten times, which is why it is not on during the timed run (`--trace
inline` does one traced run instead; `--trace off` none).
"""

from __future__ import annotations

import argparse
import gc
import inspect
import json
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
import tracemalloc
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import statsforecast  # noqa: E402
from statsforecast import models as sfm  # noqa: E402

from pipelines import schemas as S  # noqa: E402
from pipelines.config import PlanningConfig, ProductClassConfig, parse_config  # noqa: E402
from pipelines.calendar import shift_periods  # noqa: E402
from pipelines.stages import reconciliation as rec  # noqa: E402
from pipelines.stages import report  # noqa: E402
from pipelines.stages.cleaned_history import clean_history, cycle_calendar, find_unexplained_changes, line_accounting  # noqa: E402
from pipelines.stages.lifecycle_history import active_children, apply_lifecycle  # noqa: E402
from pipelines.stages.plan_measures import find_pins_not_kept, find_sum_violations, plan_measures, plan_totals, share_basis_tables  # noqa: E402
from pipelines.stages.raw_history import load_raw_history  # noqa: E402
from pipelines.stages.reinitialized_target import parents_with_mix_change, reinitialize_target  # noqa: E402
from pipelines.stages.share_drift import drifted_beyond, share_drift  # noqa: E402
from pipelines.stages.share_tables import compute_shares, find_new_customers_without_share  # noqa: E402
from pipelines.stages import statistical_forecast as SF  # noqa: E402
from pipelines.stages.statistical_forecast import forecast_cycle, model_label  # noqa: E402

STAGES = ("raw", "clean", "lifecycle", "shares", "target", "forecast", "reconcile", "plan", "drift", "report")
CLASSES = ("fast", "seasonal", "slow")
PREFIX = np.array(["FST-", "SEA-", "SLW-"])
CLASS_MIX = (0.5, 0.25, 0.25)
N_SITES = 16
CYCLE_DATE = np.datetime64("2026-11-30", "D")  # a Monday: the first period of the horizon
MB = 1024 * 1024


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
    level = np.where(cls == 2, rng.lognormal(np.log(4.0), 0.5, n), rng.lognormal(np.log(25.0), 0.9, n)).clip(1.0, 2000.0)
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
        season = np.where((cls[a:b] == 1)[:, None], np.exp(amplitude[a:b, None] * np.cos(phase)), 1.0 + amplitude[a:b, None] * np.cos(phase))
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
    ret_qty = np.where(big, np.rint(qty[ret] * rng.uniform(1.3, 1.8, ret.sum())), np.maximum(1, np.rint(qty[ret] * rng.uniform(0.05, 0.4, ret.sum()))))
    dup = ~split & ~ret & (rng.random(L) < 0.0005)
    stray = phased & (end_w < P) & (rng.random(n) < 0.3)
    stray_leaf = np.flatnonzero(stray)
    stray_week = rng.integers(end_w[stray], P)
    q_main = qty.copy()
    q_main[split] = first_part
    leaf = np.concatenate([leaf, leaf[split], leaf[ret], leaf[dup], stray_leaf])
    week = np.concatenate([week, week[split], week[ret], week[dup], stray_week])
    day = np.concatenate([day, (day[split] + rng.integers(1, 6, split.sum())) % 6, (day[ret] + rng.integers(1, 6, ret.sum())) % 6, day[dup], rng.integers(0, 5, len(stray_leaf))])
    qty = np.concatenate([q_main, qty[split] - first_part, -ret_qty.astype(np.int64), q_main[dup], 1 + rng.poisson(level[stray_leaf])])

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
        "source_file": np.concatenate([file_names[file_code], np.full(n_bad_lines, file_names[last_file], dtype=object)]),
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
    products = pd.DataFrame({"product": prod_code, "product_class": np.array(CLASSES, dtype=object)[pclass], "active_from": p_from, "active_to": p_to, "successor": p_succ})
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
    sw = np.repeat(short_start, short_len) + (np.arange(len(sp)) - np.repeat(np.cumsum(short_len) - short_len, short_len))
    shortages = pd.DataFrame(
        {
            "product": prod_code[lay["par_prod"][sp]],
            "site": site_code[lay["par_site"][sp]],
            "period_start": np.datetime_as_string(week_day[sw] + rng.integers(0, 7, len(sp)).astype("timedelta64[D]"), unit="D").astype(object),
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
    master = {"products": products, "spans": spans, "shortages": shortages, "adjustments": adjustments, "pins": pins, "facts": facts}
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
        value = np.round(np.where(changes[pp] & (w >= change_week[pp]), new_price[pp], price[pp]) * 0.95, 2) if name == "list_price" else np.ones(len(pick))
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
        classes["seasonal"]["outliers"] = {"rule": "tukey", "window": 25, "fence": 3.0, "replace_with": "limit", "sides": "upper"}
        classes["slow"]["outliers"] = {"rule": "none"}
    if leaf_grain:
        classes[leaf_grain]["forecast_grain"] = "product_site_customer"
    data: dict[str, Any] = {"calendar": {"horizon": horizon}, "product_classes": classes}
    if shortage_rule:
        data["cleansing"] = {"shortages": shortage_rule}
    if "measures" in PlanningConfig.model_fields:
        data["share_bases"] = {"promotions_52w": {**windows(52, [104]), "method": "pooled"}}
        data["measures"] = MEASURES
        data["pins"] = {"on_overflow": "warn"}
    return parse_config(data)


SHARE_METHODS = ("pooled", "mean_of_ratios", "smoothed", "seasonal", "forecast_proportions")
SMOOTHING = 0.1
MEASURES = {  # as config/planning.yaml has them
    "statistical_forecast": {"parent_values": "parent_forecast", "rule": "pro_rata", "basis": {"kind": "reinitialized_target"}},
    "list_price": {"rule": "replicate"},
    "promotion_uplift": {"rule": "pro_rata", "basis": {"kind": "share_table", "name": "promotions_52w"}, "integer": {"pack_size": 1}},
    "planner_adjustment": {"rule": "pro_rata", "basis": {"kind": "measure", "name": "statistical_forecast"}, "integer": {"pack_size": 5}},
}


# =================================================================== measuring
@dataclass
class Step:
    stage: str
    wall_s: float  # untraced run
    sf_s: float | None  # of wall_s, inside StatsForecast.forecast
    py_peak_mb: float | None  # tracemalloc: peak of the step's own allocations
    py_out_mb: float | None  # tracemalloc: what the step allocated and still held at its end (its output)
    rss_mb: float  # process RSS after the step
    rss_peak_mb: float  # process RSS peak during the step (sampled every few ms)
    rss_max_mb: float  # getrusage ru_maxrss after the step (process high-water mark)
    rows_in: int | None
    rows_out: int | None
    note: str = ""
    in_total: bool = True
    traced_wall_s: float | None = None  # wall time of the tracemalloc run


@dataclass
class SfCall:
    model: str
    series: int
    rows: int
    seconds: float


class RssSampler:
    """Background thread keeping the highest RSS seen since `reset()`."""

    def __init__(self, interval: float = 0.01):
        self.interval = interval
        self.peak = 0.0
        self._stop = threading.Event()
        if interval > 0:
            threading.Thread(target=self._loop, daemon=True).start()

    def _loop(self) -> None:
        while not self._stop.wait(self.interval):
            self.peak = max(self.peak, rss_now_mb())

    def reset(self) -> None:
        self.peak = rss_now_mb()

    def read(self) -> float:
        return max(self.peak, rss_now_mb())


@dataclass
class Bench:
    trace: str  # "rerun", "inline" or "off"
    steps: list[Step] = field(default_factory=list)
    sf_calls: list[SfCall] = field(default_factory=list)
    sf_seconds: float = 0.0
    sf_outputs: list | None = None  # recorded StatsForecast.forecast results of the timed run
    sf_replay: list | None = None  # replayed, in call order, in the traced rerun
    sample_ms: float = 10.0
    sampler: RssSampler = field(init=False)

    def __post_init__(self) -> None:
        self.sampler = RssSampler(self.sample_ms / 1000)

    def _traced_rerun(self, fn: Callable[[], Any]) -> tuple[float | None, float | None, float | None]:
        """The step again under tracemalloc, with statsforecast results replayed; (peak MB, out MB, wall s)."""
        self.sf_replay = list(self.sf_outputs) if self.sf_outputs else None
        try:
            res = _rerun_in_child(fn) if hasattr(os, "fork") else _traced(fn)
        finally:
            self.sf_replay = None
        if "error" in res:
            print(f"    (traced rerun failed: {res['error']})", flush=True)
            return None, None, None
        return res["peak"], res["out"], res["wall"]

    def run(self, stage: str, fn: Callable[[], Any], rows_in: int | None = None, rows_out: Callable[[Any], int] | None = None,
            note: Callable[[Any], str] | None = None, in_total: bool = True, sf: bool = False, trace: bool = True) -> Any:
        """Run `fn` untraced for its time and RSS, then (trace = rerun) once more under tracemalloc for its heap peak."""
        gc.collect()
        inline = self.trace == "inline" and tracemalloc.is_tracing()
        start_mem = tracemalloc.get_traced_memory()[0] if inline else 0
        if inline:
            tracemalloc.reset_peak()
        self.sampler.reset()
        sf_before, calls_before = self.sf_seconds, len(self.sf_calls)
        rerun = self.trace == "rerun" and trace
        self.sf_outputs = [] if rerun and sf else None
        t0 = time.perf_counter()
        out = fn()
        wall = time.perf_counter() - t0
        rss_peak = self.sampler.read()
        py_peak = py_out = traced_wall = None
        if inline:
            cur, peak = tracemalloc.get_traced_memory()
            py_peak, py_out = max(0, peak - start_mem) / MB, max(0, cur - start_mem) / MB
        elif rerun:
            py_peak, py_out, traced_wall = self._traced_rerun(fn)
        self.sf_outputs = None
        step = Step(
            stage=stage,
            wall_s=wall,
            sf_s=(self.sf_seconds - sf_before) if sf else None,
            py_peak_mb=py_peak,
            py_out_mb=py_out,
            rss_mb=rss_now_mb(),
            rss_peak_mb=rss_peak,
            rss_max_mb=rss_max_mb(),
            rows_in=rows_in,
            rows_out=rows_out(out) if rows_out else None,
            note=note(out) if note else "",
            in_total=in_total,
            traced_wall_s=traced_wall,
        )
        self.steps.append(step)
        print(format_row(step), flush=True)
        if sf:
            for call in self.sf_calls[calls_before:]:
                print(format_sf(call), flush=True)
        return out


def _traced(fn: Callable[[], Any]) -> dict:
    gc.collect()
    tracemalloc.start()
    t1 = time.perf_counter()
    again = fn()
    wall = time.perf_counter() - t1
    cur, peak = tracemalloc.get_traced_memory()
    del again
    tracemalloc.stop()
    return {"peak": peak / MB, "out": cur / MB, "wall": wall}


def _rerun_in_child(fn: Callable[[], Any]) -> dict:
    """Run `fn` under tracemalloc in a forked child, so the parent's RSS and ru_maxrss stay the cycle's own."""
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:  # child: inherits every input copy-on-write
        code = 0
        try:
            os.close(r)
            payload = _traced(fn)
        except BaseException as err:  # report, never continue the cycle in the child
            payload, code = {"error": f"{type(err).__name__}: {err}"}, 1
        try:
            os.write(w, json.dumps(payload).encode())
        finally:
            os._exit(code)
    os.close(w)
    chunks = []
    while chunk := os.read(r, 65536):
        chunks.append(chunk)
    os.close(r)
    _, status = os.waitpid(pid, 0)
    if not chunks:
        return {"error": f"traced child ended without a result (wait status {status}; out of memory?)"}
    return json.loads(b"".join(chunks))


def rss_now_mb() -> float:
    try:
        pages = int(Path("/proc/self/statm").read_text().split()[1])
        return pages * resource.getpagesize() / MB
    except OSError:
        return float("nan")


def rss_max_mb() -> float:
    kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # kilobytes on Linux, bytes on macOS
    return kb / MB if sys.platform == "darwin" else kb / 1024


def patch_statsforecast(bench: Bench) -> None:
    """Time every StatsForecast fit / predict / forecast call (in this process only; project code untouched).

    `make_model` of the forecast stage is wrapped too, only to tag each model
    object with its config name and season for the `sf` lines. In the traced
    rerun each call replays the timed run's result and the object state it
    left (e.g. `fitted_` after `fit`), so statsforecast does not run twice.
    """
    original_make = SF.make_model

    def tagged(name, season, *args, **kwargs):
        model = original_make(name, season, *args, **kwargs)
        try:
            model._bench_label = model_label(name, int(season))
        except AttributeError:
            pass
        return model

    SF.make_model = tagged
    for method in ("fit", "predict", "forecast"):
        setattr(statsforecast.StatsForecast, method, _timed_method(bench, method, getattr(statsforecast.StatsForecast, method)))


def _timed_method(bench: Bench, method: str, original: Callable) -> Callable:
    df_position = {"fit": 0, "forecast": 1}.get(method)

    def timed(self, *args, **kwargs):
        if bench.sf_replay:  # traced rerun: the timed run's result and state, so the heap peak is our code's
            _, out, state = bench.sf_replay.pop(0)
            self.__dict__.update(state)
            return self if method == "fit" else out
        df = kwargs.get("df")
        if df is None and df_position is not None and len(args) > df_position:
            df = args[df_position]
        t0 = time.perf_counter()
        out = original(self, *args, **kwargs)
        seconds = time.perf_counter() - t0
        if bench.sf_outputs is not None:
            bench.sf_outputs.append((method, out, dict(self.__dict__)))
        bench.sf_seconds += seconds
        model = self.models[0]
        label = getattr(model, "_bench_label", None) or f"{type(model).__name__}/{getattr(model, 'season_length', 1)}"
        if df is not None:
            series, rows = int(df["unique_id"].nunique()), len(df)
        else:
            uids = getattr(self, "uids", None)
            series, rows = (len(uids) if uids is not None else 0), 0
        bench.sf_calls.append(SfCall(model=f"{label} {method}", series=series, rows=rows, seconds=seconds))
        return out

    return timed


def warm_up(config: PlanningConfig, horizon: int) -> None:
    """Compile each configured statsforecast model once on a tiny frame (numba JIT), by forecast and by fit/predict."""
    seen = set()
    for pc in config.product_classes.values():
        seasons = (1, 52) if pc.models.seasonal else (1,)
        for name in sorted({pc.models.smooth, pc.models.erratic, pc.models.intermittent, pc.models.lumpy}):
            for s in seasons:
                if (name, s) in seen:
                    continue
                seen.add((name, s))
                t = 2 * 52 + 8
                y = np.random.default_rng(0).poisson(5.0, size=2 * t).astype(float)
                df = pd.DataFrame({"unique_id": np.repeat([0, 1], t), "ds": np.tile(np.arange(t), 2), "y": y})
                sf = statsforecast.StatsForecast(models=[SF.make_model(name, s)], freq=1, n_jobs=1, fallback_model=sfm.Naive())
                sf.forecast(df=df, h=horizon)
                sf.fit(df=df)
                sf.predict(h=horizon)


# =================================================================== output
HEADER = (
    f"{'stage':<32} {'wall s':>8} {'sf s':>8} {'py peak':>8} {'py out':>8} {'rss':>7} {'rss pk':>7} {'rss max':>7} "
    f"{'rows in':>11} {'rows out':>11}  note"
)
UNITS = f"{'':<32} {'':>8} {'':>8} {'MB':>8} {'MB':>8} {'MB':>7} {'MB':>7} {'MB':>7}"


def _n(v: int | None) -> str:
    return "" if v is None else f"{v:,}"


def _mb(v: float | None) -> str:
    return "" if v is None else f"{v:.0f}"


def format_row(s: Step) -> str:
    sf = "" if s.sf_s is None else f"{s.sf_s:.2f}"
    return (
        f"{s.stage:<32} {s.wall_s:>8.2f} {sf:>8} {_mb(s.py_peak_mb):>8} {_mb(s.py_out_mb):>8} {s.rss_mb:>7.0f} {s.rss_peak_mb:>7.0f} "
        f"{s.rss_max_mb:>7.0f} {_n(s.rows_in):>11} {_n(s.rows_out):>11}  {s.note}"
    )


def format_sf(c: SfCall) -> str:
    label = "    sf " + c.model.replace("(season_length=", "/").replace(")", "")
    label = label if len(label) <= 32 else label[:31] + "~"
    return (
        f"{label:<32} {'':>8} {c.seconds:>8.2f} {'':>8} {'':>8} {'':>7} {'':>7} {'':>7} {c.rows:>11,} {c.series:>11,}  "
        f"series in, {c.seconds / max(c.series, 1) * 1000:.2f} ms per series"
    )


def total_line(steps: list[Step]) -> tuple[str, dict]:
    counted = [s for s in steps if s.in_total]
    wall = sum(s.wall_s for s in counted)
    sf = sum(s.sf_s or 0.0 for s in counted)
    peaks = [s for s in counted if s.py_peak_mb is not None]
    top = max(peaks, key=lambda s: s.py_peak_mb) if peaks else None
    rss_pk = max((s.rss_peak_mb for s in counted), default=0.0)
    rss_max = rss_max_mb()
    slow = max(counted, key=lambda s: s.wall_s) if counted else None
    line = (
        f"{'total':<32} {wall:>8.2f} {sf:>8.2f} {_mb(top.py_peak_mb if top else None):>8} {'':>8} {rss_now_mb():>7.0f} {rss_pk:>7.0f} "
        f"{rss_max:>7.0f} {'':>11} {'':>11}  own code {wall - sf:.2f} s + statsforecast {sf:.2f} s; slowest {slow.stage.strip() if slow else '-'}"
        + (f"; largest py peak {top.stage.strip()}" if top else "")
    )
    figures = {
        "wall_s": wall,
        "statsforecast_s": sf,
        "own_code_s": wall - sf,
        "py_peak_mb": top.py_peak_mb if top else None,
        "py_peak_stage": top.stage.strip() if top else None,
        "rss_peak_mb": rss_pk,
        "rss_max_mb": rss_max,
        "slowest_stage": slow.stage.strip() if slow else None,
    }
    return line, figures


# =================================================================== the cycle
def run_cycle(args: argparse.Namespace) -> dict:
    stages = [s.strip() for s in args.stages.split(",") if s.strip()]
    unknown = sorted(set(stages) - set(STAGES))
    if unknown:
        raise SystemExit(f"--stages: unknown stage(s) {unknown}; choose from {list(STAGES)}")
    last = max(STAGES.index(s) for s in stages)  # earlier stages feed the last one, so they run too
    todo = STAGES[: last + 1]

    if args.trace == "inline":
        tracemalloc.start()
    bench = Bench(trace=args.trace, sample_ms=args.rss_sample_ms)
    patch_statsforecast(bench)
    validate_on = not args.no_validate
    takes_shortages = "shortages" in inspect.signature(clean_history).parameters
    config = make_config(args.periods, args.horizon, args.seasonal, args.leaf_grain, args.shortage_rule if takes_shortages else None,
                         seasonal_model=args.seasonal_model, class_outliers=not args.default_outliers, share_method=args.share_method)
    # forecast_proportions forecasts every established child (statsforecast) inside reinitialize_target
    target_sf = any(pc.method == "forecast_proportions" for pc in config.product_classes.values())
    print(f"apportion cycle benchmark: {args.leaves:,} leaves, seed {args.seed}, {args.periods} weekly periods, horizon {args.horizon}, "
          f"seasonal={args.seasonal_model if args.seasonal else 'off'}, leaf grain={args.leaf_grain or '-'}, "
          f"share method={args.share_method or 'per class'}, tracemalloc={args.trace}, "
          f"commit {(git_commit() or '?')[:8]}")
    print(HEADER)
    print(UNITS)
    print("-" * len(HEADER))

    tmp = tempfile.TemporaryDirectory(prefix="apportion-bench-")
    csv_folder = Path(tmp.name) / "inputs" if args.csv else None
    scen = bench.run("generate (not timed)", lambda: generate(args.leaves, args.seed, args.periods, csv_folder, args.horizon),
                     rows_in=args.leaves, rows_out=lambda s: s.lines, in_total=False, trace=False,
                     note=lambda s: f"{s.facts['parents']:,} parents, {s.facts['products']:,} products")
    store_root = None
    if args.store is not None:
        from pipelines.store import open_store

        store_root = open_store(Path(args.store) if args.store else Path(tmp.name) / "store")

    def store(table: str, frame: pd.DataFrame) -> None:
        if store_root is None:
            return

        def write():  # as the IO manager (pipelines/store/dagster_io.py) does it: a new Parquet version of the partition
            store_root.write(table, "2026-11-30", "bench", frame, run_id="bench")

        bench.run(f"  store {table}", write, rows_in=len(frame), trace=False)

    def validate(stage: str, pairs: list[tuple[pd.DataFrame, type]]) -> list[pd.DataFrame]:
        if not validate_on:
            return [df for df, _ in pairs]
        rows = sum(len(df) for df, _ in pairs)
        names = ", ".join(m.__name__ for _, m in pairs)
        return bench.run(f"  validate {stage}", lambda: [m.validate(df, lazy=True) for df, m in pairs], rows_in=rows, note=lambda _: names)

    if not args.no_warmup and ("forecast" in todo or (target_sf and "target" in todo)):
        bench.run("warm-up numba (not in total)", lambda: warm_up(config, args.horizon), in_total=False, trace=False)
        bench.sf_calls.clear()
        bench.sf_seconds = 0.0

    master = [(scen.products, S.Products), (scen.spans, S.CustomerSpans)]
    if takes_shortages and not args.no_shortages and hasattr(S, "Shortages"):
        master.append((scen.shortages, S.Shortages))
    products, spans, *rest = validate("master data", master)
    shortage_kw = {"shortages": rest[0]} if rest else {}
    config.check_classes_known(set(products["product_class"]), where="benchmark products")
    store("products", products)
    store("customer_spans", spans)

    # 1. raw history
    if scen.folder is not None:
        raw = bench.run("raw: load_raw_history", lambda: load_raw_history(scen.folder)[0], rows_out=len, note=lambda _: "CSV read")
    else:
        raw = scen.raw
    (raw,) = validate("raw", [(raw, S.RawHistory)])
    store("raw_history", raw)
    scen.raw = None
    if "clean" not in todo:
        return finish(bench, args, scen)

    # 2. cleaned history
    res = bench.run("clean: clean_history", lambda: clean_history(raw, products, spans, config, **shortage_kw), rows_in=len(raw),
                    rows_out=lambda r: len(r.cleaned), note=lambda r: f"rejected {len(r.rejected):,}, corrections {len(r.corrections):,}"
                    + (f", shortage periods {int(r.cleaned['shortage'].sum()):,}" if "shortage" in r.cleaned else ""))
    cal = cycle_calendar(res.cleaned, config, res.cycle_date)
    cleaned, rejected, corrections, cal = validate(
        "clean", [(res.cleaned, S.CleanedHistory), (res.rejected, S.RejectedRows), (res.corrections, S.HistoryCorrections), (cal, S.CycleCalendar)]
    )
    bench.run("  checks clean", lambda: (line_accounting(len(raw), res.cleaned, res.rejected), find_unexplained_changes(res.cleaned, res.corrections)),
              rows_in=len(cleaned), note=lambda r: f"unaccounted {r[0]['unaccounted']}, unexplained {len(r[1])}")
    cycle_date = res.cycle_date
    raw_rows = len(raw)
    del raw, res
    for t, f in (("cleaned_history", cleaned), ("rejected_rows", rejected), ("history_corrections", corrections), ("cycle_calendar", cal)):
        store(t, f)
    if "lifecycle" not in todo:
        return finish(bench, args, scen)

    # 3. lifecycle
    lc = bench.run("lifecycle: apply_lifecycle", lambda: apply_lifecycle(cleaned, products, spans, config, cycle_date), rows_in=len(cleaned),
                   rows_out=lambda r: len(r.history), note=lambda r: f"audit {len(r.audit):,}")
    history, audit = validate("lifecycle", [(lc.history, S.LifecycleHistory), (lc.audit, S.LifecycleAudit)])
    del lc, cleaned
    store("lifecycle_history", history)
    store("lifecycle_audit", audit)
    if "shares" not in todo:
        return finish(bench, args, scen)

    # 4. shares
    config.check_windows_fit(int(cal["history_periods"].iloc[0]))
    children = bench.run("shares: active_children", lambda: active_children(spans, products, history, config, cycle_date),
                         rows_in=len(spans), rows_out=len)
    shares = bench.run("shares: compute_shares", lambda: compute_shares(history, children, config, cycle_date), rows_in=len(history), rows_out=len,
                       note=lambda s: "fallback " + ", ".join(f"{k} {v:,}" for k, v in s.drop_duplicates(["product", "site"])["fallback"].value_counts().items()))
    (shares,) = validate("shares", [(shares, S.ShareTable)])
    bench.run("  checks shares", lambda: find_new_customers_without_share(shares), rows_in=len(shares),
              note=lambda r: f"new customers without share {len(r)}")
    store("share_tables", shares)
    if "target" not in todo:
        return finish(bench, args, scen)

    # 5. target
    target = bench.run("target: reinitialize_target", lambda: reinitialize_target(shares, history, config, cycle_date, products),
                       rows_in=len(shares), rows_out=len, sf=target_sf,
                       note=lambda t: "share basis " + ", ".join(f"{k} {v:,}" for k, v in t["share_basis"].value_counts().items())
                       if target_sf or args.share_method == "seasonal" else "")
    (target,) = validate("target", [(target, S.ReinitializedTarget)])
    bench.run("  checks target", lambda: parents_with_mix_change(target, shares), rows_in=len(target),
              note=lambda r: f"parents with mix change {len(r):,}")
    store("reinitialized_target", target)
    if "forecast" not in todo:
        return finish(bench, args, scen)

    # 6. forecast (children as the asset takes them: from the share table)
    fc_children = shares[["product", "site", "customer", "product_class", "first_active_period", "last_active_period"]]
    fc = bench.run("forecast: forecast_cycle", lambda: forecast_cycle(history, fc_children, target, config, cycle_date), rows_in=len(history),
                   rows_out=lambda r: len(r.leaf), sf=True, note=lambda r: f"parent rows {len(r.parent):,}, negatives clipped {r.negatives_clipped}")
    parent, leaf = validate("forecast", [(fc.parent, S.ParentForecast), (fc.leaf, S.StatisticalForecast)])
    del fc
    store("parent_forecast", parent)
    store("statistical_forecast", leaf)
    if "reconcile" not in todo:
        return finish(bench, args, scen)

    # 7. reconciliation and its checks
    table = bench.run("reconcile: reconcile", lambda: rec.reconcile(parent, leaf), rows_in=len(leaf), rows_out=len)
    (table,) = validate("reconcile", [(table, S.Reconciliation)])

    def checks():
        negatives = pd.concat([rec.find_negative(parent).assign(grain="parent"), rec.find_negative(leaf).assign(grain="leaf")], ignore_index=True)
        return {
            "incoherent": rec.find_incoherent(table),
            "shares_not_one": rec.find_shares_not_summing_to_one(target),
            "after_phase_out": rec.find_volume_after_phase_out(leaf, spans, config.calendar.period),
            "outside_span": rec.find_volume_outside_active_span(parent, leaf, spans, products, config.calendar.period),
            "negative": negatives,
            "parents_without_children": rec.find_parents_without_children(table),
        }

    bench.run("  checks reconcile", checks, rows_in=len(leaf), note=lambda r: ", ".join(f"{k} {len(v)}" for k, v in r.items()))
    store("reconciliation", table)
    del table

    def done() -> dict:
        scen.facts["raw_lines"] = raw_rows
        out = finish(bench, args, scen)
        tmp.cleanup()
        return out

    if "plan" not in todo:
        return done()

    # 8. plan measures, as the asset calls them: the share bases over active_children, then the split
    adjustments, pins = validate("plan inputs", [(scen.adjustments, S.Adjustments), (scen.pins, S.Pins)])
    config.check_share_bases_fit(int(cal["history_periods"].iloc[0]))
    bases = bench.run("plan: share_basis_tables", lambda: share_basis_tables(history, active_children(spans, products, history, config, cycle_date),
                                                                             products, config, cycle_date),
                      rows_in=len(history), rows_out=lambda b: sum(len(f) for f in b.values()),
                      note=lambda b: "; ".join(f"{k}: fallback " + ", ".join(f"{f} {c:,}" for f, c in v.drop_duplicates(["product", "site"])["fallback"]
                                                                             .value_counts().items()) for k, v in b.items()))
    pm = bench.run("plan: plan_measures", lambda: plan_measures(shares, parent, leaf, target, adjustments, pins, config, cycle_date, bases),
                   rows_in=len(shares), rows_out=lambda r: len(r.plan),
                   note=lambda r: f"{len(config.measures)} measures, parent rows {len(r.parents):,}, adjustment rows {len(adjustments):,}, "
                   f"pins {len(r.pins_applied)} applied / {len(r.pins_not_applied)} not, overflowing parents {len(r.overflow)}")
    (plan,) = validate("plan", [(pm.plan, S.PlanMeasures)])
    bench.run("  checks plan", lambda: {"sum_violations": find_sum_violations(plan, pm.parents, config),
                                        "pins_not_kept": find_pins_not_kept(plan, pm.pins_applied, pm.pins_not_applied),
                                        "pins_exceed_parent": pm.overflow, "totals": plan_totals(plan, pm.parents)},
              rows_in=len(plan), note=lambda r: ", ".join(f"{k} {len(v)}" for k, v in r.items() if k != "totals") + " (+ plan_totals)")
    store("plan_measures", plan)
    del plan, pm, bases, adjustments, pins
    if "drift" not in todo:
        return done()

    # 9. share drift against the previous cycle's share table; the cycle reads that one from the store,
    # so computing it here (at the cycle date minus one period) is outside the total
    previous_cycle = shift_periods(cycle_date, -1, config.calendar.period)
    previous = bench.run("  previous shares (not in total)",
                         lambda: compute_shares(history, active_children(spans, products, history, config, previous_cycle), config, previous_cycle),
                         rows_in=len(history), rows_out=len, in_total=False, trace=False, note=lambda _: f"cycle {previous_cycle:%Y-%m-%d}")
    drift = bench.run("drift: share_drift", lambda: share_drift(shares, previous, f"{previous_cycle:%Y-%m-%d}"), rows_in=len(shares) + len(previous),
                      rows_out=len, note=lambda d: ", ".join(f"{k} {v:,}" for k, v in d["status"].value_counts().items()))
    (drift,) = validate("drift", [(drift, S.ShareDrift)])
    threshold = config.monitoring.max_share_drift_pp
    bench.run("  checks drift", lambda: drifted_beyond(drift, threshold), rows_in=len(drift),
              note=lambda r: f"moved more than {threshold:g} pp {len(r):,}, largest {drift['abs_change_pp'].max():.2f} pp")
    store("share_drift", drift)
    del previous, drift
    if "report" not in todo:
        return done()

    # 10. the cycle report's charts, one call of each per class on that class's rows (as the partitioned
    # asset gets them; the slicing stands for the store read and is not timed); the HTML page reads the
    # store and the Dagster instance and is not timed
    folder = Path(tmp.name) / "reports"
    folder.mkdir(parents=True, exist_ok=True)
    period = config.calendar.period
    files = []
    for c in config.product_classes:  # three classes
        in_class = set(products.loc[products["product_class"] == c, "product"])
        h_c = history[history["product"].isin(in_class)]
        pf_c = parent[parent["product_class"] == c]
        t_c = target[target["product"].isin(in_class)]
        s_c = shares[shares["product_class"] == c]
        charts = {
            "parents": bench.run(f"report: parent_chart {c}",
                                 lambda h=h_c, f=pf_c, c=c: report.parent_chart(h, f, product_class=c, cycle_date=cycle_date, period=period),
                                 rows_in=len(h_c), note=lambda png: f"{len(pf_c):,} parent forecast rows, PNG {len(png) / 1024:.0f} KiB"),
            "shares": bench.run(f"report: share_chart {c}",
                                lambda h=h_c, t=t_c, sh=s_c, c=c: report.share_chart(h, t, product_class=c, cycle_date=cycle_date, period=period, shares=sh),
                                rows_in=len(h_c), note=lambda png: f"{len(t_c):,} target rows, PNG {len(png) / 1024:.0f} KiB"),
        }
        for kind, png in charts.items():
            path = folder / report.chart_file_name(kind, c, cycle_date)
            path.write_bytes(png)
            files.append({"product_class": c, "kind": kind, "path": str(path), "bytes": len(png)})
    validate("report", [(pd.DataFrame(files), S.CycleReportFiles)])
    return done()


def finish(bench: Bench, args: argparse.Namespace, scen: Scenario) -> dict:
    line, total = total_line(bench.steps)
    print("-" * len(HEADER))
    print(line)
    print("scenario: " + ", ".join(f"{k} {v:,}" for k, v in scen.facts.items()))
    result = {
        "parameters": {k: v for k, v in vars(args).items()},
        "scenario": scen.facts,
        "steps": [asdict(s) for s in bench.steps],
        "statsforecast_calls": [asdict(c) for c in bench.sf_calls],
        "total": total,
        "versions": {"python": sys.version.split()[0], "pandas": pd.__version__, "numpy": np.__version__, "statsforecast": statsforecast.__version__,
                     "pandera": pa_version(), "commit": git_commit()},
    }
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps(result, indent=2, default=str))
        print(f"wrote {args.json}")
    return result


def git_commit() -> str | None:
    try:
        out = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "HEAD"], capture_output=True, text=True, timeout=10)
        return out.stdout.strip() or None
    except (OSError, subprocess.SubprocessError):
        return None


def pa_version() -> str:
    import pandera

    return pandera.__version__


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(prog="benchmarks/cycle.py", description=__doc__.splitlines()[0])
    p.add_argument("--leaves", type=int, required=True, help="number of leaf series (product x site x customer)")
    p.add_argument("--seed", type=int, default=7, help="generator seed (default 7)")
    p.add_argument("--periods", type=int, default=156, help="weeks of history (default 156)")
    p.add_argument("--horizon", type=int, default=26, help="weeks to forecast (default 26)")
    p.add_argument("--stages", default=",".join(STAGES), help=f"comma list from {','.join(STAGES)}; the cycle runs up to the last one named")
    p.add_argument("--seasonal", action="store_true", help="seasonal ETS / seasonal naive on class 'seasonal'")
    p.add_argument("--seasonal-model", default="auto_ets", help="smooth/erratic model of class 'seasonal' with --seasonal "
                   "(default auto_ets; the shipped config uses ets_additive_season)")
    p.add_argument("--default-outliers", action="store_true", help="one Hampel rule for every class instead of the shipped per-class rules")
    p.add_argument("--leaf-grain", choices=CLASSES, default=None, help="forecast this class at product x site x customer grain")
    p.add_argument("--share-method", choices=SHARE_METHODS, default=None,
                   help=f"share method of every class (smoothed with smoothing {SMOOTHING}); default: pooled, mean_of_ratios, pooled per class")
    p.add_argument("--shortage-rule", choices=("exclude", "fill_baseline"), default="exclude", help="cleansing.shortages (default exclude)")
    p.add_argument("--no-shortages", action="store_true", help="do not pass the synthetic shortages table to clean_history")
    p.add_argument("--csv", action="store_true", help="write the lines to CSV files and time load_raw_history on them")
    p.add_argument("--store", nargs="?", const="", default=None, metavar="PATH", help="also time the store's write of each table (a Parquet version; temp folder unless PATH)")
    p.add_argument("--no-validate", action="store_true", help="skip the pandera validations")
    p.add_argument("--trace", choices=("rerun", "inline", "off"), default="rerun",
                   help="rerun (default): time each step untraced, then run it again under tracemalloc for its heap peak; "
                   "inline: one traced run (wall times inflated by tracemalloc); off: no tracemalloc")
    p.add_argument("--no-warmup", action="store_true", help="no numba warm-up: JIT compile time lands in the forecast stage")
    p.add_argument("--rss-sample-ms", type=float, default=10.0, help="RSS sampling interval for the 'rss pk' column; 0 = off (default 10)")
    p.add_argument("--json", default=None, metavar="PATH", help="write the figures as JSON")
    args = p.parse_args(argv)
    if args.leaves < 1 or args.periods < 8 or args.horizon < 1:
        p.error("--leaves >= 1, --periods >= 8 and --horizon >= 1")
    return args


def main(argv: list[str] | None = None) -> None:
    run_cycle(parse_args(argv))


if __name__ == "__main__":
    main()
