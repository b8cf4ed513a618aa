"""Explain one leaf value: how the forecast of product x site x customer was made, from the stored tables of one cycle.

`explain_leaf(tables, product, site, customer, period=None)` reads only what
the cycle stored and tells it in the order the cycle made it:

1. the history share: window (configured, used, dates), share method (any
   of `pipelines.vocabulary.ShareMethod`, Gross & Sohl 1990), fallback, the
   customer's and the parent's volume in the window;
2. the lifecycle rule (`share_tables.lifecycle_rule`: phase-in / phase-out,
   reference customer and scale, initial share, awaiting history), the active
   periods and the base share; what the lifecycle stage moved for this leaf
   (`lifecycle_audit`);
3. the corrections to its history (`history_corrections`, counted by rule,
   including those on a retired product's history mapped to it when
   `lifecycle_history` is given);
4. the parent forecast: model and its parameters (`forecast_models`), demand
   class (Syntetos, Boylan & Croston 2005), strategy and the grains its models
   ran at, and how the strategy was decided (the stored `strategy_choice`);
5. the result: with a top-down split, period share x parent forecast = leaf
   forecast, with the numbers; with another strategy, the leaf's own or
   reconciled forecast and the proportion of the parent it came to. With
   `period`, that period in words; without, one line per horizon period.

An unknown product, site, customer or period raises `UnknownKeyError` naming
the part that did not match and the close matches (the sites of the product,
the customers of the product x site, the horizon's periods).
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping

import numpy as np
import pandas as pd

from pipelines.calendar import period_start
from pipelines.errors import PlanningError, UnknownKeyError
from pipelines.explain_sections import (
    as_share,
    corrections_section,
    day,
    forecast_section,
    interval_section,
    leaf_rows,
    lifecycle_section,
    qty,
    share_section,
)
from pipelines.vocabulary import Basis
from pipelines.vocabulary_text import FORECAST_BASIS_TEXT, LIFECYCLE_RULE_TEXT, SHARE_METHOD_TEXT, ZERO_REASON_TEXT

REQUIRED_TABLES = ("share_tables", "reinitialized_target", "parent_forecast", "statistical_forecast")
OPTIONAL_TABLES = (
    "forecast_models",
    "history_corrections",
    "lifecycle_audit",
    "cycle_calendar",
    "lifecycle_history",
    "strategy_choice",
)
LISTED = 30  # names listed at most in an error
RELATIVE_TOLERANCE = 1e-6  # share x parent against the stored leaf forecast

METHODS = SHARE_METHOD_TEXT
LIFECYCLE_RULES = LIFECYCLE_RULE_TEXT
ZERO_REASONS = ZERO_REASON_TEXT
BASES = FORECAST_BASIS_TEXT


def _nearest(value: str, candidates, n: int = 5) -> list[str]:
    """Close matches of `value`, case-insensitive, in the candidates' own spelling."""
    by_lower: dict[str, str] = {}
    for c in sorted(map(str, candidates)):
        by_lower.setdefault(c.lower(), c)
    return [by_lower[m] for m in difflib.get_close_matches(value.lower(), list(by_lower), n=n, cutoff=0.6)]


def _listing(values) -> str:
    values = sorted(map(str, values))
    shown = ", ".join(values[:LISTED])
    return shown + (f" ... and {len(values) - LISTED} more" if len(values) > LISTED else "")


def _unknown(part: str, value: str, where: str, candidates, extra: str = "") -> UnknownKeyError:
    close = _nearest(value, candidates)
    text = f"{part} {value!r} is not {where} in the stored cycle."
    text += f" Close matches: {', '.join(close)}." if close else " No close match."
    text += f" {part.capitalize()}s there ({len(set(candidates))}): {_listing(set(candidates))}."
    if extra:
        text += f" {extra}"
    text += " Check the spelling, or whether the key is in this cycle's customer_spans and products files."
    return UnknownKeyError(text)


def find_leaf(shares: pd.DataFrame, product: str, site: str, customer: str) -> pd.Series:
    """The share-table row of the leaf; `UnknownKeyError` naming the first part that does not match."""
    of_product = shares[shares["product"] == product]
    if of_product.empty:
        raise _unknown("product", product, "a product of the share table", shares["product"].unique())
    of_site = of_product[of_product["site"] == site]
    if of_site.empty:
        elsewhere = shares.loc[shares["site"] == site, "product"].unique()
        extra = f"Site {site} has other products: {_listing(elsewhere)}." if len(elsewhere) else ""
        raise _unknown("site", site, f"a site of product {product}", of_product["site"].unique(), extra)
    row = of_site[of_site["customer"] == customer]
    if row.empty:
        other = shares[(shares["customer"] == customer)]
        extra = ""
        if len(other):
            pairs = [f"{p} x {s}" for p, s in zip(other["product"], other["site"], strict=False)]
            extra = f"Customer {customer} is a customer of: {_listing(pairs)}."
        raise _unknown("customer", customer, f"a customer of {product} x {site}", of_site["customer"].unique(), extra)
    if len(row) > 1:
        cycles = ", ".join(sorted(day(d) for d in row["cycle_date"].unique()))
        raise PlanningError(
            f"the share table holds {len(row)} rows for {product} x {site} x {customer} (cycles {cycles}); "
            f"pass the tables of one cycle only (filter on the cycle date first)."
        )
    return row.iloc[0]


def _period_kind(tables: Mapping[str, pd.DataFrame], starts: pd.Series) -> str:
    calendar = tables.get("cycle_calendar")
    if calendar is not None and len(calendar):
        return str(calendar["period"].iloc[0])
    gaps = np.diff(np.sort(pd.DatetimeIndex(starts.unique()).values)).astype("timedelta64[D]").astype(int)
    return "week" if len(gaps) == 0 or gaps.min() == 7 else "month"


def _horizon(tables: Mapping[str, pd.DataFrame], product: str, site: str, customer: str) -> pd.DataFrame:
    """Per horizon period of the leaf: share, zero-share reason, parent forecast and its zero reason, leaf
    forecast, basis.
    """
    target = leaf_rows(tables["reinitialized_target"], product, site, customer)
    leaf = leaf_rows(tables["statistical_forecast"], product, site, customer)
    parent = leaf_rows(tables["parent_forecast"], product, site)
    for name, rows in (("reinitialized_target", target), ("statistical_forecast", leaf), ("parent_forecast", parent)):
        if rows.empty:
            raise PlanningError(
                f"{name} has no row for {product} x {site}{'' if name == 'parent_forecast' else ' x ' + customer} "
                f"although the "
                f"share table has the customer; the tables are of different cycles or {name} is stale. "
                f"Rematerialize {name} and the assets after it."
            )
    out = target[["period_start", "share", "target", "parent_baseline", "zero_reason"]]
    out = out.rename(columns={"zero_reason": "zero_share_reason"})  # the parent forecast's own zero_reason joins below
    out = out.merge(
        parent[["period_start", "forecast", "zero_reason"]].rename(columns={"forecast": "parent_forecast"}),
        on="period_start",
        how="outer",
    )
    leaf = leaf[["period_start", "forecast", "basis"]].rename(columns={"forecast": "leaf_forecast"})
    out = out.merge(leaf, on="period_start", how="outer")
    return out.sort_values("period_start").reset_index(drop=True)


def _result_text(r) -> str:
    """One period in words: how share, parent forecast and leaf forecast relate."""
    share, parent, leaf = float(r.share), float(r.parent_forecast), float(r.leaf_forecast)
    if pd.notna(r.zero_share_reason) and (pd.notna(r.zero_reason) or leaf == 0):
        why = ZERO_REASONS.get(str(r.zero_share_reason), str(r.zero_share_reason))
        return (
            f"every share of the parent is 0 in this period ({r.zero_share_reason}: {why}), so the forecast "
            f"is 0: leaf forecast {qty(leaf)}."
        )
    basis = str(r.basis)
    if basis in (Basis.REINITIALIZED_TARGET, Basis.PERIOD_SHARE):
        text = f"leaf forecast = period share x parent forecast = {share:.6f} x {qty(parent)} = {qty(share * parent)}"
        if abs(share * parent - leaf) > RELATIVE_TOLERANCE * max(abs(leaf), 1.0):
            implied = leaf / parent if parent else float("nan")
            return (
                text
                + f"; but the stored leaf forecast is {qty(leaf)}, a proportion of {implied:.6f} ({BASES[basis]})."
            )
        return text + f", as stored ({BASES[basis]})."
    implied = leaf / parent if parent else float("nan")
    proportion = "" if np.isnan(implied) else f", {100 * implied:.2f} % of the parent forecast {qty(parent)}"
    return (
        f"leaf forecast {qty(leaf)}{proportion}: {BASES.get(basis, basis)} (the period share from history "
        f"was {share:.6f})."
    )


def share_changes(horizon: pd.DataFrame, siblings: pd.DataFrame, limit: int = 10) -> list[str]:
    """A line per horizon period where the leaf's period share changes, naming the customers that start or end there."""
    share = horizon["share"].to_numpy(dtype=float)
    starts = horizon["period_start"].reset_index(drop=True)
    first = pd.to_datetime(siblings["first_active_period"])
    last = pd.to_datetime(siblings["last_active_period"])
    out = []
    for i in (np.flatnonzero(np.abs(np.diff(share)) > 1e-12) + 1)[:limit]:  # the few change points, not the periods
        at, before = starts[i], starts[i - 1]
        begin = sorted(siblings.loc[(first == at).to_numpy(), "customer"])
        end = sorted(siblings.loc[(last == before).to_numpy(), "customer"])
        who = []
        if begin:
            who.append(f"{', '.join(begin)} start{'s' if len(begin) == 1 else ''} in it")
        if end:
            who.append(f"{', '.join(end)} ended {day(before)}")
        reason = "; ".join(who) or (
            str(horizon["zero_share_reason"].iloc[i])
            if pd.notna(horizon["zero_share_reason"].iloc[i])
            else "the active customers changed"
        )
        out.append(f"   From {day(at)} the share is {share[i]:.6f} (was {share[i - 1]:.6f}): {reason}.")
    return out


def _table(horizon: pd.DataFrame) -> list[str]:
    head = f"   {'period':<10}  {'share':>9}  {'parent forecast':>15}  {'leaf forecast':>13}  how"
    lines = [head, "   " + "-" * (len(head) - 3)]
    for r in horizon.itertuples(index=False):
        how = str(r.basis)
        if pd.notna(r.zero_share_reason):
            how += f", all shares 0: {r.zero_share_reason}"
        elif r.share == 0:
            how += ", customer not active or no share"
        lines.append(
            f"   {day(r.period_start):<10}  {r.share:>9.6f}  {qty(r.parent_forecast):>15}  "
            f"{qty(r.leaf_forecast):>13}  {how}"
        )
    lines.append(
        f"   {'total':<10}  {'':>9}  {qty(horizon['parent_forecast'].sum()):>15}  "
        f"{qty(horizon['leaf_forecast'].sum()):>13}"
    )
    return lines


def explain_leaf(tables: Mapping[str, pd.DataFrame], product: str, site: str, customer: str, period=None) -> str:
    """How the forecast of one leaf (product x site x customer) was made, in words and numbers.

    tables: the stored tables of one cycle by name; required REQUIRED_TABLES,
    used when present OPTIONAL_TABLES. period: a date inside a horizon period
    (a period start, an ISO string or a Timestamp); None = one line per horizon
    period. Raises `UnknownKeyError` for a key or period not in the cycle.
    """
    missing = [t for t in REQUIRED_TABLES if t not in tables or tables[t] is None]
    if missing:
        raise PlanningError(
            f"explain needs the tables {', '.join(missing)} of the cycle; materialize the cycle first (make demo)."
        )
    product, site, customer = str(product).strip(), str(site).strip(), str(customer).strip()
    row = find_leaf(tables["share_tables"], product, site, customer)
    horizon = _horizon(tables, product, site, customer)
    kind = _period_kind(tables, horizon["period_start"])
    cycle = pd.Timestamp(row["cycle_date"])
    parent = leaf_rows(tables["parent_forecast"], product, site)

    lines = [
        f"How the forecast of {product} x {site} x {customer} was made",
        f"Cycle {day(cycle)}, product class {row['product_class']}, {len(horizon)} {kind}s ahead "
        f"({day(horizon['period_start'].min())} to {day(horizon['period_start'].max())}).",
        "",
    ]
    lines += share_section(row, kind) + [""]
    siblings = leaf_rows(tables["share_tables"], product, site)
    lines += lifecycle_section(row, siblings, tables.get("lifecycle_audit")) + [""]
    lines += corrections_section(row, tables.get("history_corrections"), tables.get("lifecycle_history")) + [""]
    lines += forecast_section(row, horizon, parent, tables.get("forecast_models"), tables.get("strategy_choice")) + [
        ""
    ]

    if period is None:
        lines.append(
            "5. Result per horizon period (share = the period share: base shares of the customers active in it, "
            "renormalised)"
        )
        lines += _table(horizon)
        changes = share_changes(horizon, siblings)
        if changes:
            lines += [
                "",
                "   The share changes inside the horizon where the customers active in the period change:",
            ] + changes
        lines.append(
            "   With a top-down split (basis reinitialized_target or period_share), leaf forecast = share x "
            "parent forecast."
        )
    else:
        try:
            asked = pd.Timestamp(period)
        except (TypeError, ValueError) as err:
            raise UnknownKeyError(
                f"period {period!r} is not a date; give an ISO date such as {day(horizon['period_start'].iloc[0])}."
            ) from err
        start = period_start(pd.Series([asked]), kind).iloc[0]
        hit = horizon[horizon["period_start"] == start]
        if hit.empty:
            raise UnknownKeyError(
                f"period {day(asked)} (the {kind} starting {day(start)}) is not in the horizon of cycle "
                f"{day(cycle)}, "
                f"which runs from {day(horizon['period_start'].min())} to {day(horizon['period_start'].max())}; "
                f"give a date inside it, or leave the period out for the whole horizon."
            )
        r = next(hit.itertuples(index=False))
        lines.append(f"5. Result in the {kind} of {day(start)}")
        lines.append(
            f"   Period share: {as_share(float(r.share))}, the base shares of the customers active in this {kind}, "
            "renormalised."
        )
        lines.append(f"   Parent forecast: {qty(float(r.parent_forecast))}.")
        base = float(row["share"])
        if abs(float(r.share) - base) > 1e-12:
            lines.append(
                f"   It differs from the base share {base:.6f} because not every customer of the parent is "
                "active in this "
                f"{kind} (or a new customer's rule applies in it)."
            )
        text = _result_text(r)
        lines.append(f"   {text[0].upper()}{text[1:]}")
    asked = None if period is None else start
    strategy = parent["strategy"].iloc[0] if "strategy" in parent.columns else None
    lines += interval_section(leaf_rows(tables["statistical_forecast"], product, site, customer), strategy, asked)
    return "\n".join(lines) + "\n"
