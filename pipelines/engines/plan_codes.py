"""Integer codes of the plan table's columns, for its checks and figures.

The plan's rows come in long runs of one value (a measure's rows together,
a leaf's periods together), so a text column is coded by hashing only the
first cell of each run (`pipelines.text_codes.codes_of`): the same codes and uniques as
`pd.factorize`, in a few times less time on millions of rows. The checks and
figures then count and sum over one packed integer key instead of merging or
grouping on several text columns.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numba import njit

from pipelines.engines.compensated import compensated_add
from pipelines.keys import factorize, lookup, pack_codes
from pipelines.text_codes import RUNS_SHARE, codes_of, run_starts


def packed_codes(frame: pd.DataFrame, cols: list[str]) -> tuple[np.ndarray, list[np.ndarray]] | None:
    """One int64 per row, equal exactly where the rows' `cols` are equal (-1 where a cell is missing), and
    each column's uniques; None when the packed codes would not fit in 62 bits."""
    coded_cols = [codes_of(frame[c].to_numpy()) for c in cols]
    uniques = [u for _, u in coded_cols]
    combined = pack_codes([np.maximum(k, 0) for k, _ in coded_cols], [len(u) for u in uniques])
    if combined is None:
        return None
    combined[np.logical_or.reduce([k < 0 for k, _ in coded_cols])] = -1
    return combined, uniques


def codes_in(frame: pd.DataFrame, cols: list[str], uniques: list[np.ndarray]) -> np.ndarray:
    """The packed code (as `packed_codes` made it with these uniques) of each row of `frame`; -1 where a
    cell is not among its column's uniques."""
    found = [pd.Index(u).get_indexer(frame[c].to_numpy()) for c, u in zip(cols, uniques, strict=True)]
    combined = pack_codes([np.maximum(k, 0) for k in found], [len(u) for u in uniques])
    combined[np.logical_or.reduce([k < 0 for k in found])] = -1
    return combined


def group_sizes(frame: pd.DataFrame, cols: list[str], name: str) -> pd.DataFrame:
    """`frame.groupby(cols).size().rename(name).reset_index()` (groups sorted by their keys, rows with a
    missing key left out) counted with one bincount over ranks of each column's sorted uniques.

    Text columns whose rows come in runs of one cell object in every column (the plan: a measure's rows
    together, its basis and fallback in runs) are read once to find the runs, and only each run's first row is
    coded, its count the run's length."""
    n = len(frame)
    if n >= 1024 and all(frame[c].dtype == object for c in cols):
        starts = run_starts([frame[c].to_numpy() for c in cols], most=1 / RUNS_SHARE)
        if starts is not None:
            runs = pd.DataFrame({c: frame[c].to_numpy()[starts] for c in cols})
            counted = _dense_sizes(runs, cols, name, np.diff(np.append(starts, n)))
            if counted is not None:
                return counted
    counted = _dense_sizes(frame, cols, name)
    return counted if counted is not None else frame.groupby(cols).size().rename(name).reset_index()


def _dense_sizes(frame: pd.DataFrame, cols: list[str], name: str, weight: np.ndarray | None = None):
    """`group_sizes` of `frame`, each row counted `weight` times (default once); None when a column is not
    text or the combinations are too many for a dense count (the caller groups with pandas)."""
    ranks, sorted_uniques, sizes = [], [], []
    for c in cols:
        k, u = codes_of(frame[c].to_numpy())
        if not len(frame) or not all(isinstance(x, str) for x in u):  # text keys only: sorted as pandas sorts
            return None
        order = np.argsort(u, kind="stable")
        rank = np.empty(len(u), dtype=np.int64)
        rank[order] = np.arange(len(u))
        ranks.append(np.where(k >= 0, rank[np.maximum(k, 0)], -1))
        sorted_uniques.append(u[order])
        sizes.append(max(len(u), 1))
    if int(np.prod(sizes, dtype=float)) > 1_000_000:  # too many combinations for a dense count
        return None
    keep = np.all([r >= 0 for r in ranks], axis=0)
    combined = np.ravel_multi_index([r[keep] for r in ranks], sizes)
    w = None if weight is None else weight[keep]
    counts = np.bincount(combined, weights=w, minlength=int(np.prod(sizes)))
    present = np.flatnonzero(counts)
    parts = np.unravel_index(present, sizes)
    out = pd.DataFrame({c: u[p] for c, u, p in zip(cols, sorted_uniques, parts, strict=True)})
    out[name] = counts[present].astype(np.int64)  # whole numbers (run lengths), exact in float64
    return out


def key_sums(plan: pd.DataFrame, key: list[str]) -> pd.DataFrame:
    """Per distinct `key` of the plan: the children's sum, their count and the sum of the pinned ones (one
    bincount each, over the rows in their order); `rows_of` finds a key's row.

    A key of text columns then one last column (the period), whose text part comes in runs of one cell object
    (the plan: a measure's rows of one parent together) is coded on its runs' first rows only, and the last
    column on its few values: a cell of a dense (text key x period) grid per row, no hashing of every row's
    packed key."""
    dense = _dense_codes(plan, key)
    if dense is not None:
        code, n, found = dense
    else:
        packed = packed_codes(plan, key)
        if packed is None:  # too many distinct cells to pack: pandas' own grouping
            code, keys = factorize(plan, key)
            found = ("keys", keys)
        else:
            code, uniques = pd.factorize(packed[0])
            found = ("packed", (uniques, packed[1]))
        code = code.astype(np.int64)
        n = int(code.max()) + 1 if len(code) else 0
    value = plan["value"].to_numpy(float)
    pinned = np.flatnonzero(plan["pinned"].to_numpy(bool))  # a few rows: the others would add 0.0 to +0.0
    sums = pd.DataFrame(
        {
            "children_sum": np.bincount(code, weights=value, minlength=n),
            "children": np.bincount(code, minlength=n),
            "pins_in_plan": np.bincount(code[pinned], weights=value[pinned], minlength=n),
        }
    )
    sums.attrs["found"] = found
    return sums


def _dense_codes(plan: pd.DataFrame, key: list[str]):
    """(each row's cell in a dense grid of the text part's distinct keys x the last column's values, the
    grid's size, how `rows_of` finds a key), or None when the text part is not in runs of one cell object,
    a key cell is missing, or the grid would be large."""
    text, last = key[:-1], key[-1]
    n = len(plan)
    if not text:
        return None
    coded = run_codes(plan, text)
    if coded is None:
        return None
    code, keys = coded
    period, periods = codes_of(plan[last].to_numpy())
    size = len(keys) * len(periods)
    if (period < 0).any() or size > 4 * n + 1_000_000:
        return None
    code *= len(periods)
    code += period
    return code, size, ("dense", (keys, periods))


def run_codes(frame: pd.DataFrame, cols: list[str]) -> tuple[np.ndarray, pd.DataFrame] | None:
    """(each row's code of its `cols` key, numbered by first appearance, and the keys in code order) of text
    columns whose rows come in runs of one cell object, coded on the runs' first rows; None otherwise or where
    a key cell is missing (the caller groups as pandas does)."""
    n = len(frame)
    if n < 1024 or not all(frame[c].dtype == object for c in cols):
        return None
    starts = run_starts([frame[c].to_numpy() for c in cols], most=1 / RUNS_SHARE)
    if starts is None:
        return None
    runs = pd.DataFrame({c: frame[c].to_numpy()[starts] for c in cols})
    if runs.isna().to_numpy().any():  # a run holds one object: a missing key shows on its first row
        return None
    run_code, keys = factorize(runs, cols)
    return np.repeat(run_code, np.diff(np.append(starts, n))), keys


def rows_holding(frame: pd.DataFrame, column: str, value) -> np.ndarray:
    """The rows whose `column` equals `value`, found on the column's runs of one cell object (each run's first
    cell compared) when it has few, else cell by cell."""
    cells = frame[column].to_numpy()
    n = len(cells)
    starts = run_starts([cells], most=1 / RUNS_SHARE) if n >= 1024 and cells.dtype == object else None
    if starts is None:
        return np.flatnonzero(cells == value)
    return np.flatnonzero(np.repeat(cells[starts] == value, np.diff(np.append(starts, n))))


def rows_of(parents: pd.DataFrame, key: list[str], sums: pd.DataFrame) -> np.ndarray:
    """The row of `sums` (from `key_sums`) holding each parent's key, -1 where none."""
    how, what = sums.attrs["found"]
    if how == "keys":
        return lookup(parents, key, what)
    if how == "dense":
        keys, periods = what
        row = _lookup_on_runs(parents, key[:-1], keys)
        period = pd.Index(periods).get_indexer(parents[key[-1]].to_numpy())
        return np.where((row >= 0) & (period >= 0), row * len(periods) + period, -1)
    return pd.Index(what[0]).get_indexer(codes_in(parents, key, what[1]))


def _lookup_on_runs(frame: pd.DataFrame, cols: list[str], table: pd.DataFrame) -> np.ndarray:
    """`lookup(frame, cols, table)`, the text key looked up on its runs' first rows only where `frame`'s rows
    come in runs of one cell object (the plan's parent periods: a measure's periods of one parent together), then
    repeated over each run: a run holds one key, so every row gets its own key's position."""
    n = len(frame)
    if n < 1024 or not all(frame[c].dtype == object for c in cols):
        return lookup(frame, cols, table)
    starts = run_starts([frame[c].to_numpy() for c in cols], most=1 / RUNS_SHARE)
    if starts is None:
        return lookup(frame, cols, table)
    runs = pd.DataFrame({c: frame[c].to_numpy()[starts] for c in cols})
    return np.repeat(lookup(runs, cols, table), np.diff(np.append(starts, n)))


def position(uniques: np.ndarray, value) -> int:
    """The code of `value` among `uniques`, or -2 (no code, not even the missing one) when absent."""
    hit = np.flatnonzero(uniques == value)
    return int(hit[0]) if len(hit) else -2


def group_totals(code: np.ndarray, n_groups: int, value: np.ndarray, pinned: np.ndarray) -> pd.DataFrame:
    """Per group code 0..n_groups-1 (each row's `code`): leaf_rows, pinned_rows, leaf_sum and leaf_mean of the
    rows, as `groupby(code, sort=False).agg(size, sum of pinned, sum and mean of value)` gives them (pandas'
    compensated sums, NaN values left out), in one compiled pass over the rows in their order."""
    rows, pins, total, mean = _group_totals(code, n_groups, np.asarray(value, dtype=float), np.asarray(pinned, bool))
    return pd.DataFrame({"leaf_rows": rows, "pinned_rows": pins, "leaf_sum": total, "leaf_mean": mean})


@njit(cache=True)
def _group_totals(code, n_groups, value, pinned):
    """Row counts, pinned counts, and pandas' group sum and mean (Kahan summation as its `group_sum` and
    `group_mean` add: the compensation reset where it turns NaN; a mean of no value is NaN) per group."""
    rows = np.zeros(n_groups, dtype=np.int64)
    pins = np.zeros(n_groups, dtype=np.int64)
    seen = np.zeros(n_groups, dtype=np.int64)
    total = np.zeros(n_groups)
    comp = np.zeros(n_groups)
    for i in range(len(code)):
        g = code[i]
        rows[g] += 1
        if pinned[i]:
            pins[g] += 1
        v = value[i]
        if v != v:
            continue
        seen[g] += 1
        total[g], comp[g] = compensated_add(total[g], comp[g], v)
    mean = np.full(n_groups, np.nan)
    for g in range(n_groups):
        if seen[g]:
            mean[g] = total[g] / seen[g]
    return rows, pins, total, mean
