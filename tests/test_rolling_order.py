"""The compiled rolling order statistics (`pipelines.engines.rolling_order`) against numpy.

Two references: numpy's own sort of the windows (`outliers`' path for a matrix of
at most one chunk, forced here with `chunk_cells`), which must give the same
float64 numbers bit for bit, and numpy.median / numpy.percentile (type 7, its
default "linear" method) over each window's values, computed one window at a time.
"""

from __future__ import annotations

import numpy as np
import pytest

from pipelines.engines.outliers import hampel, rolling_median, tukey
from pipelines.engines.rolling_order import _sweep_hampel, _sweep_row, rolling

SMALL, LARGE = 10**12, 0  # chunk_cells: every matrix by numpy's sort / every matrix by the compiled sweep


def matrices(seed: int):
    rng = np.random.default_rng(seed)
    for trial in range(60):
        n, t, window = int(rng.integers(1, 12)), int(rng.integers(1, 40)), int(rng.integers(1, 27))
        if trial % 3 == 0:  # many ties, as intermittent demand has
            x = rng.choice([0.0, 1.0, 2.0, 5.0, 100.0], size=(n, t))
        else:
            x = np.round(rng.gamma(1.0, 10.0, (n, t)), int(rng.integers(0, 3)))
        x[rng.random((n, t)) < rng.random() * 0.6] = np.nan
        if trial % 10 == 0:
            x[rng.random((n, t)) < 0.05] = np.inf
        if trial % 15 == 0:
            x[rng.random((n, t)) < 0.05] = -np.inf
        yield x, window


def same_bits(a: np.ndarray, b: np.ndarray) -> bool:
    return a.shape == b.shape and a.tobytes() == b.tobytes()


@pytest.mark.filterwarnings("ignore:invalid value encountered:RuntimeWarning")  # infinities fed on purpose: inf - inf
@pytest.mark.parametrize("statistic", [hampel, tukey, rolling_median])
def test_the_compiled_sweep_gives_numpys_numbers_bit_for_bit(statistic):
    for x, window in matrices(11):
        by_sort = statistic(x, window, chunk_cells=SMALL)
        by_sweep = statistic(x, window, chunk_cells=LARGE)
        for a, b in zip(by_sort, by_sweep, strict=True):
            assert same_bits(a, b), (statistic.__name__, x, window)


def test_each_window_against_numpy_median_and_percentile():
    for x, window in matrices(12):
        if np.isinf(x).any():
            continue
        med, mad, count = rolling(x, window, 0)
        q1, qmed, q3 = rolling(x, window, 1)
        half = window // 2
        for r in range(x.shape[0]):
            for j in range(x.shape[1]):
                cells = x[r, max(0, j - half) : j - half + window]
                values = cells[~np.isnan(cells)]
                assert count[r, j] == len(values)
                if not len(values):
                    assert np.isnan([med[r, j], mad[r, j], q1[r, j], q3[r, j]]).all()
                    continue
                m = np.median(values)  # reference: numpy 2.x median and percentile (method "linear")
                assert med[r, j] == m
                assert mad[r, j] == np.median(np.abs(values - m))
                assert q1[r, j] == pytest.approx(np.percentile(values, 25), rel=1e-12, abs=1e-12)
                assert qmed[r, j] == pytest.approx(np.percentile(values, 50), rel=1e-12, abs=1e-12)
                assert q3[r, j] == pytest.approx(np.percentile(values, 75), rel=1e-12, abs=1e-12)


def test_a_hand_worked_window():
    x = np.array([[1.0, np.nan, 7.0, 3.0, 100.0]])
    med, mad, count = rolling(x, 3, 0)
    # windows (truncated at the ends): {1}, {1, 7}, {7, 3}, {3, 7, 100}, {3, 100}
    assert count.tolist() == [[1, 2, 2, 3, 2]]
    assert med.tolist() == [[1.0, 4.0, 5.0, 7.0, 51.5]]
    assert mad.tolist() == [[0.0, 3.0, 2.0, 4.0, 48.5]]


def test_an_empty_matrix():
    for shape in ((0, 5), (3, 0)):
        out = rolling(np.zeros(shape), 3, 1)
        assert all(o.shape == shape for o in out)


@pytest.mark.filterwarnings("ignore:invalid value encountered:RuntimeWarning")  # infinities fed on purpose: inf - inf
@pytest.mark.parametrize(
    "rule",
    [
        {"rule": "hampel", "window": 7, "k": 3.0, "replace_with": "limit", "sides": "upper"},
        {"rule": "hampel", "window": 5, "k": 2.0, "replace_with": "median", "sides": "both"},
        {"rule": "tukey", "window": 9, "fence": 1.5, "replace_with": "limit", "sides": "both"},
        {"rule": "tukey", "window": 7, "fence": 0.5, "replace_with": "median", "sides": "upper"},
    ],
)
def test_the_compiled_judgement_gives_numpys_flags_values_and_figures_bit_for_bit(rule, monkeypatch):
    """`judge_values` on a matrix the compiled sweep takes (`rolling_order.judge_rows`: statistics, limits and
    replacement in one pass) against the numpy path of `judge_outliers` on the judged matrix, seasonal or not."""
    from pipelines.config_sections import OutlierConfig
    from pipelines.engines import outliers

    config = OutlierConfig(**rule)
    rng = np.random.default_rng(13)
    flagged = 0
    for x, _ in matrices(14):
        skip = rng.random(x.shape) < 0.1
        for seasonal in (0.0, np.round(rng.normal(0.0, 5.0, x.shape), 1)):
            monkeypatch.setattr(outliers, "CHUNK_CELLS", 10**12)  # numpy's sort
            by_sort, after_sort = outliers.judge_values(x, skip, config, seasonal)
            monkeypatch.setattr(outliers, "CHUNK_CELLS", 0)  # the compiled judgement
            by_sweep, after_sweep = outliers.judge_values(x, skip, config, seasonal)
            assert same_bits(by_sort.flagged, by_sweep.flagged)
            assert same_bits(after_sort, after_sweep)
            i, j = np.nonzero(by_sort.flagged)
            assert set(by_sort.figures) == set(by_sweep.figures)
            for name, figure in by_sort.figures.items():
                assert same_bits(figure[i, j], by_sweep.figures[name][i, j]), name
            assert same_bits(after_sweep[~by_sweep.flagged], x[~by_sweep.flagged])  # the rest untouched
            flagged += int(by_sweep.flagged.sum())
    assert flagged > 20  # the rule did flag values to compare


@pytest.mark.filterwarnings("ignore:invalid value encountered:RuntimeWarning")
@pytest.mark.parametrize("both", [False, True])
def test_the_hampel_sweep_gives_the_mad_exactly_where_a_value_can_be_flagged(both):
    """`_sweep_hampel` (the one pass's Hampel sweep): every median as `_sweep_row` gives it, the MAD bit for bit
    where the row's value minus the median (its size with `both`) is above 0, NaN elsewhere."""
    for x, window in matrices(7):
        buf, dev = np.empty(window), np.empty(window)
        for row in x:
            t = len(row)
            median, mad, count = np.empty(t), np.empty(t), np.empty(t)
            _sweep_row(row, window, 0, buf, dev, median, mad, count)
            first, second = np.full(t, -1.0), np.full(t, -1.0)
            _sweep_hampel(row, window, both, buf, dev, first, second)
            with np.errstate(invalid="ignore"):
                deviation = np.abs(row - median) if both else row - median
                wanted = np.where(deviation > 0, mad, np.nan)
            assert same_bits(first, median)
            assert same_bits(second, wanted)
