"""The numbers the cycle report's charts draw, from a class's long tables in one pass over integer codes.

The charts show a class's totals and its few largest parents, so what they
need are sums per parent (and period), not the rows. Every row is coded once
by its parent (its `parent_id` where the table carries it, else its distinct
text keys numbered once) and summed per parent and period by one compiled pass
(`chart_sums`, `history_sums`) in pandas' group sum's compensated arithmetic,
rows in their order, so the numbers are those of a group sum over the text
keys to the last bit; no text is hashed or merged per row. Sums per parent of
a short column (`sums_by_parent`) go through pandas' group sum itself.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import pandas as pd

from pipelines.calendar import shift_periods
from pipelines.engines import chart_sums
from pipelines.engines.chart_base import OTHER, rank_parents
from pipelines.keys import LEAF, PARENT, PARENT_ID, factorize, ids_in, lookup, rows_in


def distinct_parents(frame: pd.DataFrame, keep: np.ndarray | None = None) -> pd.DataFrame:
    """The distinct parents of the rows of `frame` (where `keep`), in order of first appearance, as
    `frame[PARENT].drop_duplicates()` lists them; with `parent_id` when the frame carries it."""
    cols = PARENT + ids_in(frame, (PARENT_ID,))
    rows = np.arange(len(frame)) if keep is None else np.flatnonzero(keep)
    if PARENT_ID in cols:
        first = pd.Series(frame[PARENT_ID].to_numpy()[rows]).drop_duplicates().index.to_numpy()
    else:
        first = np.flatnonzero(~frame[PARENT].iloc[rows].duplicated().to_numpy())
    return pd.DataFrame({c: frame[c].to_numpy()[rows[first]] for c in cols})


def parent_positions(frame: pd.DataFrame, parents: pd.DataFrame) -> np.ndarray:
    """Position in `parents` (distinct keys) of each row's parent, -1 where it is not there."""
    if frame.empty or parents.empty:
        return np.full(len(frame), -1, dtype=np.int64)
    return rows_in(frame, parents, PARENT)


def key_order(parents: pd.DataFrame) -> np.ndarray:
    """Rank of each parent in (product, site) order: the order a group-by over the text keys lists them."""
    rank = np.empty(len(parents), dtype=np.int64)
    rank[parents.sort_values(PARENT, kind="stable").index.to_numpy()] = np.arange(len(parents))
    return rank


def group_sums(values: np.ndarray, key: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """(n,) sum of `values` per key 0..n-1 as pandas' group sum makes it (rows in their order, compensated
    summation, NaN skipped), and whether each key has a row.

    Where every value is a whole number and their absolute sum stays below 2**53, every partial sum is exact
    in any order, so `np.bincount` gives the very same numbers in one pass (quantities are mostly such).
    """
    values = np.asarray(values, dtype=float)
    count = np.bincount(key, minlength=n)
    if np.isfinite(values).all() and (values == np.round(values)).all() and np.abs(values).sum() < 2.0**53:
        return np.bincount(key, weights=values, minlength=n), count > 0
    # the key as the codes of a categorical of 0..n-1: pandas groups by the codes as they are, with no hashing of
    # the keys, and sums each group's rows in their order with the same kernel, so the same numbers (0 where empty)
    groups = pd.Categorical.from_codes(key, categories=pd.RangeIndex(n))
    return pd.Series(values).groupby(groups, observed=False).sum().to_numpy(float), count > 0


def sums_by_parent(values: np.ndarray, pos: np.ndarray, n_parents: int) -> np.ndarray:
    """(n_parents,) sum of `values` over the rows of each parent position (rows with pos < 0 left out), as
    `groupby(PARENT)[...].sum()` makes it, 0 where a parent has no row."""
    keep = pos >= 0
    return group_sums(np.asarray(values)[keep], pos[keep], n_parents)[0]


# ----------------------------------------------------------------- the long history, summed in one pass
@dataclass(frozen=True)
class HistorySums:
    """A class's history rows of a window of periods (`history_sums`) summed per parent and period, and per
    parent, with pandas' group sum's arithmetic; what the charts draw of the history but its leaves' shares.

    Row r of the matrices is one parent: the rows' parent code `code_of[r]` (the parent id, or the position in
    `keys`, see `codes`), its key `keys.iloc[r]`; `periods` the columns' period starts, ascending.
    """

    cells: np.ndarray  # (parents, periods): sum of the rows of each parent and period
    rows: np.ndarray  # (parents, periods): count of those rows (a cell with rows is drawn, even if its sum is 0)
    totals: np.ndarray  # (parents,): sum over each parent's rows, in row order
    periods: np.ndarray  # (periods,) datetime64[ns]
    keys: pd.DataFrame  # (parents,) the parent key of each row
    by_id: bool  # codes are the history's parent ids (else positions in the history's distinct parents)
    code_of: np.ndarray  # (parents,) each row's parent code
    codes: np.ndarray  # (history rows,) each history row's parent code (a view of `parent_id` where it is used)
    starts: np.ndarray  # (history rows,) period starts as int64 nanoseconds (a view)
    window: tuple[int, int]  # the rows kept: low <= start < high (ns)
    first: np.ndarray  # (parents,) each parent's first kept history row
    last: np.ndarray  # (parents,) and its last

    def rows_of(self, parents: pd.DataFrame) -> np.ndarray:
        """Row of the matrices of each of `parents` (distinct keys), -1 for a parent without history rows."""
        if self.by_id and ids_in(parents, (PARENT_ID,)):
            row = np.full(int(self.code_of.max(initial=-1)) + 1, -1, dtype=np.int64)
            row[self.code_of] = np.arange(len(self.code_of))
            ids = parents[PARENT_ID].to_numpy(np.int64)
            return np.where((ids >= 0) & (ids < len(row)), row[np.clip(ids, 0, max(len(row) - 1, 0))], -1)
        return lookup(parents, PARENT, self.keys) if len(self.keys) else np.full(len(parents), -1, dtype=np.int64)

    def history_rows(self, rows: np.ndarray) -> np.ndarray:
        """Positions, in order, of the history rows in the window of the parents at `rows` of the matrices, looked
        for between each one's first and last kept row only."""
        rows = rows[rows >= 0]
        if not len(rows):
            return np.zeros(0, dtype=np.int64)
        wanted = np.zeros(int(self.code_of.max(initial=-1)) + 1, dtype=bool)
        wanted[self.code_of[rows]] = True
        return chart_sums.rows_in_spans(self.codes, wanted, self.starts, self.window, self.first[rows], self.last[rows])


def history_sums(history: pd.DataFrame, cycle, period: str, history_periods: int | None = None) -> HistorySums:
    """The history rows before the cycle date (of the last `history_periods` periods only when given) summed per
    parent and period and per parent in one compiled pass (`chart_sums`): the rows coded by their `parent_id`
    where the history carries it, else by its distinct (product, site) keys. Per cell the same numbers as
    `groupby(PARENT + ["period_start"])["quantity"].sum()` over those rows, per parent as `groupby(PARENT)`.

    A history without the key columns (product, site) must carry `parent_id`; its sums are then found by the
    ids of the parents asked for (`rows_of`).
    """
    cycle = pd.Timestamp(cycle)
    window = _window(shift_periods(cycle, -int(history_periods), period) if history_periods else None, cycle)
    return _coded_sums(history, history["quantity"].to_numpy(float), window, *_row_codes(history))


def _row_codes(frame: pd.DataFrame) -> tuple[np.ndarray, bool]:
    """(a parent code per row, whether the codes are the rows' `parent_id`): the ids as stored where the frame
    carries them (no copy), else the rows' distinct (product, site) keys numbered."""
    if ids_in(frame, (PARENT_ID,)):
        codes = frame[PARENT_ID].to_numpy()
        return (codes if codes.dtype.kind in "iu" else codes.astype(np.int64)), True
    return (factorize(frame, PARENT)[0] if len(frame) else np.zeros(0, dtype=np.int64)), False


def _coded_sums(
    frame: pd.DataFrame, values: np.ndarray, window: tuple[int, int], codes: np.ndarray, by_id: bool
) -> HistorySums:
    """`values` (one per row of `frame`) of the rows in `window` summed per parent code and period (`HistorySums`)."""
    starts = frame["period_start"].to_numpy("datetime64[ns]").view(np.int64)
    low, high = window
    first, last, kept = chart_sums.kept_span(starts, low, high)
    n_codes = max(int(codes.max()) + 1, 0) if len(codes) else 0
    first_row = np.full(n_codes, -1, dtype=np.int64)
    last_row = np.full(n_codes, -1, dtype=np.int64)
    if not kept:
        first = last = 0
    keys, unit = starts, chart_sums.DAY_NS
    seen = np.zeros((last - first) // unit + 1, dtype=bool)
    if not chart_sums.mark(codes, starts, low, high, keys, first, unit, seen, first_row, last_row):  # not days
        keys, unique = pd.factorize(starts, sort=True)
        first, unit, seen = 0, 1, np.zeros(len(unique), dtype=bool)
        unique = np.asarray(unique)
        chart_sums.mark(codes, starts, low, high, keys, first, unit, seen, first_row, last_row)
    code_of = np.flatnonzero(first_row >= 0)
    dense = np.full(n_codes, -1, dtype=np.int64)
    dense[code_of] = np.arange(len(code_of))
    slot_of = np.cumsum(seen) - 1
    cells, rows, totals = chart_sums.parent_period_sums(codes, dense, starts, low, high, keys, first, unit, slot_of,
                                                         values)
    periods = (first + np.flatnonzero(seen) * unit) if unit > 1 else unique[np.flatnonzero(seen)]
    at = first_row[code_of]
    return HistorySums(
        cells=cells, rows=rows, totals=totals, periods=np.asarray(periods).astype("datetime64[ns]"),
        keys=pd.DataFrame({c: frame[c].to_numpy()[at] for c in PARENT if c in frame.columns}), by_id=by_id,
        code_of=code_of, codes=codes, starts=starts, window=window, first=at, last=last_row[code_of],
    )


def _cells_of(sums: HistorySums, parents: pd.DataFrame) -> tuple[pd.DataFrame, np.ndarray, tuple]:
    """The cells with rows of `parents`, by parent in (product, site) order, then period: their parent keys and
    period starts, each one's position in `parents`, and its (row, column) in the matrices of `sums`."""
    rank = key_order(parents)
    by_rank = np.argsort(rank)
    at_row = sums.rows_of(parents)[by_rank]
    has = at_row >= 0
    present = np.zeros((len(parents), len(sums.periods)), dtype=bool)
    present[has] = sums.rows[at_row[has]] > 0
    ranks, period = np.nonzero(present)  # row-major: by rank (the key order), then period
    at = by_rank[ranks]
    out = pd.DataFrame({c: parents[c].to_numpy()[at] for c in PARENT})
    out["period_start"] = sums.periods[period]
    return out, at, (at_row[ranks], period)


def parent_history(sums: HistorySums, parents: pd.DataFrame) -> tuple[pd.DataFrame, np.ndarray]:
    """The history of `parents` per parent and period, as `groupby(PARENT + ["period_start"], as_index=False)
    ["quantity"].sum()` over the history's window gives it (rows sorted by product, site, period_start; a cell
    with rows only): `product, site, period_start, quantity` and each row's position in `parents`."""
    out, at, cell = _cells_of(sums, parents)
    out["quantity"] = sums.cells[cell] if len(at) else np.zeros(0)
    return out, at


def parent_period_rows(frame: pd.DataFrame, parents: pd.DataFrame, columns: list[str]) -> tuple[pd.DataFrame,
                                                                                                 np.ndarray]:
    """`frame.groupby(PARENT + ["period_start"], as_index=False)[columns].sum()` over the rows of `parents`
    (distinct keys): the same rows, order (product, site, period_start) and numbers (pandas' compensated sum,
    rows in order, NaN skipped), by the compiled pass of `history_sums` once per column; and each output row's
    position in `parents`."""
    codes, by_id = _row_codes(frame)
    window = _window(None, None)
    sums = [_coded_sums(frame, frame[c].to_numpy(float), window, codes, by_id) for c in columns]
    out, at, cell = _cells_of(sums[0], parents)
    for c, summed in zip(columns, sums, strict=True):
        out[c] = summed.cells[cell] if len(at) else np.zeros(0)
    return out, at


def _parent_codes(frame: pd.DataFrame, parents: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(code of each row of `frame`, position in `parents` of each code; -1: not there): the rows' parent ids as
    stored where both carry them (no copy), else each row's position in `parents` (`parent_positions`)."""
    if ids_in(frame, (PARENT_ID,)) and ids_in(parents, (PARENT_ID,)) and len(frame) and len(parents):
        codes = frame[PARENT_ID].to_numpy()
        ids = parents[PARENT_ID].to_numpy(np.int64)
        dense = np.full(max(int(ids.max()), int(codes.max())) + 1, -1, dtype=np.int64)
        dense[ids] = np.arange(len(ids))
        return codes, dense
    return parent_positions(frame, parents), np.arange(len(parents), dtype=np.int64)


def _window(low, high) -> tuple[int, int]:
    """[low, high) as int64 nanoseconds (None: open)."""
    return tuple(
        int(pd.Timestamp(t).value) if t is not None else bound
        for t, bound in ((low, chart_sums.NAT + 1), (high, np.iinfo(np.int64).max))
    )


def window_sums(frame: pd.DataFrame, parents: pd.DataFrame, column: str, low=None, high=None) -> np.ndarray:
    """(len(parents),) sum of `column` over the rows of each parent with low <= period_start < high, as
    `sums_by_parent` over those rows makes it (rows in order, pandas' group sum's arithmetic), 0 where none."""
    if not len(parents):
        return np.zeros(0)
    codes, dense = _parent_codes(frame, parents)
    starts = frame["period_start"].to_numpy("datetime64[ns]").view(np.int64)
    totals = chart_sums.code_sums(codes, dense, starts, *_window(low, high), frame[column].to_numpy(float))
    return np.concatenate([totals, np.zeros(len(parents) - len(totals))])


def window_rows(frame: pd.DataFrame, parents: pd.DataFrame, positions, low=None, high=None) -> dict:
    """For each of `parents` at `positions`: the positions, in order, of its rows of `frame` whose period_start is
    in [low, high), all found in one pass."""
    positions = np.asarray(positions, dtype=np.int64)
    codes, dense = _parent_codes(frame, parents)
    wanted = np.isin(dense, positions)
    starts = frame["period_start"].to_numpy("datetime64[ns]").view(np.int64)
    rows = chart_sums.rows_of(codes, wanted, starts, *_window(low, high), 0, len(codes))
    at = dense[codes[rows]]
    return {p: rows[at == p] for p in positions.tolist()}


# ----------------------------------------------------------------- what each chart draws, from the sums
class ParentChartData(NamedTuple):
    """The numbers of `report_charts.parent_chart`: every parent ranked (`rank_parents`: product, site,
    history_volume, forecast_volume, pos); the history of the `top_parents` first ranked per parent and period
    (key order) with each row's parent position; the history of every parent summed per period; the forecast per
    parent and period (key order) with each row's parent position; the forecast's interval levels."""

    ranked: pd.DataFrame
    hist: pd.DataFrame
    hist_at: np.ndarray
    history_total: pd.Series
    forecast: pd.DataFrame
    forecast_at: np.ndarray
    bands: list[str]


def parent_chart_data(forecast: pd.DataFrame, summed: HistorySums, top_parents: int) -> ParentChartData | None:
    """The class's parents with a forecast (`forecast`: the class's parent_forecast rows), their history sums and
    forecast per period, ranked by history volume, then forecast volume, then key; None without parents. The
    history's numbers: its rows per parent and period (`parent_history`) summed again per parent and per period
    with pandas' group sum (`chart_sums.present_sums`), read off `summed`; rows made for the parents drawn only."""
    parents = distinct_parents(forecast)
    if parents.empty:
        return None
    at_row = summed.rows_of(parents)
    by_rank = np.argsort(key_order(parents))
    ordered = by_rank[at_row[by_rank] >= 0]  # the parents with history, in key order
    present = summed.rows[at_row[ordered]] > 0
    volume, per_period = chart_sums.present_sums(summed.cells[at_row[ordered]], present)
    history_volume = np.zeros(len(parents))
    history_volume[ordered] = volume
    drawn = present.any(axis=0)
    history_total = pd.Series(per_period[drawn], index=pd.Index(summed.periods[drawn], name="period_start"),
                              name="quantity")
    bands = interval_levels(forecast)
    bound_cols = [c for lv in bands for c in (f"lower_{lv}", f"upper_{lv}")]
    fc, fc_at = parent_period_rows(forecast, parents, ["forecast"] + bound_cols)
    ranked = rank_parents(parents, history_volume, sums_by_parent(fc["forecast"].to_numpy(float), fc_at,
                                                                  len(parents)))
    shown = ranked["pos"].to_numpy()[: max(int(top_parents), 0)]
    shown = shown[np.argsort(key_order(parents)[shown], kind="stable")]
    shown = shown[at_row[shown] >= 0]
    cells = [np.flatnonzero(summed.rows[at_row[p]] > 0) for p in shown]
    hist_at = np.repeat(shown, [len(c) for c in cells]).astype(np.int64)
    period = np.concatenate(cells) if cells else np.zeros(0, dtype=np.int64)
    hist = pd.DataFrame({c: parents[c].to_numpy()[hist_at] for c in PARENT})
    hist["period_start"] = summed.periods[period]
    hist["quantity"] = summed.cells[at_row[hist_at], period] if len(period) else np.zeros(0)
    return ParentChartData(ranked, hist, hist_at, history_total, fc, fc_at, bands)


def interval_levels(frame: pd.DataFrame) -> list[str]:
    """The interval levels whose lower_ and upper_ columns the frame holds (as written, e.g. '80')."""
    lower = {c[len("lower_"):] for c in frame.columns if c.startswith("lower_")}
    return sorted((lv for lv in lower if f"upper_{lv}" in frame.columns), key=float)


class ShareChartData(NamedTuple):
    """The numbers of `report_charts.share_chart`: every parent ranked (as `ParentChartData.ranked`), the
    history shares of the `top_parents` largest (`history_period_shares`), their target rows in the horizon
    (by position), the last period start of the horizon, and the start of each one's share window (by position,
    where the share table is given and the window was used)."""

    ranked: pd.DataFrame
    hist_shares: pd.DataFrame
    targets: dict
    last_start: pd.Timestamp
    window_start: dict


def share_chart_data(
    history: pd.DataFrame, target: pd.DataFrame, shares: pd.DataFrame | None, cycle, summed: HistorySums,
    top_parents: int,
) -> ShareChartData | None:
    """The class's parents with a target in the horizon (`target`: the class's reinitialized_target rows, from
    `cycle` on), ranked by history volume (`summed.totals`), then target volume, then key; None without any."""
    cycle = pd.Timestamp(cycle)
    starts = target["period_start"].to_numpy("datetime64[ns]").view(np.int64)  # NaT: the least int64, never kept
    in_horizon = starts >= cycle.value
    parents = distinct_parents(target, in_horizon)
    if parents.empty:
        return None
    at = summed.rows_of(parents)
    history_volume = np.where(at >= 0, summed.totals[np.maximum(at, 0)] if len(summed.totals) else 0.0, 0.0)
    ranked = rank_parents(parents, history_volume, window_sums(target, parents, "target", low=cycle))
    shown = ranked["pos"].to_numpy()[: max(int(top_parents), 0)]
    hist_shares = history_period_shares(history.iloc[summed.history_rows(at[shown])])
    targets = {p: target.iloc[rows] for p, rows in window_rows(target, parents, shown, low=cycle).items()}
    window_start = {}
    if shares is not None and len(shares):
        share_pos = parent_positions(shares, parents)
        for p in shown:
            first = np.flatnonzero(share_pos == p)[:1]
            if len(first) and shares["window_used"].iloc[first[0]] > 0:
                window_start[p] = pd.Timestamp(shares["window_start"].iloc[first[0]])
    last_start = starts.max()  # the last start of the horizon: some start is in it (the parents have one)
    return ShareChartData(ranked, hist_shares, targets, pd.Timestamp(int(last_start)), window_start)


# ----------------------------------------------------------------- the shares of the largest parents
def history_period_shares(history: pd.DataFrame) -> pd.DataFrame:
    """Each customer's share of its parent per history period: quantity / parent quantity.

    A period whose parent quantity is 0, or that has a recorded supply shortage
    (`shortage` on any of the parent's rows, when the column is there), has no
    share (NaN), as the share rule leaves such periods out.
    """
    leaf = history.groupby(LEAF + ["period_start"], observed=True, as_index=False)["quantity"].sum()
    parent = leaf.groupby(PARENT + ["period_start"], observed=True)["quantity"].transform("sum")
    share = leaf["quantity"] / parent.where(parent > 0)
    if "shortage" in history.columns:
        short = history[history["shortage"].astype(bool)][PARENT + ["period_start"]].drop_duplicates()
        flagged = leaf[PARENT + ["period_start"]].merge(
            short, how="left", on=PARENT + ["period_start"], indicator=True
        )["_merge"]
        share = share.where(~(flagged == "both").to_numpy())
    return leaf[LEAF + ["period_start"]].assign(share=share.to_numpy())


def stack_for_parent(
    hist_shares: pd.DataFrame, target: pd.DataFrame, top_children: int
) -> tuple[pd.DataFrame, list[str], int]:
    """(periods x bands) shares of one parent, bands = the largest customers then `other`; and the count in other."""
    both = pd.concat(
        [hist_shares[["customer", "period_start", "share"]], target[["customer", "period_start", "share"]]]
    )
    wide = both.pivot(index="period_start", columns="customer", values="share")
    # a period where the parent has no share at all (blank history period) stays blank in every band
    blank = wide.isna().all(axis=1)
    wide = wide.fillna(0.0)
    wide[blank] = np.nan
    mean = wide.mean(axis=0, skipna=True)
    order = sorted(wide.columns, key=lambda c: (-mean[c], str(c)))
    top = order[: max(int(top_children), 0)]
    rest = order[len(top):]
    bands = wide[top].copy()
    if rest:
        bands[OTHER] = wide[rest].sum(axis=1, min_count=1)
    return bands.sort_index(), top, len(rest)
