"""`history_grid`: a history's rows laid out per leaf or parent, through the ids by a compiled pass, checked by hand
and against the numpy way it replaces (`keys.rows_in` + `calendar.period_ordinal` + `series_grid`)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.calendar import period_ordinal
from pipelines.engines import series_grids
from pipelines.engines.series_grids import history_grid, series_grid
from pipelines.keys import LEAF, PARENT, rows_in


def numpy_grid(history, table, cols, end_ord, keep=None):
    """The reference: each row's series by `rows_in`, its period by `period_ordinal`, laid out by `series_grid`."""
    code = rows_in(history, table, cols)
    ok = code >= 0
    if keep is not None:
        ok &= keep[np.maximum(code, 0)]
    ords = period_ordinal(history["period_start"], "week")
    qty = history["quantity"].to_numpy(float)
    return series_grid(code[ok], ords[ok], qty[ok], len(table), end_ord)


def same(a, b) -> bool:
    """The same arrays, dtypes and signs of zero included."""
    arrays = [(getattr(a, f), getattr(b, f)) for f in ("series", "ordinal", "y")]
    return (
        a.n_series == b.n_series
        and all(x.dtype == y.dtype and np.array_equal(x, y) for x, y in arrays)
        and np.array_equal(np.signbit(a.y), np.signbit(b.y))
    )


def frames():
    """Two parents (ids 5 and 2) of three leaves; history in weeks of 2026 (ordinal of 2026-01-05: w)."""
    history = pd.DataFrame(
        {
            "product": ["A", "A", "A", "A", "A", "B", "B", "C"],
            "site": ["S"] * 8,
            "customer": ["c1", "c1", "c1", "c2", "c2", "c3", "c3", "c9"],
            "period_start": pd.to_datetime(
                ["2026-01-05", "2026-01-12", "2026-01-26", "2026-01-26", "2026-02-02", "2026-01-12", "2026-01-19",
                 "2026-01-12"]
            ),
            "quantity": [0.0, 2.0, 3.0, 4.0, 9.0, 5.0, 0.0, 7.0],
            "leaf_id": np.array([0, 0, 0, 1, 1, 3, 3, 8], dtype=np.int32),
            "parent_id": np.array([5, 5, 5, 5, 5, 2, 2, 9], dtype=np.int32),
        }
    )
    leaves = pd.DataFrame(
        {"product": ["A", "A", "B"], "site": ["S"] * 3, "customer": ["c1", "c2", "c3"],
         "leaf_id": np.array([0, 1, 3], dtype=np.int32), "parent_id": np.array([5, 5, 2], dtype=np.int32)}
    )
    parents = pd.DataFrame({"product": ["A", "B"], "site": ["S", "S"], "parent_id": np.array([5, 2], dtype=np.int32)})
    return history, leaves, parents


W = int(period_ordinal(pd.DatetimeIndex(["2026-01-05"]), "week")[0])
END = W + 4  # cycle 2026-02-02: its row (9.0) is left out


def test_parents_summed_from_their_first_demand_to_the_cycle():
    history, _, parents = frames()
    grid = history_grid(history, parents, PARENT, END, "week")
    # parent A (row 0): the 0 of week w comes before its first demand; w+1: 2, w+2: filled 0, w+3: 3 + 4 = 7
    # parent B (row 1): w+1: 5, w+2: 0 (its row of 0), w+3: filled 0; C (id 9) is in no row of the table
    assert grid.series.tolist() == [0, 0, 0, 1, 1, 1]
    assert grid.ordinal.tolist() == [W + 1, W + 2, W + 3, W + 1, W + 2, W + 3]
    assert grid.y.tolist() == [2.0, 0.0, 7.0, 5.0, 0.0, 0.0]
    assert grid.n_series == 2
    assert same(grid, numpy_grid(history, parents, PARENT, END))


def test_leaves_kept_by_the_mask_only():
    history, leaves, _ = frames()
    keep = np.array([True, False, True])
    grid = history_grid(history, leaves, LEAF, END, "week", keep=keep)
    # c1: w+1: 2, w+2: 0, w+3: 3; c2 left out by the mask; c3: w+1: 5, w+2: 0, w+3: 0
    assert grid.series.tolist() == [0, 0, 0, 2, 2, 2]
    assert grid.y.tolist() == [2.0, 0.0, 3.0, 5.0, 0.0, 0.0]
    assert grid.n_series == 3
    assert same(grid, numpy_grid(history, leaves, LEAF, END, keep))


def test_the_compiled_pass_codes_no_row(monkeypatch):
    """With the ids on both frames and weekly periods, no row is looked up or given an ordinal (the history's
    first period only)."""
    history, leaves, parents = frames()
    ordinal = series_grids.period_ordinal

    def refused(*args, **kwargs):
        raise AssertionError("the history's rows were looked up one by one")

    def one_only(starts, period):
        assert len(starts) == 1, "the history's rows were given ordinals one by one"
        return ordinal(starts, period)

    monkeypatch.setattr(series_grids, "rows_in", refused)
    monkeypatch.setattr(series_grids, "period_ordinal", one_only)
    assert history_grid(history, parents, PARENT, END, "week").y.tolist() == [2.0, 0.0, 7.0, 5.0, 0.0, 0.0]


def test_a_wrong_kernel_is_seen(monkeypatch):
    """The comparison with the numpy way fails when the kernel puts a row a week late."""
    history, _, parents = frames()
    right = series_grids._block_sums.py_func

    def late(series_of_id, ids, ns, qty, start, end_ord, n_series):
        return right(series_of_id, ids, ns + series_grids.WEEK_NS, qty, start, end_ord, n_series)

    monkeypatch.setattr(series_grids, "_block_sums", late)
    assert not same(history_grid(history, parents, PARENT, END, "week"), numpy_grid(history, parents, PARENT, END))


@pytest.mark.parametrize("dense_cells", [-(10**9), series_grids.DENSE_CELLS])  # the numpy way, the compiled pass
def test_random_histories_give_the_numpy_grid_bit_for_bit(monkeypatch, dense_cells):
    """Random rows (unsorted, weeks before 1970 and after the cycle, ids absent from the table, zero, negative
    and -0.0 quantities, a mask over the table): the grid of the numpy way, the sums' bits included."""
    monkeypatch.setattr(series_grids, "DENSE_CELLS", dense_cells)
    rng = np.random.default_rng(11)
    for trial in range(150):
        n_ids, rows = int(rng.integers(1, 15)), int(rng.integers(0, 400))
        ids = rng.integers(0, n_ids + 3, rows).astype(np.int32 if trial % 2 else np.int64)
        weeks = rng.integers(-40, 40, rows) if trial % 3 == 0 else rng.integers(2900, 2950, rows)
        history = pd.DataFrame(
            {
                "product": ids.astype(str), "site": "S", "customer": "c",
                "period_start": pd.DatetimeIndex(np.datetime64("1969-12-29") + 7 * weeks.astype("timedelta64[D]")),
                "quantity": rng.choice([0.0, 1.5, -2.0, 3.25, 0.1, -0.0, 1e-17], rows),
                "leaf_id": ids, "parent_id": ids,
            }
        )
        held = rng.permutation(n_ids + 2)[: max(1, n_ids - 2)]  # the table's ids, in no order
        table = pd.DataFrame(
            {"product": held.astype(str), "site": "S", "customer": "c", "leaf_id": held, "parent_id": held}
        )
        end = int(rng.integers(-30, 30)) if trial % 3 == 0 else int(rng.integers(2905, 2955))
        keep = rng.random(len(table)) < 0.7 if trial % 4 == 0 else None
        for cols in (PARENT, LEAF):
            grid = history_grid(history, table, cols, end, "week", keep)
            assert same(grid, numpy_grid(history, table, cols, end, keep))


def test_without_ids_or_in_months_the_rows_are_coded():
    history, _, parents = frames()
    no_ids = history.drop(columns=["leaf_id", "parent_id"])
    assert same(history_grid(no_ids, parents, PARENT, END, "week"), numpy_grid(history, parents, PARENT, END))
    float_ids = history.astype({"parent_id": float})
    assert same(history_grid(float_ids, parents, PARENT, END, "week"), numpy_grid(history, parents, PARENT, END))
    month = int(period_ordinal(pd.DatetimeIndex(["2026-02-01"]), "month")[0])
    grid = history_grid(history, parents, PARENT, month, "month")
    # January 2026: A 0 + 2 + 3 + 4 = 9, B 5 + 0 = 5 (the February row is at the cycle)
    assert grid.series.tolist() == [0, 1] and grid.y.tolist() == [9.0, 5.0]
