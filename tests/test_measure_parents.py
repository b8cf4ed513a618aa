"""The plan's compiled sums: `measure_parents.Parents.sum` against numpy's `np.add.reduceat` (the sums it
replaced) to the bit, `plan_codes.group_totals` against pandas' groupby, and both against hand-worked sums."""

import numpy as np
import pandas as pd
import pytest

from pipelines.engines.measure_parents import Parents, block_sums
from pipelines.engines.plan_codes import group_totals


def test_block_sums_by_hand():
    # parents 0 and 2 have children (rows 0-1 and 2-4), parent 1 none:
    # parent 0: [1 + 2, 10 + 20] = [3, 30]; parent 2: [4 + 5 + 6, 0 + 0 + 1] = [15, 1]; parent 1: [0, 0]
    cells = np.array([[1.0, 10.0], [2.0, 20.0], [4.0, 0.0], [5.0, 0.0], [6.0, 1.0]])
    got = Parents(np.array([0, 0, 2, 2, 2]), 3).sum(cells)
    assert got.tolist() == [[3.0, 30.0], [0.0, 0.0], [15.0, 1.0]]
    assert Parents(np.array([0, 0, 2, 2, 2]), 3).sum(cells > 1.5).tolist() == [[1.0, 2.0], [0.0, 0.0], [3.0, 0.0]]


@pytest.mark.parametrize("seed", range(6))
def test_block_sums_equal_reduceat_to_the_bit(seed):
    # blocks of 1 to 5,000 rows: numpy's pairwise sum takes other paths below 8, up to 128 and above (halves)
    rng = np.random.default_rng(seed)
    sizes = rng.choice([1, 2, 7, 8, 9, 16, 17, 40, 128, 129, 200, 1000, 5000], size=12)
    code = np.repeat(np.sort(rng.choice(40, size=len(sizes), replace=False)), sizes)
    cells = rng.normal(size=(len(code), 5)) * rng.uniform(0, 1e6, size=(len(code), 1))
    cells[rng.random(cells.shape) < 0.2] = 0.0
    cells[rng.random(cells.shape) < 0.05] = -0.0
    groups = Parents(code, 40)
    expected = np.zeros((40, 5))
    expected[code[groups.first]] = np.add.reduceat(cells, groups.first, axis=0)
    got = groups.sum(cells)
    assert np.array_equal(got, expected)
    assert np.array_equal(np.signbit(got), np.signbit(expected))  # -0.0 where reduceat gives -0.0
    flags = cells > 0
    expected[code[groups.first]] = np.add.reduceat(flags, groups.first, axis=0, dtype=float)
    assert np.array_equal(groups.sum(flags), expected)


def test_block_sums_order_matters():
    # 1e16 + 1 + 1 + ... : added one after the other every 1 is lost; numpy's pairwise order (and the kernel's)
    # adds the ones among themselves first, so a kernel that added in row order would fail here
    cells = np.array([[1e16]] + [[1.0]] * 16)
    sequential = cells[0, 0]
    for value in cells[1:, 0]:
        sequential += value
    got = block_sums(cells, np.array([0]), np.array([0]), 1)[0, 0]
    assert got == np.add.reduce(cells[:, 0]) == 1e16 + 16
    assert sequential == 1e16 and got != sequential


def test_unsorted_children_still_summed():
    cells = np.array([[1.0], [2.0], [4.0]])
    assert Parents(np.array([1, 0, 1]), 2).sum(cells).tolist() == [[2.0], [5.0]]


@pytest.mark.parametrize("seed", range(4))
def test_group_totals_equal_pandas_groupby(seed):
    # pandas' own groupby (compensated sums, NaN left out of sum and mean, inf) is the reference
    rng = np.random.default_rng(seed)
    n = 20_000
    code = np.sort(rng.integers(0, 7, n))
    value = rng.normal(size=n) * 10.0 ** rng.integers(-3, 17, n)
    value[rng.random(n) < 0.01] = np.nan
    if seed % 2:
        value[rng.integers(0, n, 3)] = np.inf
    pinned = rng.random(n) < 0.01
    frame = pd.DataFrame({"c": code, "value": value, "pinned": pinned})
    expected = frame.groupby("c", sort=False).agg(
        leaf_rows=("value", "size"), pinned_rows=("pinned", "sum"),
        leaf_sum=("value", "sum"), leaf_mean=("value", "mean"),
    )
    got = group_totals(code, 7, value, pinned).set_axis(expected.index)
    pd.testing.assert_frame_equal(got, expected, check_exact=True)


def test_group_totals_compensated_by_hand():
    # 1e16, then 1.0 sixteen times: a plain running sum loses every 1.0 (1e16 + 1 rounds back to 1e16); the
    # compensated sum keeps them: 1e16 + 16. Group 1: [2.0, NaN] -> sum 2, mean 2 (NaN left out), 2 rows.
    value = np.array([1e16] + [1.0] * 16 + [2.0, np.nan])
    code = np.array([0] * 17 + [1, 1])
    got = group_totals(code, 2, value, np.zeros(19, dtype=bool))
    assert got["leaf_sum"].tolist() == [1e16 + 16, 2.0]
    assert got["leaf_rows"].tolist() == [17, 2] and got["leaf_mean"].tolist() == [(1e16 + 16) / 17, 2.0]
