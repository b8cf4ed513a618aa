"""Runs of one cell object (pipelines/cell_runs.py) against what they stand in for.

The references: each cell's object compared with its neighbour's by Python's
`is` (for `text_codes.run_starts`, a block at a time on addresses), numpy's
own cell-by-cell `==` over neighbouring cells, and pandas' `infer_dtype` over
the whole column. The columns are long runs of shared `str` objects, as the
history tables hold their keys, with one cell planted: the same text in
another object, a missing cell, a number, bytes.
"""

import numpy as np
import pandas as pd
import pytest

from pipelines.cell_runs import few_runs, runs_kept, text_changes
from pipelines.text_codes import run_starts

TEXTS = np.array(["AA", "BB", "CC", "DD"], dtype=object)


def in_runs(rng: np.random.Generator, n: int) -> np.ndarray:
    """n cells in runs of 1 to 40 cells of one `str` object (neighbouring runs may hold the same object)."""
    lengths = rng.integers(1, 40, n)
    return np.repeat(TEXTS[rng.integers(0, len(TEXTS), n)], lengths)[:n].copy()


def identity_starts(columns: list[np.ndarray]) -> list[int]:
    """Where any column's cell is another object than the cell before it, by Python's `is`, cell by cell."""
    n = len(columns[0])
    return [p for p in range(n) if p == 0 or any(c[p] is not c[p - 1] for c in columns)]


def test_run_starts_are_where_a_cell_object_changes_in_any_block_size():
    """Blocks of 1, 2, 7 rows and one block, runs crossing block edges, a strided column (not contiguous)."""
    rng = np.random.default_rng(11)
    for n in (1, 2, 50, 3001):
        columns = [in_runs(rng, n), in_runs(rng, 2 * n)[::2]]
        want = identity_starts(columns)
        assert len(want) > 1 or n < 50
        for block in (1, 2, 7, 1 << 20):
            assert run_starts(columns, block).tolist() == want


def test_most_gives_up_only_on_runs_too_many():
    rng = np.random.default_rng(12)
    long_runs, single = in_runs(rng, 5000), TEXTS[rng.integers(0, 4, 5000)]  # mean run 20 cells; 1.3 cells
    assert run_starts([long_runs], 64, most=0.25).tolist() == identity_starts([long_runs])
    assert run_starts([single], 64, most=0.25) is None


PLANTED = {
    "nothing": None,
    "same text, another object": None,  # made in the test: "BB" in an object of its own
    "None": None,
    "NaN": np.nan,
    "a number": 7,
    "bytes": b"BB",
}


@pytest.mark.parametrize("planted", sorted(PLANTED))
@pytest.mark.parametrize("run", [1, 3])
def test_text_changes_are_where_numpy_finds_neighbours_unequal(planted, run):
    """A cell (or a run of 3 cells of one object) planted inside a run and at a run's edge."""
    rng = np.random.default_rng(13)
    values = in_runs(rng, 4000)
    if planted != "nothing":
        cell = PLANTED[planted]
        if planted == "same text, another object":
            cell = "".join(["B", "B"])
            assert cell == "BB" and not any(cell is text for text in TEXTS)
        for at in (1000, int(np.flatnonzero(values[1:] != values[:-1])[5]) + 1):
            values[at : at + run] = np.array([cell] * run, dtype=object)
    want = np.flatnonzero(~(values[1:] == values[:-1])) + 1
    assert text_changes(values).tolist() == want.tolist()


def test_few_runs_are_found_once_per_validation_and_none_for_short_runs():
    rng = np.random.default_rng(14)
    values = in_runs(rng, 3000)
    with runs_kept():
        first = few_runs(values)
        assert few_runs(values) is first  # kept
        with runs_kept(keep=False):
            assert few_runs(values) is not first  # a coercion may write the columns: nothing kept
    assert first.tolist() == run_starts([values]).tolist()
    assert few_runs(TEXTS[rng.integers(0, 4, 3000)]) is None
    assert few_runs(pd.Series(np.arange(3000)).to_numpy()) is None  # not an object column
