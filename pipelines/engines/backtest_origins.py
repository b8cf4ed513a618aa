"""The backtest's data, made once a run and once per forecast origin, shared by every seasonality compared.

`backtest_series` codes the history once: the active children and their
parents, each real history row's series, period ordinal, quantity as the
cycle cleaned it and as recorded (raw). `origin_view` is what one origin saw
and is scored against: the raw history before it cleaned from those periods
alone (`pipelines.engines.origin_cleaning`), the series grids of both grains,
the leaves' demand classes, the actuals of the `h` periods from it (raw and
cleaned), the error scales and seasonal naive at each grain (the benchmark,
which no seasonality changes). `candidate_bases` are the period shares of
every share window x method candidate at the origin. None of these depend on
the seasonality a class is backtested with, so the backtest makes each once
per origin whatever the number of seasonalities it compares.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import ordinal_to_start, period_ordinal, season_length
from pipelines.engines.backtest_scores import CLEANED, RAW, Scales, dense_window, error_scales
from pipelines.engines.hierarchy import parent_sums
from pipelines.engines.models import demand_classes, run_model_groups
from pipelines.engines.origin_cleaning import ClassCleaning, clean_before, raw_quantities
from pipelines.engines.period_shares import period_shares
from pipelines.engines.series_grids import SeriesGrid, series_grid
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.share_tuning import candidate_name, candidate_settings
from pipelines.engines.shares import child_frame, compute_shares
from pipelines.keys import LEAF, PARENT, factorize, first_rows, lookup
from pipelines.vocabulary import ShareMethod


@dataclass(frozen=True)
class BacktestSeries:
    """The history coded once: children (n_children rows), parents, and the real history rows of active children.

    parent_of_child (n_children,); parent_class, child_class: class names;
    p_cls, c_cls: class codes in `classes` order; ok: (len(history),) the rows
    kept (real history of an active child); ccode, pcode, ords, qty, raw,
    shortage: per kept row; qty as the cycle cleaned it, raw as recorded.
    """

    children: pd.DataFrame
    parents: pd.DataFrame
    parent_of_child: np.ndarray
    parent_class: np.ndarray
    child_class: np.ndarray
    p_cls: np.ndarray
    c_cls: np.ndarray
    ok: np.ndarray
    ccode: np.ndarray
    pcode: np.ndarray
    ords: np.ndarray
    qty: np.ndarray
    raw: np.ndarray
    shortage: np.ndarray
    first_ord: int
    cycle_ord: int

    @property
    def n_parents(self) -> int:
        return len(self.parents)

    @property
    def n_children(self) -> int:
        return len(self.children)


def backtest_series(
    history: pd.DataFrame, children: pd.DataFrame, classes: list[str], period: str, cycle_date: pd.Timestamp,
    cleaned: pd.DataFrame | None,
) -> BacktestSeries:
    """Code `history` (lifecycle history) against `children` once; `cleaned`: the cycle's cleaned history, whose
    raw quantities the origins re-clean (None: the lifecycle history is both)."""
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    children = children.reset_index(drop=True)
    parent_of_child, parents = factorize(children, PARENT)
    child_class = children["product_class"].to_numpy()
    parent_class = child_class[first_rows(parent_of_child)]
    code = {name: i for i, name in enumerate(classes)}
    p_cls = np.array([code[c] for c in parent_class], dtype=np.int64) if len(parents) else np.zeros(0, np.int64)
    real = (history["origin"] != "reference").to_numpy()
    c_code = lookup(history, LEAF, children)
    ok = real & (c_code >= 0)
    ccode = c_code[ok]
    ords = period_ordinal(history["period_start"], period)[ok]
    qty = history["quantity"].to_numpy(float)[ok]
    raw = qty
    if cleaned is not None:
        found = raw_quantities(history, cleaned)[ok]
        raw = np.where(np.isfinite(found), found, qty)
    shortage = history["shortage"].to_numpy(bool)[ok] if "shortage" in history else np.zeros(len(qty), dtype=bool)
    return BacktestSeries(
        children, parents, parent_of_child, parent_class, child_class, p_cls, p_cls[parent_of_child], ok, ccode,
        parent_of_child[ccode], ords, qty, raw, shortage, int(ords.min()) if len(ords) else cycle_ord, cycle_ord,
    )


@dataclass(frozen=True)
class OriginView:
    """What one origin saw and is scored against (see the module docstring); per grain dicts `leaf` / `parent`."""

    date: pd.Timestamp
    p_grid: SeriesGrid
    c_grid: SeriesGrid
    demand: np.ndarray  # (n_children,) demand class of each leaf at the origin
    as_seen: pd.DataFrame  # the history with the quantities the origin saw (for its share tables)
    actual: dict[str, dict[str, np.ndarray]]  # grain -> basis (raw, cleaned) -> (n, h)
    scales: dict[str, Scales]
    bench: dict[str, np.ndarray]  # grain -> seasonal naive (n, h)


def seasonal_naive(grid: SeriesGrid, horizon: int, period: str, log=None, progress=None) -> np.ndarray:
    """Seasonal naive per series (naive where a series holds less than a season; 0 without history), >= 0."""
    sl = season_length(period)
    length = np.bincount(grid.series, minlength=grid.n_series)
    names = np.where(length > 0, "seasonal_naive", "zero").astype(object)
    season = np.where(length >= sl, sl, 1)
    return np.clip(run_model_groups(grid, names, season, horizon, log=log, progress=progress).forecast, 0, None)


def origin_view(
    data: BacktestSeries, history: pd.DataFrame, o: int, h: int, period: str, cleaning: Mapping[str, ClassCleaning],
    seasonal_classes: list[str], cleaned: bool, log: Callable[[str], None] | None = None, progress=None,
) -> OriginView:
    """The view of origin `o` (a period ordinal); `cleaned`: re-clean the raw history before it (else as stored)."""
    sl = season_length(period)
    seen = data.qty if not cleaned else clean_before(
        data.ccode, data.ords, data.raw, data.shortage, data.child_class, cleaning, o, sl
    )
    p_grid = series_grid(data.pcode, data.ords, seen, data.n_parents, o)
    c_grid = series_grid(data.ccode, data.ords, seen, data.n_children, o)
    as_seen_qty = history["quantity"].to_numpy(float).copy()
    as_seen_qty[data.ok] = seen
    leaf_actual = {RAW: dense_window(data.ccode, data.ords, data.raw, data.n_children, o, h)}
    leaf_actual[CLEANED] = dense_window(data.ccode, data.ords, data.qty, data.n_children, o, h)
    parent_actual = {b: parent_sums(a, data.parent_of_child, data.n_parents) for b, a in leaf_actual.items()}
    return OriginView(
        date=ordinal_to_start(np.array([o]), period)[0],
        p_grid=p_grid,
        c_grid=c_grid,
        demand=demand_classes(c_grid)[0],
        as_seen=history.assign(quantity=as_seen_qty),
        actual={"leaf": leaf_actual, "parent": parent_actual},
        scales={
            "leaf": error_scales(c_grid, data.child_class, seasonal_classes, period, h),
            "parent": error_scales(p_grid, data.parent_class, seasonal_classes, period, h),
        },
        bench={
            "parent": seasonal_naive(p_grid, h, period, log, progress),
            "leaf": seasonal_naive(c_grid, h, period, log, progress),
        },
    )


def candidate_bases(
    view: OriginView, children: pd.DataFrame, settings: ShareSettings, candidates: list[tuple[int, str]], h: int,
    classes_of: Mapping[str, set[str]] | None = None,
) -> dict[str, np.ndarray]:
    """Per candidate name: (n_children, h) the period shares the cycle would split by at this origin (per-period
    methods differ from the base share), each window x method computed once; `classes_of` (candidate name ->
    the classes that try it): a candidate fitting leaf models fits those classes' leaves only
    (`share_tuning.candidate_settings`)."""
    out: dict[str, np.ndarray] = {}
    share_lookup = None
    frame = child_frame(view.as_seen, children, settings, view.date)  # what no window or method changes, once
    # children_forecast first: its leaf fits start the model pool, whose start the other candidates then overlap
    for w, m in sorted(candidates, key=lambda c: c[1] != ShareMethod.CHILDREN_FORECAST):
        candidate = candidate_settings(settings, w, m, None if classes_of is None else classes_of[candidate_name(w, m)])
        shares = compute_shares(view.as_seen, children, candidate, view.date, frame)
        share_lookup = lookup(children, LEAF, shares) if share_lookup is None else share_lookup
        basis = period_shares(shares, candidate, view.date, None, view.as_seen, horizon=h)[0]
        out[candidate_name(w, m)] = basis[share_lookup]
    return {candidate_name(w, m): out[candidate_name(w, m)] for w, m in candidates}  # in the candidates' order
