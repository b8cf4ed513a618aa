"""What the cycle page's charts of a class cut into shards draw, read one shard at a time and reduced.

The charts (`pipelines.engines.report_charts` parent_chart, share_chart) draw
a class's sums per parent and period, rank its parents by volume and read leaf
rows only for the few largest. No parent spans two shards, so each shard is
read alone (its history for the columns drawn, as Arrow: text stays in Arrow
buffers but for the rows kept) and reduced to
- for the parent chart: the shard's history summed per parent and period by
  `chart_data.history_sums`, the pass the chart itself sums with; the chart
  sums these again, one row per parent and period, which leaves them as they
  are;
- for the share chart: the rows of the shard's `SHARE_PANELS` largest parents,
  ranked as the chart ranks (history volume, target volume, key), and for
  every other parent one history row holding its history volume and one
  target row holding its target volume at its last horizon period (customer
  blank: such a parent only ranks and is named in the caption). The class's
  largest parents are among its shards' largest (one order over all parents),
  so each is drawn from its own rows.
The class's frames are its shards' ones after another, the shards' parent ids
made distinct over the class. Every sum is over the same rows in the same order
as in a draw from the whole class (a group's sum does not depend on other
groups' rows), so the numbers drawn are the same to the last bit
(tests/test_shard_charts.py compares the figures' artists).
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

from pipelines.engines.chart_base import in_class, rank_parents
from pipelines.engines.chart_data import distinct_parents, history_sums, parent_history, parent_positions, window_sums
from pipelines.keys import LEAF, PARENT, PARENT_ID

PARENT_PANELS = 6  # parents drawn by parent_chart (its default)
SHARE_PANELS = 4  # parents drawn by share_chart (its default)
HISTORY_COLUMNS = [*LEAF, "period_start", "quantity", "shortage", PARENT_ID]
TARGET_COLUMNS = [*LEAF, "period_start", "target", "share", PARENT_ID]
SHARE_COLUMNS = [*PARENT, "window_used", "window_start", PARENT_ID]


@dataclass
class ChartFrames:
    """The frames a class's (or one shard's) two charts are drawn from."""

    forecast: pd.DataFrame  # parent_forecast, the columns parent_chart reads
    history_sums: pd.DataFrame  # product, site, period_start, quantity: history before the cycle per parent, period
    share_history: pd.DataFrame  # the largest parents' leaf rows, one row per other parent (its history volume)
    target: pd.DataFrame  # the largest parents' horizon rows, one row per other parent (its target volume)
    shares: pd.DataFrame  # the largest parents' share_tables rows


def _has_ids(table: pa.Table | pd.DataFrame) -> bool:
    if isinstance(table, pd.DataFrame):
        return PARENT_ID in table.columns and not table[PARENT_ID].isna().any()
    return PARENT_ID in table.column_names and table[PARENT_ID].null_count == 0


def _numbers(table: pa.Table, columns: list[str], ids: bool) -> pd.DataFrame:
    """`columns` of `table` as a frame, with the parent's id (`ids`) or else its text key to find it by."""
    return _frame(table.select([*columns, *([PARENT_ID] if ids else PARENT)]))


def _parents(table: pa.Table, frame: pd.DataFrame, keep: np.ndarray, ids: bool) -> pd.DataFrame:
    """`distinct_parents(frame, keep)`, the text keys of the distinct ids taken from the Arrow table."""
    if not ids:
        return distinct_parents(frame, keep)
    rows = np.flatnonzero(keep)
    first = rows[pd.Series(frame[PARENT_ID].to_numpy()[rows]).drop_duplicates().index.to_numpy()]
    return _frame(table.select([*PARENT, PARENT_ID]).take(pa.array(first)))


def _frame(table: pa.Table) -> pd.DataFrame:
    """`table` as a frame, a dictionary-encoded text column as plain text (as read without the encoding)."""
    return pa.table(
        [c.cast(c.type.value_type) if pa.types.is_dictionary(c.type) else c for c in table.columns],
        names=table.column_names,
    ).to_pandas()


def _stack(rows: pd.DataFrame, more: pd.DataFrame) -> pd.DataFrame:
    """`rows`, then `more`, in `rows`' columns."""
    if not len(more) or not len(rows):
        return rows if len(rows) or not len(more) else more[rows.columns]
    return pd.concat([rows, more[rows.columns]], ignore_index=True)


def reduce_shard(
    history: pa.Table, forecast: pd.DataFrame, target: pa.Table, shares: pa.Table, *, product_class: str,
    cycle_date,
) -> ChartFrames:
    """One shard's `ChartFrames` (see the module) from its lifecycle_history (HISTORY_COLUMNS), parent_forecast,
    reinitialized_target (TARGET_COLUMNS) and share_tables (SHARE_COLUMNS), as the store holds them."""
    cycle = pd.Timestamp(cycle_date)
    ids = all(_has_ids(t) for t in (history, forecast, target, shares))
    if not ids:  # a store written before the ids: the parents found by their text keys
        forecast = forecast.drop(columns=[PARENT_ID], errors="ignore")
    # the parent chart: history summed per parent (of the forecast) and period, the sums the chart draws from
    fc = in_class(forecast, product_class)
    fc_parents = distinct_parents(fc)
    hist = _numbers(history, ["period_start", "quantity"], ids)
    summed = history_sums(hist, cycle, "week")  # the period names the window of history_periods only: not used
    sums, at = parent_history(summed, fc_parents)
    if ids:
        sums[PARENT_ID] = fc_parents[PARENT_ID].to_numpy()[at]

    # the share chart: the parents with a target in the horizon, ranked as the chart ranks them (history volume:
    # the parent's total of the same sums)
    tgt = _numbers(target, ["period_start", "target"], ids)
    in_horizon = (tgt["period_start"] >= cycle).to_numpy()
    parents = _parents(target, tgt, in_horizon, ids)
    hist_row = summed.rows_of(parents)
    has_history = hist_row >= 0
    history_volume = np.where(has_history, summed.totals[np.maximum(hist_row, 0)] if len(summed.totals) else 0, 0.0)
    tgt_pos = np.where(in_horizon, parent_positions(tgt, parents), -1)
    target_volume = window_sums(tgt, parents, "target", low=cycle)
    largest = rank_parents(parents, history_volume, target_volume)["pos"].to_numpy()[:SHARE_PANELS]
    others = np.setdiff1d(np.arange(len(parents)), largest)
    with_history = others[has_history[others]]
    last = np.full(len(parents), np.iinfo(np.int64).min)
    starts = tgt["period_start"].to_numpy("datetime64[ns]").view(np.int64)
    np.maximum.at(last, tgt_pos[tgt_pos >= 0], starts[tgt_pos >= 0])

    def rows(table: pa.Table, picked: np.ndarray, columns: list[str]) -> pd.DataFrame:
        return _frame(table.select([c for c in columns if c != PARENT_ID or ids]).take(pa.array(picked)))

    def one_row(at: np.ndarray, **values) -> pd.DataFrame:
        keys = {c: parents[c].to_numpy()[at] for c in PARENT + ([PARENT_ID] if ids else [])}
        return pd.DataFrame({**keys, "customer": "", **values})

    first_kept = summed.periods[0] if len(summed.periods) else cycle
    share_history = _stack(
        rows(history, summed.history_rows(hist_row[largest]), HISTORY_COLUMNS),
        one_row(with_history, period_start=first_kept, quantity=history_volume[with_history], shortage=False),
    )
    target_rows = _stack(
        rows(target, np.flatnonzero(np.isin(tgt_pos, largest)), TARGET_COLUMNS),
        one_row(others, period_start=last[others].view("datetime64[ns]"), target=target_volume[others],
                share=np.nan),
    )
    share_frame = _numbers(shares, [], ids)
    share_rows = rows(shares, np.flatnonzero(np.isin(parent_positions(share_frame, parents), largest)), SHARE_COLUMNS)
    drawn = [c for c in forecast.columns if c in ("product_class", *PARENT, "period_start", "forecast", PARENT_ID)
             or c.startswith(("lower_", "upper_"))]
    return ChartFrames(forecast[drawn], sums, share_history, target_rows, share_rows)


def class_frames(shards: list[ChartFrames]) -> ChartFrames:
    """The class's `ChartFrames`: its shards' one after another, their parent ids made distinct over the class
    (each shard numbers its own); without ids when a shard has none."""
    frames = {f.name: [getattr(s, f.name) for s in shards] for f in fields(ChartFrames)}
    if all(_has_ids(frame) for parts in frames.values() for frame in parts):
        offset = 0
        for i, shard in enumerate(shards):
            parts = [getattr(shard, f.name) for f in fields(ChartFrames)]
            for name, part in zip(frames, parts, strict=True):
                frames[name][i] = part.assign(**{PARENT_ID: part[PARENT_ID].to_numpy(np.int64) + offset})
            offset += 1 + max((int(p[PARENT_ID].max()) for p in parts if len(p)), default=-1)
    else:
        frames = {k: [p.drop(columns=[PARENT_ID], errors="ignore") for p in v] for k, v in frames.items()}
    return ChartFrames(**{k: pd.concat(v, ignore_index=True) for k, v in frames.items()})


def read_shard(store: Path | str, cycle: str, product_class: str, shard: str) -> dict[str, object]:
    """One published shard's four tables as `reduce_shard` takes them (a table the store lacks: None)."""
    from pipelines.store import open_store

    def read(table: str, columns: list[str] | None = None, as_arrow: bool = True):
        coded = [c for c in LEAF if c in (columns or [])] if as_arrow else None  # texts decoded for rows kept only
        return open_store(store).read(table, cycle=str(cycle), product_class=product_class, shard=shard,
                                      columns=columns, as_arrow=as_arrow, dictionary=coded)

    return {
        "history": read("lifecycle_history", HISTORY_COLUMNS),
        "forecast": read("parent_forecast", as_arrow=False),
        "target": read("reinitialized_target", TARGET_COLUMNS),
        "shares": read("share_tables", SHARE_COLUMNS),
    }


def read_class_frames(store: Path | str, cycle: str, product_class: str) -> ChartFrames | None:
    """The class's `ChartFrames` from its published shards, read and reduced one shard at a time; None when one of
    the four tables has no row in the class."""
    from pipelines.store import open_store

    entries = open_store(store).entries("lifecycle_history", cycle=cycle, product_class=product_class)
    reduced, rows = [], dict.fromkeys(("history", "forecast", "target", "shares"), 0)
    for shard in sorted({e["shard"] for e in entries}):
        tables = read_shard(store, cycle, product_class, shard)
        if any(t is None for t in tables.values()):
            return None
        for name, table in tables.items():
            rows[name] += len(table)
        reduced.append(reduce_shard(**tables, product_class=product_class, cycle_date=cycle))
    return class_frames(reduced) if reduced and all(rows.values()) else None
