"""The synthetic hierarchy of the cycle benchmark: a seeded generator of history, master data and planner input.

`generate(n_leaves, seed, periods)` builds N leaf series (product x site x
customer, 5-15 customers per product x site, three product classes) with
`periods` weeks of history: smooth and intermittent series, seasonal ones in
one class, late starters, phased-out customers, new customers with a reference
customer, retired products with a successor, outliers, split lines, returns (a
few that outweigh the week), exact duplicate lines, a few bad lines and
recorded supply shortages, and the planner input of the plan's measures.
The planner input and the config: `benchmarks/cycle_inputs.py`.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from cycle_inputs import plan_inputs

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
    adjustments, pins = plan_inputs(
        rng, lay, n_par, successor, safe, prod_code, site_code, cust_code, horizon, CYCLE_DATE
    )
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
