"""`forecast_frames`: the leaves' basis column and its rows per basis, against pandas' `value_counts` of the column;
`hierarchy.parent_sums` against `np.add.at`."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.engines.forecast_frames import basis_column
from pipelines.engines.hierarchy import SOURCES

LABELS = np.array(["reinitialized_target", "period_share"], dtype=object)


def codes(words):
    """The sources' words as `hierarchy.coherent` gives them: codes of SOURCES."""
    return np.vectorize(SOURCES.index, otypes=[np.uint8])(np.asarray(words, dtype=object))


def test_basis_by_hand():
    assert SOURCES == ("basis", "children_forecast", "leaf_forecast", "reconciled")
    source = codes([["basis", "basis"], ["leaf_forecast", "basis"]])
    use_target = np.array([[True, False], [True, True]])
    basis, rows = basis_column(source, use_target, LABELS)
    # split leaves: the target where use_target, else the period's share; the others keep their source
    assert basis.tolist() == [["reinitialized_target", "period_share"], ["leaf_forecast", "reinitialized_target"]]
    assert rows["basis"].tolist() == ["leaf_forecast", "period_share", "reinitialized_target"]
    assert rows["rows"].tolist() == [1, 1, 2]


@pytest.mark.parametrize("n_children", [0, 1, 7, 300])
def test_rows_per_basis_are_value_counts_of_the_column(n_children):
    rng = np.random.default_rng(n_children)
    for _ in range(20):
        kinds = np.array(SOURCES[: int(rng.integers(1, len(SOURCES) + 1))], dtype=object)
        source = rng.choice(kinds, (n_children, 5)).astype(object)
        use_target = rng.random((n_children, 5)) < rng.random()
        basis, rows = basis_column(codes(source), use_target, LABELS)
        expected = np.where(source == "basis", LABELS[np.where(use_target, 0, 1)], source)
        assert np.array_equal(basis, expected)
        counted = pd.Series(basis.ravel(), name="basis").value_counts().sort_index().rename("rows").reset_index()
        pd.testing.assert_frame_equal(rows, counted, check_exact=True)


def scattered(frame, children, columns, starts):
    """The reference: each row's leaf by its key, its column by `get_indexer`, the values set cell by cell."""
    from pipelines.keys import LEAF, lookup

    out = [np.zeros((len(children), len(starts))) for _ in columns]
    row = lookup(frame, LEAF, children)
    col = pd.DatetimeIndex(starts).get_indexer(pd.DatetimeIndex(frame["period_start"]))
    ok = (row >= 0) & (col >= 0)
    for matrix, name in zip(out, columns, strict=True):
        matrix[row[ok], col[ok]] = frame[name].to_numpy(float)[ok]
    return out


@pytest.mark.parametrize("period", ["W-MON", "MS"])
def test_leaf_matrix_reads_any_frame_as_the_cells_would(period):
    """Complete frames in order (reshaped), and frames shuffled, cut, with unknown leaves, days that start no
    period and periods outside the horizon (scattered): the same matrices as cell by cell, -0.0 and NaN kept."""
    from pipelines.engines.forecast_frames import leaf_matrix

    rng = np.random.default_rng(5)
    starts = pd.date_range("2026-02-02" if period == "W-MON" else "2026-02-01", periods=6, freq=period)
    for trial in range(60):
        n = int(rng.integers(1, 9))
        children = pd.DataFrame({"product": "P", "site": "S", "customer": [f"c{i}" for i in range(n)],
                                 "leaf_id": np.arange(n, dtype=np.int32)})
        frame = pd.DataFrame({
            "product": "P", "site": "S", "customer": np.repeat(children["customer"].to_numpy(), 6),
            "period_start": np.tile(starts.values, n), "leaf_id": np.repeat(np.arange(n, dtype=np.int32), 6),
            "target": rng.choice([0.0, -0.0, 1.5, np.nan, 7.25], 6 * n), "share": rng.random(6 * n),
        })
        if trial % 2:  # shuffled, cut, a stranger, a Tuesday, a period after the horizon
            frame = frame.sample(frac=1.0, random_state=trial).iloc[: int(rng.integers(1, 6 * n + 1))]
            odd = frame.iloc[:1].assign(customer="stranger", leaf_id=np.int32(99))
            late = frame.iloc[:1].assign(period_start=starts[-1] + 10 * (starts[1] - starts[0]))
            tuesday = frame.iloc[:1].assign(period_start=frame["period_start"].iloc[0] + pd.Timedelta(days=1))
            frame = pd.concat([frame, odd, late, tuesday], ignore_index=True)
        got = leaf_matrix(frame, children, ["target", "share"], starts)
        for a, b in zip(got, scattered(frame, children, ["target", "share"], starts), strict=True):
            assert np.array_equal(a, b, equal_nan=True) and np.array_equal(np.signbit(a), np.signbit(b))


def test_period_columns_by_arithmetic_are_get_indexer():
    from pipelines.engines.forecast_frames import period_columns

    starts = pd.date_range("2026-02-02", periods=4, freq="W-MON")
    days = pd.date_range("2025-12-01", "2026-04-01", freq="D").values
    assert period_columns(days, starts).tolist() == starts.get_indexer(pd.DatetimeIndex(days)).tolist()
    # 2026-02-09 is column 1; a Tuesday, a day before the horizon and one after it are in none
    picked = pd.to_datetime(["2026-02-09", "2026-02-10", "2026-01-26", "2026-03-02"]).values
    assert period_columns(picked, starts).tolist() == [1, -1, -1, -1]


def test_parent_sums_are_add_at_bit_for_bit():
    """Sums per parent in child order from 0.0, as `np.add.at` adds them: values of very different sizes (another
    order of addition gives other bits), -0.0 (a parent of only -0.0 children sums to 0.0), NaN, bool, 1-d."""
    from pipelines.engines.hierarchy import parent_sums

    rng = np.random.default_rng(11)
    other_order = 0
    for trial in range(300):
        n_parents, n_children, h = int(rng.integers(1, 40)), int(rng.integers(0, 300)), int(rng.integers(1, 5))
        code = rng.integers(0, n_parents, n_children)
        leaf = rng.normal(size=(n_children, h)) * 10.0 ** rng.integers(-8, 12, size=(n_children, h))
        leaf[rng.random((n_children, h)) < 0.05] = -0.0
        leaf[rng.random((n_children, h)) < 0.01] = np.nan
        expected = np.zeros((n_parents, h))
        np.add.at(expected, code, leaf)
        got = parent_sums(leaf, code, n_parents)
        assert got.shape == expected.shape and got.tobytes() == expected.tobytes(), trial
        backwards = np.zeros((n_parents, h))
        np.add.at(backwards, code[::-1], leaf[::-1])
        other_order += backwards.tobytes() != expected.tobytes()
        for values in (leaf[:, 0], leaf > 0):
            expected = np.zeros((n_parents,) + values.shape[1:])
            np.add.at(expected, code, values)
            assert parent_sums(values, code, n_parents).tobytes() == expected.tobytes()
    assert other_order > 100  # the data tell the order of addition apart
    assert parent_sums(-np.zeros((2, 1)), np.zeros(2, np.int64), 2).tobytes() == np.zeros((2, 1)).tobytes()
    with pytest.raises(IndexError):
        parent_sums(np.ones((2, 1)), np.array([0, 2]), 2)
