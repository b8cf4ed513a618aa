"""Cleansing a block of leaves at a time: the dense leaf x period matrices of rules 2-7 of
`pipelines.stages.cleaned_history`, held for one block only.

Every rule of the cleansing is per series (a leaf's own periods), except the
shortage flags, which go from a product x site to its children through a small
parent x period matrix. So the leaves are cut into blocks of consecutive leaf
codes, each block's lines are bucketed into dense float64 matrices, the rules
run on them, and only the kept cells (compact arrays) and the correction rows
leave the block. The memory of the dense part is bounded by `block_cells`
(leaf x period cells per block), whatever the number of leaves; the results do
not depend on the cut: each value is computed from its own row alone, lines
are summed in the order they were read, and the correction rows are sorted by
key at the end exactly as before.

The arithmetic stays float64 (the published numbers: medians, limits and
replacements in `history_corrections` rounded to 6 places; float32 would move
them), which costs nothing at scale since only one block is dense at a time.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipelines.calendar import period_ordinal, period_start, season_length
from pipelines.engines.cleansing import correction_rows
from pipelines.engines.outliers import CHUNK_CELLS, judge_values, rolling_median, rule_parameters, seasonal_component
from pipelines.keys import PARENT, factorize, lookup

ONE_PASS_WINDOW = 13  # the default outlier window: a history of n x t cells takes the one pass from n x t x 13
BLOCK_CELLS = 2_000_000  # leaf x period cells per block: about 16 MB per float64 matrix, some 20 held at once


def stable_order(codes: np.ndarray) -> np.ndarray:
    """`np.argsort(codes, kind="stable")`, made from the runs of equal codes when they are few (a leaf's lines
    are read together): the runs sorted stably by code, then each run's positions in place, in order."""
    n = len(codes)
    starts = np.flatnonzero(np.r_[True, codes[1:] != codes[:-1]]) if n else np.zeros(0, dtype=np.int64)
    if len(starts) * 4 > n:
        return np.argsort(codes, kind="stable")
    lengths = np.diff(np.append(starts, n))
    run_order = np.argsort(codes[starts], kind="stable")
    lengths = lengths[run_order]
    return np.arange(n) + np.repeat(starts[run_order] - (np.cumsum(lengths) - lengths), lengths)


@dataclass
class Lines:
    """The used lines, grouped by leaf code (stable: lines of a leaf keep the order they were read)."""

    leaf: np.ndarray  # int64 leaf code per line, ascending
    col: np.ndarray  # int32 grid column (period ordinal - first ordinal)
    quantity: np.ndarray  # float64

    @classmethod
    def of(cls, leaf_code: np.ndarray, col: np.ndarray, quantity: np.ndarray) -> Lines:
        order = stable_order(leaf_code)
        return cls(leaf_code[order], col[order], quantity[order])

    def block(self, a: int, b: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        lo, hi = np.searchsorted(self.leaf, [a, b])
        return self.leaf[lo:hi] - a, self.col[lo:hi], self.quantity[lo:hi]


CELL_COLUMNS = (  # the kept cells' columns and their types, in the order of cleaned_history
    ("period_start", np.dtype("datetime64[ns]")),
    ("quantity", np.float64),
    ("raw_quantity", np.float64),
    ("lines", np.int64),
    ("filled", bool),
    ("corrected", bool),
    ("shortage", bool),
)


@dataclass
class Blocks:
    """What leaves the blocks: the kept cells (in leaf code, then period order), the corrections, the figures.

    Each block writes its kept cells straight into one array per column, allocated once for every leaf x
    period cell (`kept` <= that, so the arrays are never grown; pages never written cost no memory), and
    counts them per leaf: no piece per block to join, no leaf code per cell."""

    columns: dict = field(default_factory=dict)  # name -> array of n_leaves x t cells, the first `size` written
    kept: np.ndarray | None = None  # kept cells per leaf (int64)
    size: int = 0
    corrections: list = field(default_factory=list)
    seasonal_series: dict = field(default_factory=dict)
    flagged: np.ndarray | None = None  # children flagged per parent and period (shortage records)

    @classmethod
    def sized(cls, n_leaves: int, t: int) -> Blocks:
        return cls(
            columns={name: np.empty(n_leaves * t, dtype=dtype) for name, dtype in CELL_COLUMNS},
            kept=np.zeros(n_leaves, dtype=np.int64),
        )

    def cells(self) -> dict[str, np.ndarray]:
        """The kept cells' columns (views of the written part of each array)."""
        return {name: self.columns[name][: self.size] for name, _ in CELL_COLUMNS}


@dataclass(frozen=True)
class Grid:
    """The period grid and each leaf's fill range and class (all leaves; small: a few numbers per leaf)."""

    t: int  # periods: first history period .. cycle - 1
    start: np.ndarray  # first grid column filled, per leaf
    end: np.ndarray  # last grid column filled, per leaf
    leaf_class: np.ndarray  # product class per leaf (object)
    parent: np.ndarray  # parent code per leaf
    short_by_parent: np.ndarray  # bool (n_parents, t): a shortage recorded on the parent in that period
    period_ns: np.ndarray  # datetime64[ns] (t,): the start of each grid column


def shortage_grid(
    shortages: pd.DataFrame | None, leaves: pd.DataFrame, first_ord: int, t: int, period: str
) -> tuple[np.ndarray, np.ndarray, pd.DataFrame, tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """The shortage records on the parent x period grid, for flagging a block of leaves at a time.

    Returns (parent code per leaf, bool (n_parents, t) of recorded shortages,
    the records bucketed to their period, and per record its parent row, grid
    column and whether it lies on the grid). A block's flagged cells are
    `by_parent[parent[leaves of the block]] & keep`; `shortage_records` counts
    the children each record flagged.
    """
    n = len(leaves)
    if shortages is None or len(shortages) == 0:
        records = pd.DataFrame(
            {
                "product": pd.Series(dtype=object),
                "site": pd.Series(dtype=object),
                "period_start": pd.Series(dtype="datetime64[ns]"),
            }
        )
        nothing = np.zeros(0, dtype=np.int64)
        return np.zeros(n, dtype=np.int64), np.zeros((1, t), dtype=bool), records, (nothing, nothing, nothing > 0)
    dates = pd.to_datetime(shortages["period_start"], errors="coerce")
    records = shortages.loc[dates.notna().to_numpy(), PARENT].astype(str).reset_index(drop=True)
    records["period_start"] = period_start(dates[dates.notna()].reset_index(drop=True), period)
    records = records.drop_duplicates().reset_index(drop=True)
    col = period_ordinal(records["period_start"], period) - first_ord
    parent_code, parents = factorize(leaves, PARENT) if n else (np.zeros(0, np.int64), pd.DataFrame(columns=PARENT))
    ppos = lookup(records, PARENT, parents) if n else np.full(len(records), -1)
    ok = (ppos >= 0) & (col >= 0) & (col < t)
    by_parent = np.zeros((max(len(parents), 1), t), dtype=bool)
    by_parent[ppos[ok], col[ok]] = True
    return parent_code, by_parent, records, (ppos, col, ok)


def shortage_records(records: pd.DataFrame, where: tuple, flagged: np.ndarray) -> pd.DataFrame:
    """The records of `shortage_grid` with the children each flagged (`flagged`: count per parent and column)."""
    ppos, col, ok = where
    children = np.zeros(len(records), dtype=np.int64)
    children[ok] = flagged[ppos[ok], col[ok]]
    records = records.assign(children=children)
    return records.sort_values(PARENT + ["period_start"], kind="stable").reset_index(drop=True)


def clean_blocks(used, first_ord: int, grid: Grid, settings, block_cells: int = BLOCK_CELLS) -> Blocks:
    """Rules 2-7 of the cleansing (bucketing to shortage handling), a block of leaves at a time, on the used
    lines of `cleansing.reject_lines` (`used`; grid column = period ordinal - `first_ord`)."""
    n, t = len(grid.start), grid.t
    out = Blocks.sized(n, t)
    if _one_pass(n, t, grid, settings):
        from pipelines.engines.cleansing_rows import clean_leaf_rows  # numba loaded only for a large history

        clean_leaf_rows(used, first_ord, grid, settings, out, block_cells)
        return out
    col = used.ordinal  # the used lines gathered in line order, then grouped by leaf
    col -= first_ord
    lines = Lines.of(used.leaf_code, col.astype(np.int32, copy=False), used.quantity)
    del col
    step = max(1, block_cells // max(t, 1))
    flagged = np.zeros(grid.short_by_parent.shape, dtype=np.int64)
    for a in range(0, n, step):  # a loop over blocks of leaves, not over series
        b = min(n, a + step)
        _clean_block(lines.block(a, b), a, b, grid, settings, out, flagged)
    out.flagged = flagged
    return out


def _one_pass(n: int, t: int, grid: Grid, settings) -> bool:
    """Whether the leaf rows are cleaned in one compiled pass each (`cleansing_rows`): a history whose windows
    exceed one numpy chunk (`outliers.CHUNK_CELLS`, the size the compiled sweep takes a class matrix from) and
    classes that pass takes (no seasonal adjustment, shortages excluded). Both paths give the same tables."""
    if n * t * ONE_PASS_WINDOW <= CHUNK_CELLS:
        return False
    from pipelines.engines.cleansing_rows import takes

    return takes(grid.leaf_class, settings)


def _clean_block(block, a: int, b: int, grid: Grid, settings, out: Blocks, flagged: np.ndarray) -> None:
    leaf, col, qty = block
    t, nb = grid.t, b - a
    cell = leaf * t + col
    net = np.bincount(cell, weights=qty, minlength=nb * t).reshape(nb, t)
    lines = np.bincount(cell, minlength=nb * t).reshape(nb, t)
    observed = lines > 0
    cols = np.arange(t)
    keep = observed | ((cols >= grid.start[a:b, None]) & (cols <= grid.end[a:b, None]))

    # returns: negative net periods to zero
    values = np.where(keep, net, np.nan)
    negative = observed & (net < 0)
    if negative.any():  # the rows read the net values before they are set to zero
        zero = np.broadcast_to(0.0, values.shape)
        out.corrections.append(
            correction_rows(negative, values, zero, "negative_net_to_zero", {"rule": "net_then_zero"}, np.arange(a, b))
        )
        values[negative] = 0.0
    corrected = negative

    # shortage periods: flagged on every child of the product x site
    short = grid.short_by_parent[grid.parent[a:b]] & keep
    si, sj = np.nonzero(short)
    np.add.at(flagged, (grid.parent[a + si], sj), 1)

    # per product class: outliers on the non-shortage periods, then the shortage rule
    block_class = grid.leaf_class[a:b]
    for name in sorted(pd.unique(block_class)):  # a loop over product classes, not over series
        rows = np.flatnonzero(block_class == name)
        x = _class_rules(values[rows], short[rows], name, rows + a, settings, out, corrected, rows)
        values[rows] = x

    # the kept cells, row by row: one flat gather per column, into the outputs (mode "clip": `at` is in range,
    # and numpy writes to `out` directly instead of through a buffer)
    at = np.flatnonzero(keep)
    lo, hi = out.size, out.size + len(at)
    cells = out.columns
    grid.period_ns.take(at % t, out=cells["period_start"][lo:hi], mode="clip")
    values.ravel().take(at, out=cells["quantity"][lo:hi], mode="clip")
    net.ravel().take(at, out=cells["raw_quantity"][lo:hi], mode="clip")
    lines.ravel().take(at, out=cells["lines"][lo:hi], mode="clip")
    filled = observed.ravel().take(at, out=cells["filled"][lo:hi], mode="clip")
    np.logical_not(filled, out=filled)
    corrected.ravel().take(at, out=cells["corrected"][lo:hi], mode="clip")
    short.ravel().take(at, out=cells["shortage"][lo:hi], mode="clip")
    out.kept[a:b] = np.count_nonzero(keep, axis=1)
    out.size = hi


def _class_rules(x, skip, name, leaf_index, settings, out: Blocks, corrected, rows) -> np.ndarray:
    """The class's outlier rule then its shortage rule on the rows `x` of one block; returns the new values."""
    pc = settings.product_class(name)
    rule = pc.outlier_rule(settings.cleansing)
    m = season_length(settings.calendar.period)
    if rule.seasonal_adjust == "auto" and pc.models.seasonal:
        s, adjusted, _ = seasonal_component(x, m, exclude=skip)
    else:  # no seasonal component: x - 0.0 and r + 0.0 are x and r + 0.0 as with a matrix of zeros
        s, adjusted = 0.0, np.zeros(len(x), dtype=bool)
    out.seasonal_series[name] = out.seasonal_series.get(name, 0) + int(adjusted.sum())
    # the seasonal figure of each correction (NaN, left out of its parameters, where a series is not adjusted)
    seasonal_figures = {"seasonal": np.where(adjusted[:, None], s, np.nan)} if adjusted.any() else {}
    params = rule_parameters(rule)

    if rule.rule != "none":
        j, after = judge_values(x, skip, rule, s)
        if j.flagged.any():
            out.corrections.append(
                correction_rows(
                    j.flagged, x, after, f"{rule.rule}_cap", params, leaf_index, j.figures | seasonal_figures, adjusted
                )
            )
            corrected[rows] |= j.flagged
            x = after
        del j

    if settings.cleansing.shortages == "fill_baseline" and skip.any():
        short_rows = np.flatnonzero(skip.any(axis=1))  # only the series a shortage touches
        base = np.full(x.shape, np.nan)
        count = np.zeros(x.shape)
        base[short_rows], count[short_rows] = rolling_median(np.where(skip, np.nan, x - s)[short_rows], rule.window)
        filled = skip & ~np.isnan(base)
        if filled.any():
            after = np.where(filled, np.clip(base + s, 0.0, None), x)
            fill_params = {"rule": "fill_baseline", "window": rule.window, "seasonal_adjust": rule.seasonal_adjust}
            figures = {"median": base, "periods": count} | seasonal_figures
            out.corrections.append(
                correction_rows(filled, x, after, "shortage_fill", fill_params, leaf_index, figures, adjusted)
            )
            corrected[rows] |= filled
            x = after
    return x


def class_summary(leaf_class: np.ndarray, settings, seasonal_series: dict) -> pd.DataFrame:
    """Per product class: the outlier rule used, its series and how many were seasonally adjusted."""
    summary = []
    for name in sorted(pd.unique(leaf_class)):
        rule = settings.product_class(name).outlier_rule(settings.cleansing)
        summary.append(
            {
                "product_class": name,
                **{"rule": rule.rule, **rule_parameters(rule)},
                "series": int((leaf_class == name).sum()),
                "seasonal_series": seasonal_series.get(name, 0),
            }
        )
    return pd.DataFrame(summary)
