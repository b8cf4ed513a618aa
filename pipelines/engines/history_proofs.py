"""The proofs of cleaned_history on integer codes: `corrections_explain_changes` (`find_unexplained_changes`) and
the counting part of `every_raw_row_accounted` (`proofs.find_unaccounted_lines`, through `accounted_lines`).

The tables hold millions of rows with text keys, but the rows of one leaf come
in runs (the stage writes a leaf's periods one after another; the raw lines
are read file by file, a leaf's lines together), and the cells of a run share
their objects. So a leaf is coded once per run (`text_codes.run_starts`): only
the first row of each run is compared as text. Where a table is not in runs of
few enough leaves, or a key is missing, or a run's periods are not in order,
the proofs fall back to coding every row (the general path); both give the
same rows. The failing rows themselves are always named by the general code,
on the rows of the failing leaves only.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.keys import LEAF, joint_codes
from pipelines.text_codes import RUNS_SHARE, codes_of, run_starts

DAY_NS = 86_400 * 10**9
DAY_BLOCK = 1 << 20  # cells checked for midnight at a time
RUNS_UNSEEN = object()  # `cleaned_runs` not given: the proof finds `leaf_runs(cleaned)` itself


def leaf_runs(frame: pd.DataFrame) -> tuple[np.ndarray, pd.DataFrame] | None:
    """(start of each run, the leaf key of each run) of `frame`'s rows in runs of one leaf, or None when the
    key columns are not text, the runs are not few (at most 1/RUNS_SHARE of the rows) or a key is missing."""
    if any(frame[c].dtype != object for c in LEAF):
        return None
    starts = run_starts([frame[c].to_numpy() for c in LEAF])
    if len(frame) and len(starts) * RUNS_SHARE > len(frame):
        return None
    heads = pd.DataFrame({c: frame[c].to_numpy()[starts] for c in LEAF})  # `frame[LEAF]` would copy every row
    if heads.isna().any().any():
        return None
    return starts, heads


def _days(values: pd.Series) -> np.ndarray | None:
    """Whole days since the epoch of a datetime64[ns] column (None when not that, or a cell is not midnight)."""
    if values.dtype != "datetime64[ns]":
        return None
    ns = values.to_numpy().view(np.int64)
    if len(ns) and ns.min() == np.iinfo(np.int64).min:  # NaT
        return None
    days = ns // DAY_NS
    for low in range(0, len(ns), DAY_BLOCK):  # midnight: the days back in ns, a block at a time (no full temporary)
        part = days[low : low + DAY_BLOCK] * DAY_NS
        if not np.array_equal(part, ns[low : low + DAY_BLOCK]):
            return None
    return days


def cell_positions(cleaned: pd.DataFrame, corrections: pd.DataFrame, cleaned_runs=RUNS_UNSEEN) -> np.ndarray | None:
    """Row of `cleaned` holding each correction's leaf and period (-1 where none), when each leaf of `cleaned` is
    one run of rows with its periods strictly increasing (so each leaf and period is one row); else None."""
    runs = leaf_runs(cleaned) if cleaned_runs is RUNS_UNSEEN else cleaned_runs
    days, corr_days = _days(cleaned["period_start"]), _days(corrections["period_start"])
    if runs is None or days is None or corr_days is None:
        return None
    starts, heads = runs
    codes = joint_codes(heads, corrections, LEAF)
    if codes is None or not pd.Index(codes[0]).is_unique:  # a leaf in two runs
        return None
    # each table's lowest and highest day read once (`initial=0`, as every bound below is taken)
    bounds = [int(days.min(initial=0)), int(days.max(initial=0)), int(corr_days.min(initial=0)),
              int(corr_days.max(initial=0))]
    first_day = min(bounds[0], bounds[2])
    last_day = max(bounds[1], bounds[3], first_day)
    # the distinct days of both tables, counted without joining them (on the days as they are when none is
    # before the epoch: no shifted copy)
    shift = 0 if first_day >= 0 and last_day <= 4 * len(days) + 1_000_000 else first_day
    top = last_day - shift + 1
    held = np.bincount(days if shift == 0 else days - shift, minlength=top)
    held += np.bincount(corr_days - shift, minlength=top)
    capacity = float(np.count_nonzero(held))
    for c in LEAF:  # as `joint_codes` of the whole tables, whose general path takes over past 62 bits
        both = pd.concat([heads[c], corrections[c]], ignore_index=True)
        capacity *= max(len(pd.factorize(both, use_na_sentinel=False)[1]), 1)
    if capacity >= 2.0**62:
        return None
    if len(days) > 1:  # strictly increasing inside each run (a new run may start lower)
        rising = days[1:] > days[:-1]
        rising[starts[1:] - 1] = True
        if not rising.all():
            return None
    low = first_day
    width = max(bounds[1], bounds[3]) - low + 1
    if float(len(starts) + 1) * width >= 2.0**62:
        return None
    cells = np.repeat(np.arange(len(starts), dtype=np.int64) * width - low, np.diff(np.append(starts, len(cleaned))))
    cells += days  # run * width + (days - low), strictly increasing: one row per leaf and period
    corr_run = pd.Index(codes[0]).get_indexer(codes[1])
    wanted = np.where(corr_run >= 0, corr_run, 0) * width + (corr_days - low)
    pos = np.searchsorted(cells, wanted)
    pos = np.minimum(pos, max(len(cells) - 1, 0))
    found = (corr_run >= 0) & (len(cells) > 0)
    if len(cells):
        found &= cells[pos] == wanted
    return np.where(found, pos, -1)


def find_unexplained_changes(
    cleaned: pd.DataFrame, corrections: pd.DataFrame, tolerance: float = 1e-6, *, cleaned_runs=RUNS_UNSEEN
) -> pd.DataFrame:
    """Series periods whose cleaned value differs from the raw net + the audited corrections of that period.

    Per product x site x customer and period: raw_quantity + sum(delta) must
    equal quantity, so a change cannot hide behind an opposite change in
    another period of the series. A correction row for a period cleaned_history
    does not hold is unexplained too.
    """
    key = LEAF + ["period_start"]
    pos = cell_positions(cleaned, corrections, cleaned_runs)
    if pos is not None:
        return _unexplained_at(cleaned, corrections, key, pos, tolerance)
    codes = joint_codes(cleaned, corrections, key)
    if codes is not None and pd.Index(codes[0]).is_unique:
        return _unexplained_at(cleaned, corrections, key, pd.Index(codes[0]).get_indexer(codes[1]), tolerance)
    cells = cleaned[key + ["raw_quantity", "quantity"]].set_index(key)
    moved = corrections.groupby(key, sort=True, observed=True)["delta"].sum().rename("corrections")
    out = cells.join(moved, how="outer")
    out["corrections"] = out["corrections"].fillna(0.0)
    out["unexplained"] = out["quantity"] - out["raw_quantity"] - out["corrections"]
    bad = ~(out["unexplained"].abs() <= tolerance)  # NaN (a correction without its period) is unexplained
    return out[bad].reset_index()


def _unexplained_at(
    cleaned: pd.DataFrame, corrections: pd.DataFrame, key: list[str], pos: np.ndarray, tolerance: float
) -> pd.DataFrame:
    """find_unexplained_changes given the row of `cleaned` of each correction (`pos`, -1: none)."""
    delta = corrections["delta"].to_numpy(dtype=float)
    inside = pos >= 0
    # the corrections summed per corrected row only (bincount's order: the same sums); x - 0.0 is x, so the
    # rows without a correction need no subtraction
    rows, row_of = np.unique(pos[inside], return_inverse=True)
    moved = np.bincount(row_of, weights=delta[inside], minlength=len(rows))
    quantity = cleaned["quantity"].to_numpy(dtype=float)
    raw_quantity = cleaned["raw_quantity"].to_numpy(dtype=float)
    bad_parts, values = [], []
    for low in range(0, max(len(quantity), 1), DAY_BLOCK):  # a block of rows at a time: no full-length temporary
        high = min(low + DAY_BLOCK, len(quantity))
        part = quantity[low:high] - raw_quantity[low:high]
        a, b = np.searchsorted(rows, [low, high])
        part[rows[a:b] - low] -= moved[a:b]
        at = np.flatnonzero(~(np.abs(part) <= tolerance))
        bad_parts.append(at + low)
        values.append(part[at])
    bad = np.concatenate(bad_parts)
    unexplained = np.concatenate(values)
    moved_bad = np.zeros(len(bad))  # the corrections of each unexplained row (none: 0.0)
    if len(rows) and len(bad):
        at = np.minimum(np.searchsorted(rows, bad), len(rows) - 1)
        hit = rows[at] == bad
        moved_bad[hit] = moved[at[hit]]
    out = cleaned.iloc[bad][key + ["raw_quantity", "quantity"]]  # the few rows, then their columns
    out = out.assign(corrections=moved_bad, unexplained=unexplained)
    if not inside.all():  # corrections of a period cleaned_history does not hold: unexplained whatever their sum
        orphans = corrections.loc[~inside, key + ["delta"]]
        orphans = orphans.groupby(key, sort=False, observed=True, dropna=False)["delta"].sum().rename("corrections")
        orphans = orphans.reset_index().assign(raw_quantity=np.nan, quantity=np.nan, unexplained=np.nan)
        out = pd.concat([out, orphans[out.columns]], ignore_index=True)
    return out.sort_values(key, kind="stable").reset_index(drop=True)


def accounted_lines(
    raw: pd.DataFrame, cleaned: pd.DataFrame, rejected: pd.DataFrame, cleaned_runs=RUNS_UNSEEN, raw_runs=RUNS_UNSEEN
):
    """The integer part of `proofs.find_unaccounted_lines`, or None where it needs the general path
    (`cleaned_runs`, `raw_runs`: `leaf_runs` of the two tables, where the caller found them).

    Returns (rejected row naming no raw line, rejected row naming a line named before, raw line rejected,
    raw row of a leaf whose counts differ, cleaned row of such a leaf): bool per row of each table.
    """
    line = ["source_file", "source_row"]
    raw_runs = leaf_runs(raw) if raw_runs is RUNS_UNSEEN else raw_runs
    cleaned_runs = leaf_runs(cleaned) if cleaned_runs is RUNS_UNSEEN else cleaned_runs
    if raw_runs is None or cleaned_runs is None or raw["source_row"].dtype.kind not in "iu":
        return None
    raw_file, files = codes_of(raw["source_file"])
    every_file = pd.concat([pd.Series(files, dtype=object), rejected["source_file"]], ignore_index=True)
    rej_file = pd.factorize(every_file)[0][len(files) :]  # a file no raw line is of: a code of its own
    raw_row = raw["source_row"].to_numpy(np.int64)
    rej_row = rejected["source_row"].astype(np.int64).to_numpy()
    if (raw_file < 0).any() or rejected[line].isna().any().any():
        return None
    low = int(min(raw_row.min(initial=0), rej_row.min(initial=0)))
    width = int(max(raw_row.max(initial=0), rej_row.max(initial=0))) - low + 1
    if float(len(files) + len(rejected) + 1) * width >= 2.0**62:
        return None
    raw_id = raw_file  # raw_file * width + (raw_row - low), made in place in the codes (this function's own)
    raw_id *= width
    raw_id += raw_row
    raw_id -= low
    rej_id = rej_file * width + (rej_row - low)
    twice = pd.Series(rej_id).duplicated(keep="first").to_numpy()
    if len(files) * width <= 4 * len(raw) + 1_000_000:  # the lines as a dense file x row table, marked
        of_raw = rej_file < len(files)  # a rejected row of a file no raw line is of names no raw line
        held = np.zeros(len(files) * width, dtype=bool)
        held[raw_id] = True
        unknown = ~of_raw
        unknown[of_raw] = ~held[rej_id[of_raw]]
        named = np.zeros(len(files) * width, dtype=bool)
        named[rej_id[of_raw]] = True
        in_rejected = named[raw_id]
    else:
        unknown = ~pd.Series(rej_id).isin(raw_id).to_numpy()
        in_rejected = pd.Series(raw_id).isin(rej_id).to_numpy()

    # per leaf: raw lines - rejected lines against the lines cleaned_history summed
    (raw_starts, raw_heads), (cl_starts, cl_heads) = raw_runs, cleaned_runs
    codes = joint_codes(raw_heads, cl_heads, LEAF)
    if codes is None:
        return None
    leaf_of_head, leaves = pd.factorize(np.concatenate(codes))
    raw_head, cl_head = leaf_of_head[: len(raw_heads)], leaf_of_head[len(raw_heads) :]
    raw_length = np.diff(np.append(raw_starts, len(raw)))
    n = len(leaves)
    # counted per run, then per leaf (a leaf may have several runs); a rejected line's leaf is its run's
    rejected_leaf = raw_head[np.searchsorted(raw_starts, np.flatnonzero(in_rejected), side="right") - 1]
    used = np.bincount(raw_head, weights=raw_length, minlength=n).astype(np.int64)
    used -= np.bincount(rejected_leaf, minlength=n)
    lines = cleaned["lines"].to_numpy()
    run_lines = np.add.reduceat(lines, cl_starts) if len(lines) else np.zeros(0, dtype=lines.dtype)
    summed = np.bincount(cl_head, weights=run_lines.astype(np.float64), minlength=n)
    off = used != summed
    return unknown, twice, in_rejected, np.repeat(off[raw_head], raw_length), np.repeat(
        off[cl_head], np.diff(np.append(cl_starts, len(cleaned)))
    )
