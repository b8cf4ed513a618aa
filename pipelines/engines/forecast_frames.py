"""The forecast's horizon matrices, the strategies applied per parent, and its long frames.

Used by `pipelines.stages.statistical_forecast`: leaf x horizon matrices read
from a long leaf x period frame (targets, period shares), the children's
active periods, each parent period's `zero_reason`, each parent made coherent
by its own class's strategy (`pipelines.engines.hierarchy.coherent`), and the
long frames of fitted values and of the models' series keys.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.calendar import ordinal_to_start, period_ordinal
from pipelines.engines.base_forecasts import BaseForecasts
from pipelines.engines.hierarchy import BASIS, SOURCES, Coherent, coherent
from pipelines.engines.series_grids import SeriesGrid
from pipelines.keys import LEAF, PARENT, rows_in


def combine_strategies(
    strategy_of_parent: np.ndarray,
    base: BaseForecasts,
    parent_of_child: np.ndarray,
    basis: np.ndarray,
    active: np.ndarray | None = None,
) -> Coherent:
    """Each parent made coherent by its own strategy, on its active children (`hierarchy.coherent`)."""
    parent = np.zeros_like(base.parent_fc)
    leaf = np.zeros_like(base.leaf_fc)
    moved = np.zeros_like(base.parent_fc)
    source = np.zeros(leaf.shape, dtype=np.uint8)
    negatives = 0
    for strategy in pd.unique(strategy_of_parent):  # a handful of strategies, not a loop over series
        ps = strategy_of_parent == strategy
        cs = ps[parent_of_child]
        remap = np.cumsum(ps) - 1
        out = coherent(
            strategy,
            base.parent_fc[ps],
            base.leaf_fc[cs],
            remap[parent_of_child[cs]],
            basis[cs],
            None if base.parent_res is None else base.parent_res[ps],
            None if base.leaf_res is None else base.leaf_res[cs],
            None if active is None else active[cs],
        )
        parent[ps], leaf[cs], source[cs], moved[ps] = out.parent, out.leaf, out.source, out.moved
        negatives += out.negatives
    return Coherent(parent, leaf, source, negatives, moved)


def basis_column(
    source: np.ndarray, use_target: np.ndarray, labels: np.ndarray
) -> tuple[np.ndarray, pd.DataFrame]:
    """(the leaves' basis, (n_children, h) text, and its rows per basis, the table `value_counts` of the column
    would give: `basis`, `rows`, in text order). `source`: what each leaf came from, codes of
    `hierarchy.SOURCES` (`hierarchy.coherent`; code 0, "basis", where the parent was split by the basis); there
    `labels[0]` where `use_target`, else `labels[1]`.

    Each cell's word is taken from a table of the words by its code, and the rows are counted on the codes (a
    bincount), not by comparing or hashing every cell's text."""
    words = np.array([labels[0], labels[1], *SOURCES[1:]], dtype=object)
    code = source.astype(np.intp) + 1  # a source's code + 1; the basis (0) -> 1, labels[1], or below
    code[(source == BASIS) & use_target] = 0
    basis = words.take(code)
    counts: dict[str, int] = {}
    for word, rows in zip(words, np.bincount(code.ravel(), minlength=len(words)).tolist(), strict=True):
        if rows:
            counts[word] = counts.get(word, 0) + rows
    held = sorted(counts)
    return basis, pd.DataFrame(
        {"basis": np.array(held, dtype=object), "rows": np.array([counts[w] for w in held], dtype=np.int64)}
    )


def fitted_frame(
    grid: SeriesGrid, fitted: np.ndarray | None, keys: pd.DataFrame, grain: str, period: str
) -> pd.DataFrame:
    """Long frame of the grid rows that have a fitted value: keys, period_start, actual, fitted."""
    if fitted is None:
        fitted = np.full(len(grid.y), np.nan)
    ok = np.isfinite(fitted)
    out = keys.iloc[grid.series[ok]][LEAF].reset_index(drop=True)
    out.insert(0, "grain", grain)
    out["product_class"] = keys["product_class"].to_numpy()[grid.series[ok]]
    out["period_start"] = ordinal_to_start(grid.ordinal[ok], period)
    out["actual"] = grid.y[ok]
    out["fitted"] = fitted[ok]
    return out


def model_keys(models: pd.DataFrame, parents: pd.DataFrame, children: pd.DataFrame) -> pd.DataFrame:
    """The models' frame with each series' keys and product_class (parents with customer '') in place of `series`."""
    is_parent = (models["grain"] == "parent").to_numpy()
    keys = pd.concat(
        [parents.iloc[models["series"].to_numpy()[is_parent]][PARENT + ["product_class"]].assign(customer=""),
         children.iloc[models["series"].to_numpy()[~is_parent]][LEAF + ["product_class"]]],
        ignore_index=True,
    )
    return pd.concat([models.drop(columns="series").reset_index(drop=True), keys], axis=1)


def active_matrix(children: pd.DataFrame, starts: pd.DatetimeIndex, period: str) -> np.ndarray:
    """(n_children, horizon) bool: the child is active in the period (all True without the span columns)."""
    if not {"first_active_period", "last_active_period"} <= set(children.columns):
        return np.ones((len(children), len(starts)), dtype=bool)
    h = period_ordinal(starts, period)[None, :]
    first = period_ordinal(pd.DatetimeIndex(children["first_active_period"]), period)[:, None]
    last = period_ordinal(pd.DatetimeIndex(children["last_active_period"]), period)[:, None]
    return (h >= first) & (h <= last)


def parent_reasons(target: pd.DataFrame, parents: pd.DataFrame, starts: pd.DatetimeIndex) -> np.ndarray:
    """(n_parents, horizon) zero_reason of each parent period (None where its shares sum to 1)."""
    out = np.full((len(parents), len(starts)), None, dtype=object)
    if target.empty or "zero_reason" not in target.columns:
        return out
    rows = target[target["zero_reason"].notna()]
    row = rows_in(rows, parents, PARENT)
    col = pd.DatetimeIndex(starts).get_indexer(pd.DatetimeIndex(rows["period_start"]))
    ok = (row >= 0) & (col >= 0)
    out[row[ok], col[ok]] = rows["zero_reason"].to_numpy(object)[ok]
    return out


def repeated(keys: pd.DataFrame, times: int) -> dict[str, np.ndarray]:
    """Each column of `keys` with every row `times` times in a row (series-major, the row order of the
    forecast's long tables), dtypes kept."""
    out = {}
    for name in keys.columns:
        values = _values(keys[name])
        if isinstance(values, np.ndarray):
            out[name] = np.repeat(values, times)
        else:  # an extension array: taken as itself
            out[name] = values.take(np.repeat(np.arange(len(values)), times))
    return out


def long_frame(*parts) -> pd.DataFrame:
    """One frame of the columns of `parts` (dicts of arrays or scalars, frames) in their order, the arrays taken
    as they are: each was made for this frame, so neither copied nor consolidated into blocks."""
    columns = {}
    for part in parts:
        if isinstance(part, pd.DataFrame):
            part = {name: _values(part[name]) for name in part.columns}
        columns.update(part)
    return pd.DataFrame(columns, copy=False)


def _values(column: pd.Series):
    """The column's values as they are held: its numpy array, or its extension array."""
    return column.to_numpy() if isinstance(column.dtype, np.dtype) else column.array


def leaf_matrix(
    frame: pd.DataFrame, children: pd.DataFrame, column: str | list[str], starts: pd.DatetimeIndex
) -> np.ndarray | list[np.ndarray]:
    """(n_children, horizon) matrix of `column` from a long leaf x period frame (0 where absent); a list of
    columns: one matrix each, the rows found once. A frame holding every child's periods in order, one row each
    (as `reinitialized_target` is written), is each column reshaped."""
    columns = [column] if isinstance(column, str) else column
    n, h = len(children), len(starts)
    if not frame.empty:
        row = rows_in(frame, children, LEAF)
        col = period_columns(frame["period_start"].to_numpy(), pd.DatetimeIndex(starts))
        if len(frame) == n * h and (row.reshape(n, h) == np.arange(n)[:, None]).all() and (
            col.reshape(n, h) == np.arange(h)
        ).all():
            out = [frame[name].to_numpy(float).reshape(n, h).copy() for name in columns]
            return out[0] if isinstance(column, str) else out
    out = [np.zeros((n, h)) for _ in columns]
    if not frame.empty:
        ok = (row >= 0) & (col >= 0)
        for matrix, name in zip(out, columns, strict=True):
            matrix[row[ok], col[ok]] = frame[name].to_numpy(float)[ok]
    return out[0] if isinstance(column, str) else out


def period_columns(values: np.ndarray, starts: pd.DatetimeIndex) -> np.ndarray:
    """Position of each period start of `values` in `starts` (-1 where absent), as `starts.get_indexer` gives
    it; by integer arithmetic where the starts are evenly spaced nanoseconds (weeks), else by the index."""
    ns = starts.values.view(np.int64) if starts.dtype == "datetime64[ns]" else None
    step = int(ns[1] - ns[0]) if ns is not None and len(ns) > 1 else 0
    if step <= 0 or values.dtype != "datetime64[ns]" or not (np.diff(ns) == step).all() or (
        len(values) and np.isnat(values.min())
    ):
        return starts.get_indexer(pd.DatetimeIndex(values))
    col, off = np.divmod(values.view(np.int64) - ns[0], step)
    col[(off != 0) | (col < 0) | (col >= len(ns))] = -1
    return col
