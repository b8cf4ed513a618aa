"""The numbers the cycle report's charts draw, from a class's long tables in one pass over integer codes.

The charts show a class's totals and its few largest parents, so what they
need are sums per parent (and period), not the rows. Every row is coded once
to the position of its parent in the class's small table of parents
(`pipelines.keys.rows_in`: through `parent_id` where both carry it, else the
distinct text keys looked up once) and summed by pandas' group sum over one
int64 key. That sums the same rows in the same order, with the same
(compensated) summation, as a group sum over the text keys, so the numbers are
the same; no text is hashed or merged per row.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.engines.chart_base import OTHER
from pipelines.keys import LEAF, PARENT, PARENT_ID, ids_in, rows_in


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


def parent_period_sums(
    frame: pd.DataFrame, keep: np.ndarray, pos: np.ndarray, parents: pd.DataFrame, columns: list[str]
) -> tuple[pd.DataFrame, np.ndarray]:
    """`frame[keep].groupby(PARENT + ["period_start"], as_index=False)[columns].sum()`: the same rows, order
    and numbers (sorted by product, site, period_start), and each output row's position in `parents`.

    pos: `parent_positions(frame, parents)`; rows with pos < 0 are left out.
    """
    keep = keep & (pos >= 0)
    rank = key_order(parents)
    by_rank = np.argsort(rank)  # parent position of each rank
    starts = frame["period_start"].to_numpy("datetime64[ns]")[keep]
    period, unique = pd.factorize(starts, sort=True)
    n_periods = max(len(unique), 1)
    key = rank[pos[keep]] * n_periods + period
    n_keys = len(parents) * n_periods
    sums = {c: group_sums(frame[c].to_numpy()[keep], key, n_keys) for c in columns}
    present = np.bincount(key, minlength=n_keys) > 0
    code = np.flatnonzero(present)
    at = by_rank[code // n_periods]
    out = pd.DataFrame({c: parents[c].to_numpy()[at] for c in PARENT})
    out["period_start"] = np.asarray(unique)[code % n_periods]
    for c in columns:
        out[c] = sums[c][0][code]
    return out, at


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
