"""The report charts' history sums (`chart_data.history_sums`, compiled in `chart_sums`) against pandas' group sums.

Reference: pandas' own `groupby(...).sum()` over the same rows (compensated summation, rows in order, NaN
skipped), compared to the last bit, on fractional quantities where the order and the compensation matter.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.engines import chart_data, chart_sums
from pipelines.keys import PARENT, add_ids

CYCLE = pd.Timestamp("2026-02-02")


def long_history(seed: int = 3, leaves: int = 60, periods: int = 30) -> pd.DataFrame:
    """Leaves of 7 parents over `periods` weeks before the cycle and 2 after it; quantities mostly whole, some
    fractional and large, a few NaN; rows shuffled so no order is assumed."""
    rng = np.random.default_rng(seed)
    weeks = pd.date_range(CYCLE - pd.Timedelta(weeks=periods), periods=periods + 2, freq="7D")
    leaf = np.repeat(np.arange(leaves), len(weeks))
    frame = pd.DataFrame({
        "product": [f"P{k % 4}" for k in leaf // 9],
        "site": [f"S{k % 2}" for k in leaf // 9],
        "customer": [f"C{k:03d}" for k in leaf],
        "period_start": np.tile(weeks, leaves),
    })
    quantity = rng.integers(0, 50, len(frame)).astype(float)
    fractional = rng.random(len(frame)) < 0.2
    quantity[fractional] = rng.normal(0, 1e7, fractional.sum()) + rng.random(fractional.sum())
    quantity[rng.random(len(frame)) < 0.02] = np.nan
    frame["quantity"] = quantity
    return frame.sample(frac=1.0, random_state=seed).reset_index(drop=True)


def reference(history: pd.DataFrame, low=None):
    kept = history[(history["period_start"] < CYCLE) & (history["period_start"] >= (low or pd.Timestamp.min))]
    cells = kept.groupby(PARENT + ["period_start"])["quantity"].sum()
    return cells, kept.groupby(PARENT)["quantity"].sum()


@pytest.mark.parametrize("with_ids", [False, True])
@pytest.mark.parametrize("history_periods", [None, 12])
def test_history_sums_are_pandas_group_sums_to_the_last_bit(with_ids, history_periods):
    history = long_history()
    if with_ids:
        history = add_ids(history)
    summed = chart_data.history_sums(history, CYCLE, "week", history_periods)
    low = CYCLE - pd.Timedelta(weeks=history_periods) if history_periods else None
    cells, totals = reference(history, low)
    parents = totals.index.to_frame(index=False)
    if with_ids:  # the charts' parents carry the ids their frames carry
        parents = parents.merge(history[PARENT + ["parent_id"]].drop_duplicates(), on=PARENT)
    at = summed.rows_of(parents)
    assert (at >= 0).all()
    assert summed.totals[at].tolist() == totals.to_numpy().tolist()  # exact, not approximate
    drawn, _ = chart_data.parent_history(summed, parents)
    expected = cells.reset_index()
    pd.testing.assert_frame_equal(drawn, expected, check_exact=True)
    # the rows of one parent in the window, in order
    rows = summed.history_rows(at[[2]])
    key = tuple(parents.iloc[2][PARENT])
    in_window = (history["period_start"] < CYCLE) & (history["period_start"] >= (low or pd.Timestamp.min))
    mine = (history["product"] == key[0]) & (history["site"] == key[1]) & in_window
    assert rows.tolist() == np.flatnonzero(mine.to_numpy()).tolist()


@pytest.mark.parametrize("by_parent", [False, True], ids=["shuffled", "by_parent"])
def test_history_rows_of_several_parents_are_their_rows_in_the_window_in_order(by_parent):
    # shuffled: every parent's rows spread over the whole table (spans overlap); by parent: each in one run
    history = long_history()
    if by_parent:
        history = history.sort_values(PARENT, kind="stable").reset_index(drop=True)
    summed = chart_data.history_sums(history, CYCLE, "week", 12)
    parents = history[PARENT].drop_duplicates().reset_index(drop=True)
    at = summed.rows_of(parents)
    in_window = ((history["period_start"] < CYCLE) & (history["period_start"] >= CYCLE - pd.Timedelta(weeks=12)))
    assert len(parents) == 4
    for asked in ([2], [3, 0], [1, 3, 2], [0, 1, 2, 3]):
        keys = set(map(tuple, parents.iloc[asked][PARENT].to_numpy().tolist()))
        mine = [k in keys for k in zip(history["product"], history["site"], strict=True)] & in_window.to_numpy()
        assert summed.history_rows(at[asked]).tolist() == np.flatnonzero(mine).tolist()


def test_history_sums_of_starts_not_whole_days_apart_and_of_parents_without_rows():
    history = long_history(leaves=20, periods=6)
    history.loc[history.index[:5], "period_start"] += pd.Timedelta(hours=6)  # not a period start: its own column
    summed = chart_data.history_sums(history, CYCLE, "week")
    cells, totals = reference(history)
    parents = pd.concat([totals.index.to_frame(index=False), pd.DataFrame({"product": ["P9"], "site": ["S0"]})])
    parents = parents.reset_index(drop=True)
    drawn, at = chart_data.parent_history(summed, parents)
    pd.testing.assert_frame_equal(drawn, cells.reset_index(), check_exact=True)
    assert summed.rows_of(parents)[-1] == -1 and len(parents) - 1 not in at


def test_window_sums_and_rows_are_the_group_sums_and_rows_of_the_window():
    target = long_history(seed=5).rename(columns={"quantity": "target"})
    parents = target[PARENT].drop_duplicates().reset_index(drop=True)
    got = chart_data.window_sums(target, parents, "target", low=CYCLE)
    horizon = target[target["period_start"] >= CYCLE]
    expected = horizon.groupby(PARENT, sort=False)["target"].sum()
    assert got.tolist() == expected.reindex(pd.MultiIndex.from_frame(parents)).to_numpy().tolist()
    rows = chart_data.window_rows(target, parents, [1, 3], low=CYCLE)
    for p in (1, 3):
        one = (target["product"] == parents["product"][p]) & (target["site"] == parents["site"][p])
        assert rows[p].tolist() == np.flatnonzero((one & (target["period_start"] >= CYCLE)).to_numpy()).tolist()


@pytest.mark.parametrize("with_ids", [False, True])
def test_parent_period_rows_are_the_group_sums_of_several_columns(with_ids):
    # a forecast-like frame: two value columns, fractional and NaN values, some (parent, period) given twice, and
    # rows of a parent not asked for (left out)
    frame = long_history(seed=9, leaves=30, periods=4)
    frame["lower_80"] = frame["quantity"] * 0.8 - 0.1
    frame = pd.concat([frame, frame.iloc[:40].assign(quantity=lambda f: f["quantity"] + 0.3)], ignore_index=True)
    if with_ids:
        frame = add_ids(frame)
    asked = frame[frame["product"] != "P3"]
    parents = asked[PARENT + (["parent_id"] if with_ids else [])].drop_duplicates().reset_index(drop=True)
    got, at = chart_data.parent_period_rows(frame, parents, ["quantity", "lower_80"])
    expected = asked.groupby(PARENT + ["period_start"], as_index=False)[["quantity", "lower_80"]].sum()
    pd.testing.assert_frame_equal(got, expected, check_exact=True)
    assert parents.iloc[at][PARENT].reset_index(drop=True).equals(got[PARENT])


def test_present_sums_are_pandas_group_sums_by_row_and_by_column():
    # reference: pandas' group sums over the present cells listed row by row; values where the compensation
    # matters (a plain running sum differs), NaN cells skipped, absent cells (also those holding a value) left out
    rng = np.random.default_rng(4)
    cells = rng.normal(0, 1e7, (40, 9)) + rng.random((40, 9))
    cells[rng.random(cells.shape) < 0.05] = np.nan
    present = rng.random(cells.shape) < 0.8
    rows, columns = np.nonzero(present)
    listed = pd.DataFrame({"row": rows, "column": columns, "value": cells[rows, columns]})
    by_row, by_column = chart_sums.present_sums(cells, present)
    expected_rows = listed.groupby("row")["value"].sum().reindex(range(40), fill_value=0.0)
    expected_columns = listed.groupby("column")["value"].sum().reindex(range(9), fill_value=0.0)
    assert by_row.tolist() == expected_rows.tolist() and by_column.tolist() == expected_columns.tolist()
    plain = [float(np.nansum(cells[i][present[i]])) for i in range(40)]
    assert plain != expected_rows.tolist()  # the data tells a compensated sum from a plain one


@pytest.mark.parametrize("with_ids", [False, True])
def test_parent_chart_data_is_the_group_sums_of_the_parents_history(with_ids):
    # reference: the history per parent and period (`parent_history`, itself checked against pandas above) summed
    # again by pandas per period and per parent, as the chart drew it from those rows before
    history = long_history(seed=11)
    if with_ids:
        history = add_ids(history)
    summed = chart_data.history_sums(history, CYCLE, "week")
    keys = PARENT + (["parent_id"] if with_ids else [])
    parents = history[keys].drop_duplicates().iloc[1:].reset_index(drop=True)  # one parent without a forecast
    weeks = pd.date_range(CYCLE, periods=3, freq="7D")
    forecast = parents.loc[parents.index.repeat(3)].assign(period_start=np.tile(weeks, len(parents)),
                                                             forecast=1.5).reset_index(drop=True)
    data = chart_data.parent_chart_data(forecast, summed, top_parents=2)
    hist, at = chart_data.parent_history(summed, parents)
    expected_total = hist.groupby("period_start")["quantity"].sum()
    pd.testing.assert_series_equal(data.history_total, expected_total, check_exact=True, check_freq=False)
    volume = chart_data.sums_by_parent(hist["quantity"].to_numpy(float), at, len(parents))
    assert data.ranked.sort_values("pos")["history_volume"].tolist() == volume.tolist()
    shown = data.ranked["pos"].to_numpy()[:2]
    pd.testing.assert_frame_equal(data.hist, hist[np.isin(at, shown)].reset_index(drop=True), check_exact=True)
    assert data.hist_at.tolist() == at[np.isin(at, shown)].tolist()
