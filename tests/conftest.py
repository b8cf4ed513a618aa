"""Shared builders for small hand-made stage inputs.

Each fixture returns a function that turns a few tuples into a frame validated
against the stage's pandera model, so a test reads as its data and nothing else.
Dates are ISO strings; `None` is a blank cell.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.config import parse_config
from pipelines.schemas import CleanedHistory, CustomerSpans, LifecycleHistory, Products, RawHistory, ShareTable


def _raw_history(rows):
    """rows: (product, site, customer, period_start, quantity), all text as written."""
    frame = pd.DataFrame(rows, columns=["product", "site", "customer", "period_start", "quantity"])
    frame.insert(0, "source_row", np.arange(1, len(frame) + 1))
    frame.insert(0, "source_file", "history.csv")
    return RawHistory.validate(frame)


def _products(rows):
    """rows: (product, product_class[, active_from[, active_to[, successor]]])."""
    full = [tuple(r) + (None,) * (5 - len(r)) for r in rows]
    frame = pd.DataFrame(full, columns=["product", "product_class", "active_from", "active_to", "successor"])
    frame["successor"] = frame["successor"].astype(object)
    return Products.validate(frame)


def _spans(rows):
    """rows: (product, site, customer[, active_from[, active_to[, reference_customer[, scale[, initial_share]]]]])."""
    columns = [
        "product",
        "site",
        "customer",
        "active_from",
        "active_to",
        "reference_customer",
        "scale",
        "initial_share",
    ]
    full = [tuple(r) + (None,) * (8 - len(r)) for r in rows]
    frame = pd.DataFrame(full, columns=columns)
    frame["reference_customer"] = frame["reference_customer"].astype(object)
    frame[["scale", "initial_share"]] = frame[["scale", "initial_share"]].astype(float)
    return CustomerSpans.validate(frame)


def _config(classes=None, **sections):
    """A planning config; `classes` defaults to one class 'a' with a 4-period pooled window."""
    data = {"product_classes": classes or {"a": {"window": 4}}}
    data.update(sections)
    return parse_config(data)


def _cleaned(rows):
    """rows: (product, site, customer, period_start, quantity) as cleaned periods."""
    frame = pd.DataFrame(rows, columns=["product", "site", "customer", "period_start", "quantity"])
    frame["period_start"] = pd.to_datetime(frame["period_start"])
    frame["quantity"] = frame["quantity"].astype(float)
    frame["raw_quantity"] = frame["quantity"]
    frame["lines"] = 1
    frame["filled"] = False
    frame["corrected"] = False
    frame["shortage"] = False
    return CleanedHistory.validate(frame)


def _history(rows):
    """rows: (product, site, customer, period_start, quantity[, origin[, source_product[, source_customer[,
    shortage]]]]).
    """
    out = []
    for r in rows:
        product, site, customer, start, qty = r[:5]
        origin = r[5] if len(r) > 5 else "own"
        source_product = r[6] if len(r) > 6 else product
        source_customer = r[7] if len(r) > 7 else customer
        shortage = r[8] if len(r) > 8 else False
        out.append((product, site, customer, start, float(qty), origin, source_product, source_customer, shortage))
    frame = pd.DataFrame(
        out,
        columns=[
            "product",
            "site",
            "customer",
            "period_start",
            "quantity",
            "origin",
            "source_product",
            "source_customer",
            "shortage",
        ],
    )
    frame["period_start"] = pd.to_datetime(frame["period_start"])
    return LifecycleHistory.validate(frame)


SHARE_TABLE_COLUMNS = [
    "product", "site", "customer", "cycle_date", "product_class", "share", "history_share", "method", "window",
    "window_used", "window_start", "fallback", "child_volume", "parent_volume", "lifecycle_rule",
    "first_active_period", "last_active_period", "own_periods", "reference_customer", "scale", "initial_share",
    "lifecycle_detail",
]


def _share_table(rows, cycle="2026-02-02", horizon=3):
    """A share table for a weekly cycle.

    rows: (product, site, customer, share[, window_used[, lifecycle]]), lifecycle a dict
    with any of: rule, history_share (default share), first, last (ISO weeks; default the
    whole horizon), reference_customer, scale, initial_share, own_periods.
    window_used 0 means an even fallback; the configured window is 4.
    """
    from pipelines.calendar import horizon_starts, shift_periods

    cycle = pd.Timestamp(cycle)
    starts = horizon_starts(cycle, horizon, "week")
    out = []
    for r in rows:
        product, site, customer, share = r[:4]
        used = r[4] if len(r) > 4 else 4
        life = r[5] if len(r) > 5 else {}
        out.append(
            (
                product,
                site,
                customer,
                cycle,
                "a",
                share,
                life.get("history_share", share),
                "pooled",
                4,
                used,
                shift_periods(cycle, -(used or 4), "week"),
                "even" if used == 0 else "none",
                0.0,
                0.0,
                life.get("rule", "none"),
                pd.Timestamp(life.get("first", starts[0])),
                pd.Timestamp(life.get("last", starts[-1])),
                life.get("own_periods", 13),
                life.get("reference_customer"),
                life.get("scale", np.nan),
                life.get("initial_share", np.nan),
                "",
            )
        )
    return ShareTable.validate(pd.DataFrame(out, columns=SHARE_TABLE_COLUMNS))


def _children(rows):
    """rows: (product, site, customer[, product_class]); class defaults to 'a'."""
    full = [tuple(r) + ("a",) * (4 - len(r)) for r in rows]
    return pd.DataFrame(full, columns=["product", "site", "customer", "product_class"])


def _lines_in_key_runs(rows):
    """Raw lines from rows (source_file, product, site, customer, period_start, quantity), numbered in order and
    validated, each key column holding one object per distinct key: the lines come in runs of one key, as a
    reader gives them, so cleansing takes its runs path."""
    from pipelines import keys

    raw = pd.DataFrame(rows, columns=["source_file", "product", "site", "customer", "period_start", "quantity"])
    raw.insert(1, "source_row", np.arange(1, len(raw) + 1))
    raw = RawHistory.validate(raw)
    for c in keys.LEAF:
        raw[c] = raw[c].map({v: v for v in raw[c].unique()}).astype(object)
    return raw


@pytest.fixture
def make_raw():
    return _raw_history


@pytest.fixture
def make_key_runs():
    return _lines_in_key_runs


@pytest.fixture
def make_products():
    return _products


@pytest.fixture
def make_spans():
    return _spans


@pytest.fixture
def make_config():
    return _config


@pytest.fixture
def make_cleaned():
    return _cleaned


@pytest.fixture
def make_history():
    return _history


@pytest.fixture
def make_children():
    return _children


@pytest.fixture
def make_share_table():
    return _share_table
