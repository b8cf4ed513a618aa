"""Seeded generator of the bundled demo scenario in `data/demo/`.

The scenario is invented: a fictional maker, "Larkspur Hollow Garden Supply",
ships garden and irrigation goods from three sites to a pool of customers.
It holds 156 weeks of shipment lines ending with the week that starts on
Monday 2026-11-23, so the cycle date is 2026-11-30. A few special cases are
planted at fixed ids (a new customer with a reference, a phased-out customer,
a retired product with its successor, bad rows, and lifecycle inside the
horizon: a span ending, a span starting with an initial share, a new customer
without any share rule, a product ending); the rest (outliers, returns,
duplicate lines, gaps) are placed by the seeded generator and listed by
`planted_cases()`. `data/demo/README.md` describes them for the default seed.

Regenerate the bundled files with::

    .venv/bin/python -m pipelines.demo_data --out data/demo

The same seed always gives byte-identical files. All randomness comes from
`np.random.default_rng(seed)`, except the cases added later, which draw from
streams of their own so that the earlier files stay byte for byte: shortages
`default_rng((seed, 9))`, list prices `default_rng((seed, 14))` (appended to
adjustments.csv) and pins `default_rng((seed, 15))` (pins.csv).
"""

from __future__ import annotations

import argparse
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

DEFAULT_SEED = 20261201

HISTORY_WEEKS = 156
HORIZON_WEEKS = 26
CYCLE_DATE = np.datetime64("2026-11-30", "D")  # a Monday: the first week to forecast
FIRST_WEEK = CYCLE_DATE - np.timedelta64(7 * HISTORY_WEEKS, "D")  # Monday 2023-12-04

SITES = ("SITE-NORTH", "SITE-SOUTH", "SITE-WEST")
POOL_SIZE = 48  # customers C0001..C0048; the planted new customers are C0049, C0050, C0051

FILES = {
    "history": "history.csv",
    "products": "products.csv",
    "customer_spans": "customer_spans.csv",
    "adjustments": "adjustments.csv",
    "shortages": "shortages.csv",
    "pins": "pins.csv",
}


@dataclass(frozen=True)
class Family:
    prefix: str
    count: int
    product_class: str
    what: str
    peak_week: int  # week of the year with the highest demand
    shape: tuple[float, float]  # consumables: relative amplitude; seasonal: peak sharpness


FAMILIES = (
    Family("DRIP", 6, "consumables", "drip tape and drip line", 25, (0.10, 0.25)),
    Family("FITT", 6, "consumables", "hose fittings and connectors", 22, (0.05, 0.15)),
    Family("FERT", 5, "consumables", "fertiliser granules", 14, (0.15, 0.30)),
    Family("FILT", 3, "consumables", "filter screens and cartridges", 24, (0.05, 0.15)),
    Family("TIMR", 4, "seasonal", "irrigation timers", 17, (1.4, 1.9)),
    Family("SPRK", 5, "seasonal", "sprinklers", 25, (1.6, 2.2)),
    Family("FROST", 3, "seasonal", "frost covers", 12, (1.5, 2.0)),
    Family("PART", 10, "spares", "spare parts for pumps, valves and timers", 0, (0.0, 0.0)),
)
CUSTOMERS_PER_PARENT = {"consumables": (5, 15), "seasonal": (4, 10), "spares": (2, 4)}
THREE_SITE_PROBABILITY = {"consumables": 0.55, "seasonal": 0.45, "spares": 0.3}


def _day(iso: str) -> np.datetime64:
    return np.datetime64(iso, "D")


def _weeks_before_cycle(n: int) -> np.datetime64:
    return CYCLE_DATE - np.timedelta64(7 * n, "D")


# ----------------------------------------------------------- planted cases (fixed ids)
# 1. New customer with a reference customer (same product and site).
NEW_CUSTOMER = ("DRIP-002", "SITE-NORTH", "C0049")
NEW_REFERENCE = "C0001"
NEW_FROM = _weeks_before_cycle(6)  # Monday 2026-10-19: six weeks of own history
# 2. Customer phased out one year before the cycle date, with stray late lines.
PHASED_OUT = ("FITT-001", "SITE-SOUTH", "C0007")
PHASED_OUT_TO = _weeks_before_cycle(52) - np.timedelta64(1, "D")  # Sunday 2025-11-30
STRAY_DATES = (_day("2026-01-14"), _day("2026-03-18"), _day("2026-06-10"))
# 3. Retired product and its successor (same class, same sites and customers).
RETIRED = "TIMR-003"
SUCCESSOR = "TIMR-004"
RETIRED_SITES = ("SITE-NORTH", "SITE-WEST")
RETIRED_TO = _weeks_before_cycle(40) - np.timedelta64(1, "D")  # Sunday 2026-02-22
SUCCESSOR_FROM = _weeks_before_cycle(44)  # Monday 2026-01-26: four weeks of overlap
# 9-12. Lifecycle inside the horizon. They touch master data and add a few lines drawn
# after every other draw, so the rest of the scenario is the same as without them.
# 9. Customer whose span ends inside the horizon: its share stops, the others renormalise.
ENDS_IN_HORIZON = ("FERT-001", "SITE-SOUTH", "C0003")
ENDS_IN_HORIZON_TO = CYCLE_DATE + np.timedelta64(7 * 11 - 1, "D")  # Sunday 2027-02-14: last week 2027-02-08
# 10. Customer starting inside the horizon with a planner-given initial share.
STARTS_IN_HORIZON = ("DRIP-001", "SITE-NORTH", "C0050")
STARTS_IN_HORIZON_FROM = CYCLE_DATE + np.timedelta64(7 * 8, "D")  # Monday 2027-01-25
STARTS_IN_HORIZON_SHARE = 0.15
# 11. New customer with neither reference nor initial share: no share yet, the WARN check lists it.
NEW_WITHOUT_SHARE = ("FITT-001", "SITE-SOUTH", "C0051")
NEW_WITHOUT_SHARE_FROM = _weeks_before_cycle(4)  # Monday 2026-11-02: four weeks of own history
# 12. Product discontinued inside the horizon, without successor.
ENDS_IN_HORIZON_PRODUCT = "FILT-003"
ENDS_IN_HORIZON_PRODUCT_TO = CYCLE_DATE + np.timedelta64(7 * 13 - 1, "D")  # Sunday 2027-02-28: last week 2027-02-22
# 8. Bad rows the tool must reject: (product, site, customer, period_start, quantity, reason).
BAD_ROWS = (
    ("DRIP-001", "SITE-NORTH", "", "2025-03-12", "45", "missing_key"),
    ("FERT-001", "SITE-SOUTH", "C0003", "2026-13-45", "30", "bad_date"),
    ("SPRK-001", "SITE-WEST", "C0005", "2025-07-09", "abc", "bad_quantity"),
    ("DRIP-099", "SITE-NORTH", "C0001", "2025-09-17", "60", "unknown_product"),
    ("PART-004", "SITE-NORTH", "C0002", "2026-05-06", "2", "no_customer_span"),
)
# Spans that must exist (customers forced in) or must not exist, so the fixed ids hold for any seed.
PINNED_SPANS = {
    ("DRIP-001", "SITE-NORTH"): (),
    ("DRIP-002", "SITE-NORTH"): (NEW_REFERENCE,),
    ("FITT-001", "SITE-SOUTH"): ("C0007",),
    ("FERT-001", "SITE-SOUTH"): ("C0003",),
    ("SPRK-001", "SITE-WEST"): ("C0005",),
    ("PART-004", "SITE-NORTH"): (),
}
EXCLUDED_SPANS = {("PART-004", "SITE-NORTH"): ("C0002",)}

N_SPIKES = 8
N_RETURNS = 20
N_LARGE_RETURNS = 2
N_DUPLICATES = 30
N_GAP_LEAVES = 3
N_LATE_STARTERS = 3
SPLIT_SHARE = 0.025  # share of ordinary weekly cells written as 2-3 separate lines


def _iso(days: np.ndarray) -> np.ndarray:
    return np.datetime_as_string(np.asarray(days, dtype="datetime64[D]"), unit="D")


def _week_index(day: np.datetime64) -> int:
    return int((day - FIRST_WEEK).astype(np.int64) // 7)


def _product_table() -> pd.DataFrame:
    rows = []
    for f, fam in enumerate(FAMILIES):
        for i in range(1, fam.count + 1):
            rows.append((f"{fam.prefix}-{i:03d}", fam.product_class, f))
    return pd.DataFrame(rows, columns=["product", "product_class", "family"])


def _choose_sites(rng: np.random.Generator, product: str, product_class: str) -> tuple[str, ...]:
    if product == RETIRED:
        return RETIRED_SITES
    forced = {site for (p, site) in (*PINNED_SPANS, *EXCLUDED_SPANS) if p == product}
    n = 3 if rng.random() < THREE_SITE_PROBABILITY[product_class] else 2
    rest = [s for s in SITES if s not in forced]
    extra = rng.choice(len(rest), size=max(n - len(forced), 0), replace=False)
    chosen = forced | {rest[i] for i in extra}
    return tuple(s for s in SITES if s in chosen)


def _assign_customers(rng: np.random.Generator, products: pd.DataFrame, size: np.ndarray) -> pd.DataFrame:
    """One row per (product, site, customer); bigger customers buy more products."""
    pool = np.array([f"C{i:04d}" for i in range(1, POOL_SIZE + 1)])
    weight = size**0.7
    keys = []
    for product, product_class in zip(products["product"], products["product_class"], strict=False):
        if product == SUCCESSOR:
            continue  # copied from the retired product below
        for site in _choose_sites(rng, product, product_class):
            lo, hi = CUSTOMERS_PER_PARENT[product_class]
            n = int(rng.integers(lo, hi + 1))
            if (product, site) == NEW_CUSTOMER[:2]:
                n = min(n, hi - 1)  # room for the new customer
            forced = PINNED_SPANS.get((product, site), ())
            blocked = set(forced) | set(EXCLUDED_SPANS.get((product, site), ()))
            candidates = np.flatnonzero(~np.isin(pool, list(blocked)))
            p = weight[candidates] / weight[candidates].sum()
            picked = rng.choice(candidates, size=max(n - len(forced), 0), replace=False, p=p)
            for customer in sorted([*forced, *pool[picked]]):
                keys.append((product, site, customer))
    return pd.DataFrame(keys, columns=["product", "site", "customer"])


def _leaf_parameters(rng: np.random.Generator, leaves: pd.DataFrame, products: pd.DataFrame, size: np.ndarray):
    """Per-leaf level, trend, seasonality and noise, drawn as whole columns."""
    n = len(leaves)
    info = products.set_index("product")
    leaves = leaves.join(info[["product_class", "family"]], on="product")
    cls = leaves["product_class"].to_numpy()
    fam = leaves["family"].to_numpy()
    cust_size = size[leaves["customer"].str[1:].astype(int).to_numpy() - 1]

    base_mean = {"consumables": 35.0, "seasonal": 15.0, "spares": 0.10}
    product_base = {}
    for product, pc in zip(products["product"], products["product_class"], strict=False):
        b = base_mean[pc]
        product_base[product] = b * rng.lognormal(0.0, 0.5) if pc != "spares" else b * rng.uniform(0.5, 1.5)
    base = leaves["product"].map(product_base).to_numpy()

    level = base * cust_size * rng.lognormal(0.0, 0.35, n)
    level = np.where(cls == "spares", np.clip(level * cust_size**-0.6, 0.02, 0.35), np.clip(level, 3.0, 600.0))

    trend_group = rng.choice(3, size=n, p=[0.3, 0.4, 0.3])  # 0 up, 1 flat, 2 down
    growth = np.select(
        [trend_group == 0, trend_group == 1],
        [rng.uniform(0.08, 0.35, n), rng.uniform(-0.03, 0.03, n)],
        rng.uniform(-0.30, -0.08, n),
    )
    lo = np.array([FAMILIES[f].shape[0] for f in fam])
    hi = np.array([FAMILIES[f].shape[1] for f in fam])
    shape = rng.uniform(lo, hi)
    peak = np.array([FAMILIES[f].peak_week for f in fam], dtype=float) + rng.normal(0.0, 1.0, n)
    noise_k = np.select([cls == "consumables", cls == "seasonal"], [rng.uniform(8, 25, n), rng.uniform(5, 12, n)], 1.0)
    sporadic = rng.random(n) < 0.15
    dropout = np.where(sporadic, rng.uniform(0.08, 0.25, n), rng.uniform(0.0, 0.03, n))
    dropout = np.where(cls == "spares", 0.0, dropout)
    spare_size = rng.uniform(0.3, 2.5, n)
    weekday = rng.integers(0, 5, n)
    return leaves.assign(
        level=level,
        growth=growth,
        trend_group=trend_group,
        shape=shape,
        peak=peak,
        noise_k=noise_k,
        dropout=dropout,
        spare_size=spare_size,
        weekday=weekday,
    )


def _add_planted_leaves(rng: np.random.Generator, leaves: pd.DataFrame) -> pd.DataFrame:
    """Successor leaves copy the retired product's; the new customer copies its reference, smaller."""
    successor = leaves[leaves["product"] == RETIRED].assign(product=SUCCESSOR)
    ref = leaves[
        (leaves["product"] == NEW_CUSTOMER[0])
        & (leaves["site"] == NEW_CUSTOMER[1])
        & (leaves["customer"] == NEW_REFERENCE)
    ]
    new = ref.assign(
        customer=NEW_CUSTOMER[2],
        level=ref["level"] * rng.uniform(0.4, 0.8),
        growth=0.0,
        trend_group=1,
        dropout=0.0,
        weekday=int(rng.integers(0, 5)),
    )
    leaves = pd.concat([leaves, successor, new], ignore_index=True)
    key = list(zip(leaves["product"], leaves["site"], leaves["customer"], strict=False))
    role = np.full(len(leaves), "", dtype=object)
    role[leaves["product"].to_numpy() == RETIRED] = "retired"
    role[leaves["product"].to_numpy() == SUCCESSOR] = "successor"
    role[[k == NEW_CUSTOMER for k in key]] = "new"
    role[[k == (*NEW_CUSTOMER[:2], NEW_REFERENCE) for k in key]] = "reference"
    role[[k == PHASED_OUT for k in key]] = "phased_out"
    leaves["role"] = role
    leaves.loc[leaves["role"] == "reference", "dropout"] = 0.0
    leaves.loc[leaves["role"] == "phased_out", "dropout"] = np.minimum(
        leaves.loc[leaves["role"] == "phased_out", "dropout"], 0.03
    )
    return leaves.sort_values(["product", "site", "customer"], kind="mergesort").reset_index(drop=True)


def _pick(rng: np.random.Generator, candidates: np.ndarray, n: int) -> np.ndarray:
    if len(candidates) < n:
        raise RuntimeError(f"demo generator: needed {n} candidates, found {len(candidates)}")
    return np.sort(rng.choice(candidates, size=n, replace=False))


def _build(seed: int) -> tuple[dict[str, pd.DataFrame], pd.DataFrame]:
    rng = np.random.default_rng(seed)
    weeks = FIRST_WEEK + np.timedelta64(7, "D") * np.arange(HISTORY_WEEKS)
    W = HISTORY_WEEKS
    planted: list[tuple[str, str, str, str, str, str]] = []

    products = _product_table()
    size = rng.lognormal(0.0, 0.6, POOL_SIZE)
    leaves = _assign_customers(rng, products, size)
    leaves = _leaf_parameters(rng, leaves, products, size)
    leaves = _add_planted_leaves(rng, leaves)
    n = len(leaves)
    cls = leaves["product_class"].to_numpy()
    role = leaves["role"].to_numpy()
    ordinary = role == ""

    # --- when each leaf is active (1), ramping (between) or silent (0)
    active = np.ones((n, W))
    span_from = np.full(n, "", dtype=object)
    span_to = np.full(n, "", dtype=object)
    reference = np.full(n, "", dtype=object)
    new_w, out_w = _week_index(NEW_FROM), _week_index(PHASED_OUT_TO) + 1
    succ_w, ret_w = _week_index(SUCCESSOR_FROM), _week_index(RETIRED_TO) + 1
    ramp = np.linspace(0.0, 1.0, ret_w - succ_w + 2)[1:-1]  # 0.2 .. 0.8 over the overlap
    active[role == "new", :new_w] = 0.0
    span_from[role == "new"] = str(NEW_FROM)
    reference[role == "new"] = NEW_REFERENCE
    active[role == "phased_out", out_w:] = 0.0
    span_to[role == "phased_out"] = str(PHASED_OUT_TO)
    active[np.ix_(role == "retired", np.arange(succ_w, ret_w))] = 1.0 - ramp
    active[role == "retired", ret_w:] = 0.0
    active[role == "successor", :succ_w] = 0.0
    active[np.ix_(role == "successor", np.arange(succ_w, ret_w))] = ramp
    span_from[role == "successor"] = str(SUCCESSOR_FROM)

    late = _pick(rng, np.flatnonzero(ordinary & (cls != "spares")), N_LATE_STARTERS)
    late_w = rng.integers(26, 110, N_LATE_STARTERS)
    for i, w0 in zip(late, late_w, strict=False):
        active[i, :w0] = 0.0
        span_from[i] = str(weeks[w0])
        planted.append(("late_start", *leaves.loc[i, ["product", "site", "customer"]], str(weeks[w0]),
                        f"ordinary customer starting mid-history ({W - w0} weeks of history)"))

    # --- expected demand: level x trend x season x activity
    mid_week = weeks + np.timedelta64(3, "D")
    day_of_year = (mid_week - mid_week.astype("datetime64[Y]").astype("datetime64[D]")).astype(np.int64)
    phase = 2 * np.pi * (day_of_year[None, :] - 7.0 * leaves["peak"].to_numpy()[:, None]) / 365.25
    shape = leaves["shape"].to_numpy()[:, None]
    season = np.where(
        (cls == "seasonal")[:, None],
        np.exp(shape * np.cos(phase)),
        1.0 + np.where((cls == "consumables")[:, None], shape, 0.0) * np.cos(phase),
    )
    season = season / season.mean(axis=1, keepdims=True)
    years = np.arange(W)[None, :] / 52.0
    trend = (1.0 + leaves["growth"].to_numpy()[:, None]) ** years
    level = leaves["level"].to_numpy()[:, None]
    mu = level * season * trend * active

    # --- draws: gamma-Poisson for volume classes, Bernoulli occurrence x size for spares
    k = leaves["noise_k"].to_numpy()[:, None]
    volume = rng.poisson(mu * rng.gamma(k, 1.0 / k, size=(n, W)))
    p_occ = np.clip(level * np.sqrt(trend) * active, 0.0, 0.5)
    occurs = rng.random((n, W)) < p_occ
    sizes = 1 + rng.poisson(leaves["spare_size"].to_numpy()[:, None], size=(n, W))
    sizes = np.where(rng.random((n, W)) < 0.12, sizes * rng.integers(2, 5, size=(n, W)), sizes)
    qty = np.where((cls == "spares")[:, None], occurs * sizes, volume).astype(np.int64)
    qty[rng.random((n, W)) < leaves["dropout"].to_numpy()[:, None]] = 0

    # 7. gaps: whole blocks of absent weeks for a few consumables customers
    gap_leaves = _pick(
        rng, np.flatnonzero(ordinary & (cls == "consumables") & ~np.isin(np.arange(n), late)), N_GAP_LEAVES
    )
    for i in gap_leaves:
        length, w0 = int(rng.integers(4, 7)), int(rng.integers(10, 140))
        qty[i, w0 : w0 + length] = 0
        planted.append(("missing_weeks", *leaves.loc[i, ["product", "site", "customer"]], str(weeks[w0]),
                        f"{length} consecutive weeks without a row, {weeks[w0]} to {weeks[w0 + length - 1]}"))

    # 4. outliers: one spike of 6-10x the expected level on each of a few consumables leaves
    spike = np.zeros((n, W), dtype=bool)
    strong = ordinary & (cls == "consumables") & ~np.isin(np.arange(n), np.r_[late, gap_leaves])
    strong &= (mu[:, 8 : W - 8] >= 10).all(axis=1)
    for i in _pick(rng, np.flatnonzero(strong), N_SPIKES):
        w = int(rng.integers(8, W - 8))
        factor = rng.uniform(6.0, 10.0)
        qty[i, w] = int(np.rint(factor * mu[i, w]))
        spike[i, w] = True
        planted.append(("outlier", *leaves.loc[i, ["product", "site", "customer"]], str(weeks[w]),
                        f"{qty[i, w]} units, {factor:.1f}x the expected {mu[i, w]:.0f}"))

    # --- one line per non-zero cell, on the customer's usual weekday most of the time
    li, wi = np.nonzero(qty > 0)
    q = qty[li, wi]
    usual = leaves["weekday"].to_numpy()[li]
    day = np.where(rng.random(len(li)) < 0.8, usual, rng.integers(0, 6, len(li)))
    free = ordinary[li] & (cls[li] != "spares") & ~spike[li, wi] & ~np.isin(li, gap_leaves)

    # 5. returns: a negative line in the same week; two outweigh the week's shipment
    big = _pick(rng, np.flatnonzero(free & (q >= 25)), N_LARGE_RETURNS)
    free[big] = False
    small = _pick(rng, np.flatnonzero(free & (q >= 12)), N_RETURNS - N_LARGE_RETURNS)
    free[small] = False
    ret_cells = np.r_[big, small]
    ret_qty = np.r_[
        np.rint(q[big] * rng.uniform(1.3, 1.8, len(big))),
        np.maximum(1, np.rint(q[small] * rng.uniform(0.05, 0.4, len(small)))),
    ].astype(np.int64)
    ret_day = (day[ret_cells] + rng.integers(1, 6, len(ret_cells))) % 6
    for c, r, d in zip(ret_cells, ret_qty, ret_day, strict=False):
        kind = "return_net_negative" if c in big else "return"
        planted.append((kind, *leaves.loc[li[c], ["product", "site", "customer"]], str(weeks[wi[c]]),
                        f"-{r} returned on {weeks[wi[c]] + np.timedelta64(int(d), 'D')} against {q[c]} shipped"))

    # 6a. exact duplicate lines
    dup = _pick(rng, np.flatnonzero(free), N_DUPLICATES)
    free[dup] = False
    for c in dup:
        planted.append(("duplicate_line", *leaves.loc[li[c], ["product", "site", "customer"]], str(weeks[wi[c]]),
                        f"line of {q[c]} on {weeks[wi[c]] + np.timedelta64(int(day[c]), 'D')} written twice"))

    # 6b. some weeks shipped as 2-3 separate lines on different days
    split = np.flatnonzero(free & (q >= 6) & (rng.random(len(q)) < SPLIT_SHARE))
    m = len(split)
    parts_n = rng.integers(2, 4, m)
    days3 = np.sort(rng.random((m, 6)).argsort(axis=1)[:, :3], axis=1)
    props = rng.dirichlet(np.ones(3), size=m)
    props[parts_n == 2, 2] = 0.0
    props /= props.sum(axis=1, keepdims=True)
    on = np.arange(3)[None, :] < parts_n[:, None]
    parts = (np.floor(props * (q[split] - parts_n)[:, None]) + 1) * on
    parts[:, 0] += q[split] - parts.sum(axis=1)
    keep = np.ones(len(q), dtype=bool)
    keep[split] = False

    line_leaf = np.r_[li[keep], np.repeat(li[split], 3)[on.ravel()], li[ret_cells], li[dup]]
    line_week = np.r_[wi[keep], np.repeat(wi[split], 3)[on.ravel()], wi[ret_cells], wi[dup]]
    line_day = np.r_[day[keep], days3.ravel()[on.ravel()], ret_day, day[dup]]
    line_qty = np.r_[q[keep], parts.ravel()[on.ravel()].astype(np.int64), -ret_qty, q[dup]]
    line_date = weeks[line_week] + line_day.astype("timedelta64[D]")

    # 2. stray lines after the phased-out customer's span ended
    po = int(np.flatnonzero(role == "phased_out")[0])
    stray_qty = np.maximum(1, rng.poisson(max(mu[po, out_w - 1], 1.0), len(STRAY_DATES)))
    for d, s in zip(STRAY_DATES, stray_qty, strict=False):
        planted.append(("stray_after_span", *PHASED_OUT, str(d), f"line of {s} after active_to {PHASED_OUT_TO}"))
    line_leaf = np.r_[line_leaf, np.full(len(STRAY_DATES), po)]
    line_date = np.r_[line_date, np.array(STRAY_DATES, dtype="datetime64[D]")]
    line_qty = np.r_[line_qty, stray_qty]

    history = pd.DataFrame(
        {
            "product": leaves["product"].to_numpy()[line_leaf],
            "site": leaves["site"].to_numpy()[line_leaf],
            "customer": leaves["customer"].to_numpy()[line_leaf],
            "period_start": _iso(line_date),
            "quantity": line_qty.astype(str),
        }
    )
    bad = pd.DataFrame([r[:5] for r in BAD_ROWS], columns=history.columns)
    for r in BAD_ROWS:
        planted.append((f"bad_row:{r[5]}", r[0], r[1], r[2], r[3], f"quantity {r[4]!r}"))
    history = pd.concat([history, bad], ignore_index=True)
    history = history.sort_values(["product", "site", "customer", "period_start"], kind="mergesort")
    history = history.reset_index(drop=True)

    # --- master data
    product_rows = products[["product", "product_class"]].assign(active_from="", active_to="", successor="")
    product_rows.loc[product_rows["product"] == SUCCESSOR, "active_from"] = str(SUCCESSOR_FROM)
    product_rows.loc[product_rows["product"] == RETIRED, "active_to"] = str(RETIRED_TO)
    product_rows.loc[product_rows["product"] == RETIRED, "successor"] = SUCCESSOR

    spans = leaves[["product", "site", "customer"]].assign(
        active_from=span_from.astype(str), active_to=span_to.astype(str), reference_customer=reference.astype(str)
    )

    adjustments = _adjustments(rng, leaves, mu)
    history, product_rows, spans = _lifecycle_in_horizon(rng, leaves, history, product_rows, spans, planted)
    frames = {
        "history": history,
        "products": product_rows.reset_index(drop=True),
        "customer_spans": spans.reset_index(drop=True),
        "adjustments": adjustments,
    }
    planted_df = pd.DataFrame(planted, columns=["case", "product", "site", "customer", "period_start", "detail"])
    planted_df = planted_df.sort_values(["case", "product", "site", "customer", "period_start"], kind="mergesort")
    return frames, planted_df.reset_index(drop=True)


def _lifecycle_in_horizon(rng, leaves, history, product_rows, spans, planted):
    """Cases 9-12: spans and a product ending or starting inside the horizon, a new customer without share.

    Drawn last, so every earlier draw (and so the rest of the scenario) is unchanged.
    """
    key = list(zip(spans["product"], spans["site"], spans["customer"], strict=False))
    spans = spans.assign(scale="", initial_share="")
    spans.loc[[k == ENDS_IN_HORIZON for k in key], "active_to"] = str(ENDS_IN_HORIZON_TO)
    planted.append(
        (
            "span_ends_in_horizon",
            *ENDS_IN_HORIZON,
            str(ENDS_IN_HORIZON_TO),
            "share until the week of 2027-02-08, then 0",
        )
    )
    product_rows.loc[product_rows["product"] == ENDS_IN_HORIZON_PRODUCT, "active_to"] = str(ENDS_IN_HORIZON_PRODUCT_TO)
    for site, customer in zip(
        *spans.loc[spans["product"] == ENDS_IN_HORIZON_PRODUCT, ["site", "customer"]].to_numpy().T, strict=False
    ):
        planted.append(
            (
                "product_ends_in_horizon",
                ENDS_IN_HORIZON_PRODUCT,
                site,
                customer,
                str(ENDS_IN_HORIZON_PRODUCT_TO),
                "forecast until the week of 2027-02-22, then 0",
            )
        )
    new_rows = pd.DataFrame(
        [
            (*STARTS_IN_HORIZON, str(STARTS_IN_HORIZON_FROM), "", "", "", str(STARTS_IN_HORIZON_SHARE)),
            (*NEW_WITHOUT_SHARE, str(NEW_WITHOUT_SHARE_FROM), "", "", "", ""),
        ],
        columns=spans.columns,
    )
    spans = pd.concat([spans, new_rows], ignore_index=True)
    spans = spans.sort_values(["product", "site", "customer"], kind="mergesort").reset_index(drop=True)
    planted.append(("span_starts_in_horizon", *STARTS_IN_HORIZON, str(STARTS_IN_HORIZON_FROM),
                    f"no history; initial_share {STARTS_IN_HORIZON_SHARE} from that week"))

    # four weeks of lines for the new customer without share, near its parent's typical level
    parent = (leaves["product"] == NEW_WITHOUT_SHARE[0]) & (leaves["site"] == NEW_WITHOUT_SHARE[1])
    level = float(leaves.loc[parent, "level"].median())
    weeks = NEW_WITHOUT_SHARE_FROM + np.timedelta64(7, "D") * np.arange(4) + np.timedelta64(1, "D")  # Tuesdays
    qty = np.maximum(1, rng.poisson(level, len(weeks)))
    lines = pd.DataFrame(
        {
            "product": NEW_WITHOUT_SHARE[0],
            "site": NEW_WITHOUT_SHARE[1],
            "customer": NEW_WITHOUT_SHARE[2],
            "period_start": _iso(weeks),
            "quantity": qty.astype(str),
        }
    )
    planted.append(("new_without_share", *NEW_WITHOUT_SHARE, str(NEW_WITHOUT_SHARE_FROM),
                    f"4 weeks of lines ({', '.join(map(str, qty))}), no reference or initial share"))
    history = pd.concat([history, lines], ignore_index=True)
    history = history.sort_values(["product", "site", "customer", "period_start"], kind="mergesort").reset_index(
        drop=True
    )
    return history, product_rows, spans


def _adjustments(rng: np.random.Generator, leaves: pd.DataFrame, mu: np.ndarray) -> pd.DataFrame:
    """A handful of planner-entered product x site values (units) in the forecast horizon."""
    horizon = CYCLE_DATE + np.timedelta64(7, "D") * np.arange(HORIZON_WEEKS)
    # the parent's expected level in the same week one year earlier (seasonal products peak in spring)
    parent_mu = pd.DataFrame(mu).groupby([leaves["product"], leaves["site"]]).sum()
    plan = (
        # measure, product, site, horizon weeks (0 = the cycle week), value as a share of the parent level
        ("planner_adjustment", "DRIP-001", "SITE-NORTH", (1, 2), 0.30),
        ("planner_adjustment", "DRIP-002", "SITE-NORTH", (3,), 0.20),
        ("planner_adjustment", "FERT-001", "SITE-SOUTH", (6,), -0.25),
        ("promotion_uplift", "SPRK-001", "SITE-WEST", (22, 23, 24, 25), 0.50),
        ("promotion_uplift", "TIMR-004", "SITE-NORTH", (18, 19), 0.40),
    )
    rows = []
    for measure, product, site, offsets, share in plan:
        for o in offsets:
            base = max(float(parent_mu.loc[(product, site), HISTORY_WEEKS + o - 52]), 10.0)
            value = int(np.rint(base * share * rng.uniform(0.85, 1.15) / 5.0) * 5) or (5 if share > 0 else -5)
            rows.append((measure, product, site, str(horizon[o]), str(value)))
    out = pd.DataFrame(rows, columns=["measure", "product", "site", "period_start", "value"])
    return out.sort_values(["measure", "product", "site", "period_start"], kind="mergesort").reset_index(drop=True)


# 9. Supply shortages (fixed ids): a site ran short of a product for one week. The
# shortages file records the product x site and a day of that week; every customer's
# lines of that week are cut to the same 10-40% of what it would have shipped.
SHORTAGES = (
    ("DRIP-001", "SITE-NORTH", "2025-06-18"),  # a Wednesday: any day of the week may be recorded
    ("FERT-001", "SITE-SOUTH", "2026-04-01"),  # spring, the fertiliser season
    ("SPRK-001", "SITE-WEST", "2026-06-22"),  # a Monday at the sprinklers' seasonal peak
)


def _plant_shortages(frames: dict[str, pd.DataFrame], planted: pd.DataFrame, seed: int):
    """Add the shortages table and cut the history lines of each shortage week (case 9).

    Draws from its own generator, `default_rng((seed, 9))`, so every other cell of the
    scenario stays as `_build` made it.
    """
    rng = np.random.default_rng((seed, 9))
    history = frames["history"].copy()
    qty = pd.to_numeric(history["quantity"], errors="coerce")
    dates = pd.to_datetime(history["period_start"], format="ISO8601", errors="coerce")
    monday = dates - pd.to_timedelta(dates.dt.weekday, unit="D")
    cases = []
    for product, site, day in SHORTAGES:  # three fixed records
        week = pd.Timestamp(day) - pd.Timedelta(days=pd.Timestamp(day).weekday())
        hit = ((history["product"] == product) & (history["site"] == site) & (monday == week) & (qty > 0)).to_numpy()
        kept = rng.uniform(0.1, 0.4)
        cut = np.maximum(1, np.rint(qty[hit].to_numpy() * kept)).astype(np.int64)
        history.loc[hit, "quantity"] = cut.astype(str)
        customers = history.loc[hit, "customer"].nunique()
        cases.append(("shortage", product, site, "", str(week.date()),
                      f"recorded on {day}; {customers} customers' lines cut to {kept:.0%}: "
                      f"{int(qty[hit].sum())} -> {int(cut.sum())} units"))
    shortages = pd.DataFrame(list(SHORTAGES), columns=["product", "site", "period_start"])
    planted = pd.concat([planted, pd.DataFrame(cases, columns=planted.columns)], ignore_index=True)
    planted = planted.sort_values(["case", "product", "site", "customer", "period_start"], kind="mergesort")
    return {**frames, "history": history, "shortages": shortages}, planted.reset_index(drop=True)


# 14-15. Plan measures (fixed ids). List prices per product x site go into adjustments.csv
# after the rows above, so those stay as they were; pins.csv holds a few leaf values a
# planner fixed. Drawn from their own generators, default_rng((seed, 14)) and
# default_rng((seed, 15)), so no other cell of the scenario changes.
LIST_PRICE_RANGE = {  # list price per unit, by product family
    "DRIP": (18.0, 45.0), "FITT": (2.5, 9.0), "FERT": (12.0, 30.0), "FILT": (6.0, 15.0),
    "TIMR": (35.0, 90.0), "SPRK": (8.0, 40.0), "FROST": (10.0, 25.0), "PART": (4.0, 60.0),
}
PRICE_CHANGE_PRODUCTS = ("DRIP-003", "FERT-002", "SPRK-002")  # list price rises from horizon week 13
PRICE_CHANGE_WEEK = 13  # Monday 2027-03-01
# (measure, product, site, horizon weeks): a leaf value the planner fixed; the customer is drawn
PINNED_FORECAST = ("statistical_forecast", "DRIP-001", "SITE-NORTH", (1, 2))  # a confirmed order
PINNED_ADJUSTMENT = ("planner_adjustment", "DRIP-001", "SITE-NORTH", (1,))  # most of the parent's adjustment
PINNED_PROMOTION = ("promotion_uplift", "SPRK-001", "SITE-WEST", (23,))  # one customer's part of the promotion
PINNED_PRICE = ("list_price", "DRIP-002", "SITE-NORTH", "C0001", tuple(range(13)))  # a contract price


def _list_prices(frames: dict[str, pd.DataFrame], seed: int) -> pd.DataFrame:
    """Case 14: list price of every product x site in every horizon week its product is sold."""
    rng = np.random.default_rng((seed, 14))
    horizon = CYCLE_DATE + np.timedelta64(7, "D") * np.arange(HORIZON_WEEKS)
    products = frames["products"].set_index("product")
    parents = frames["customer_spans"][["product", "site"]].drop_duplicates().reset_index(drop=True)
    family = parents["product"].str.split("-").str[0]
    lo = family.map(lambda f: LIST_PRICE_RANGE[f][0]).to_numpy()
    hi = family.map(lambda f: LIST_PRICE_RANGE[f][1]).to_numpy()
    by_product = pd.Series(rng.uniform(0.0, 1.0, len(products)), index=products.index)
    base = lo + (hi - lo) * parents["product"].map(by_product).to_numpy()
    price = base * rng.uniform(0.97, 1.03, len(parents))  # each site prices a little differently
    rise = np.where(parents["product"].isin(PRICE_CHANGE_PRODUCTS), rng.uniform(1.04, 1.08, len(parents)), 1.0)
    weeks = np.tile(np.arange(HORIZON_WEEKS), len(parents))
    row = np.repeat(np.arange(len(parents)), HORIZON_WEEKS)
    value = np.round(price[row] * np.where(weeks >= PRICE_CHANGE_WEEK, rise[row], 1.0), 2)
    starts = horizon[weeks]
    start_of = pd.to_datetime(products["active_from"].replace("", None)).reindex(parents["product"]).to_numpy()[row]
    end_of = pd.to_datetime(products["active_to"].replace("", None)).reindex(parents["product"]).to_numpy()[row]
    sold = ~(starts.astype("datetime64[ns]") > end_of) & ~(starts.astype("datetime64[ns]") < start_of)
    out = pd.DataFrame({
        "measure": "list_price",
        "product": parents["product"].to_numpy()[row],
        "site": parents["site"].to_numpy()[row],
        "period_start": _iso(starts),
        "value": [f"{v:.2f}" for v in value],
    })[sold]
    return out.sort_values(["product", "site", "period_start"], kind="mergesort").reset_index(drop=True)


def _pins(frames: dict[str, pd.DataFrame], prices: pd.DataFrame, seed: int) -> pd.DataFrame:
    """Case 15: a few leaf values a planner fixed, one case per measure."""
    rng = np.random.default_rng((seed, 15))
    horizon = CYCLE_DATE + np.timedelta64(7, "D") * np.arange(HORIZON_WEEKS)
    spans, adjustments = frames["customer_spans"], frames["adjustments"]
    rows = []

    def customers(product: str, site: str) -> np.ndarray:
        s = spans[(spans["product"] == product) & (spans["site"] == site) & (spans["active_from"] == "")]
        return s["customer"].to_numpy()

    measure, product, site, weeks = PINNED_FORECAST
    customer = rng.choice(customers(product, site))
    for w, units in zip(weeks, 5 * rng.integers(6, 13, len(weeks)), strict=False):
        rows.append((product, site, customer, str(horizon[w]), measure, str(units)))
    for measure, product, site, weeks in (PINNED_ADJUSTMENT, PINNED_PROMOTION):
        customer = rng.choice(customers(product, site))
        for w in weeks:
            entered = adjustments[(adjustments["measure"] == measure) & (adjustments["product"] == product)
                                  & (adjustments["site"] == site) & (adjustments["period_start"] == str(horizon[w]))]
            units = int(np.rint(float(entered["value"].iloc[0]) * rng.uniform(0.4, 0.6) / 5.0) * 5)
            rows.append((product, site, customer, str(horizon[w]), measure, str(units)))
    measure, product, site, customer, weeks = PINNED_PRICE
    for w in weeks:
        listed = prices[
            (prices["product"] == product) & (prices["site"] == site) & (prices["period_start"] == str(horizon[w]))
        ]
        rows.append((product, site, customer, str(horizon[w]), measure, f"{float(listed['value'].iloc[0]) * 0.95:.2f}"))
    out = pd.DataFrame(rows, columns=["product", "site", "customer", "period_start", "measure", "value"])
    return out.sort_values(["measure", "product", "site", "customer", "period_start"], kind="mergesort").reset_index(
        drop=True
    )


def _plant_plan_inputs(frames: dict[str, pd.DataFrame], seed: int) -> dict[str, pd.DataFrame]:
    """Cases 14 and 15: list prices appended to adjustments (earlier rows unchanged), and the pins table."""
    prices = _list_prices(frames, seed)
    pins = _pins(frames, prices, seed)
    return {**frames, "adjustments": pd.concat([frames["adjustments"], prices], ignore_index=True), "pins": pins}


# the optional products column `product_family` (a level above the product for hierarchy.upper_levels and a
# seasonal_group); written last, after every draw, so no other number of the scenario changes
PRODUCT_FAMILY = {
    "DRIP": "drip_irrigation", "FITT": "hose_fittings", "FERT": "fertiliser", "FILT": "filtration",
    "TIMR": "irrigation_timers", "SPRK": "sprinklers", "FROST": "frost_protection", "PART": "spare_parts",
}


def generate(seed: int = DEFAULT_SEED) -> dict[str, pd.DataFrame]:
    """The demo scenario's input tables, every cell as text ('' = blank), as written to CSV."""
    frames, _ = _plant_shortages(*_build(seed), seed)
    frames = _plant_plan_inputs(frames, seed)
    products = frames["products"]
    family = products["product"].str.split("-").str[0].map(PRODUCT_FAMILY)
    return {**frames, "products": products.assign(product_family=family)}


def planted_cases(seed: int = DEFAULT_SEED) -> pd.DataFrame:
    """Where each planted special case sits: case, product, site, customer, period_start, detail."""
    _, planted = _plant_shortages(*_build(seed), seed)
    return planted


def write(folder: Path, seed: int = DEFAULT_SEED) -> list[Path]:
    """Write the input CSV files of `FILES` into `folder`; return their paths."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    frames = generate(seed)
    paths = []
    for key, name in FILES.items():
        path = folder / name
        frames[key].to_csv(path, index=False, lineterminator="\n")
        paths.append(path)
    return paths


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(prog="python -m pipelines.demo_data", description=__doc__.splitlines()[0])
    parser.add_argument("--out", type=Path, default=Path("data/demo"), help="folder to write (default data/demo)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"random seed (default {DEFAULT_SEED})")
    args = parser.parse_args(argv)
    for path in write(args.out, args.seed):
        rows = sum(1 for _ in path.open()) - 1
        print(f"{path}: {rows} rows, {path.stat().st_size} bytes")


if __name__ == "__main__":
    main()
