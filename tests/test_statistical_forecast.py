"""`statistical_forecast`: series grid, demand classes, and the split to the leaf.

Forecast tests use statsforecast's `croston_classic` for every demand class: it
smooths the non-zero sizes and the intervals between them with SES at
alpha = 0.1, starting from the first value, and forecasts size / interval. So a
constant series forecasts its constant, and the rest can be worked out by hand.

Cycle date 2026-02-02; history weeks 2026-01-05, -12, -19, -26.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.engines import series_grids
from pipelines.engines.models import demand_classes
from pipelines.engines.series_grids import SeriesGrid, series_grid
from pipelines.errors import ConfigError
from pipelines.schemas import ReinitializedTarget
from pipelines.schemas_forecast import ForecastModels, ParentForecast, StatisticalForecast
from pipelines.stages.statistical_forecast import forecast_cycle

CYCLE = pd.Timestamp("2026-02-02")
WEEKS = ["2026-01-05", "2026-01-12", "2026-01-19", "2026-01-26"]
H1, H2 = pd.Timestamp("2026-02-02"), pd.Timestamp("2026-02-09")
CROSTON = {
    "smooth": "croston_classic",
    "erratic": "croston_classic",
    "intermittent": "croston_classic",
    "lumpy": "croston_classic",
}


# ------------------------------------------------------------------ series_grid


@pytest.mark.parametrize("dense_cells", [-(10**9), 10**9])  # laid out series by series, or through a dense block
def test_series_grid_starts_at_first_nonzero_fills_zeros_and_sums_duplicates(monkeypatch, dense_cells):
    monkeypatch.setattr(series_grids, "DENSE_CELLS", dense_cells)
    code = np.array([0, 0, 0, 0, 1, 1])
    ordinal = np.array([9, 10, 12, 12, 11, 14])
    qty = np.array([0.0, 2.0, 3.0, 4.0, 5.0, 9.0])
    grid = series_grid(code, ordinal, qty, n_series=3, end_ord=14)
    # series 0: the 0 at ordinal 9 comes before its first demand -> starts at 10;
    #   10: 2, 11: filled 0, 12: 3 + 4 = 7, 13: filled 0
    # series 1: 11: 5, 12: 0, 13: 0; the 9 at ordinal 14 is not before end_ord 14
    # series 2: no rows at all
    assert grid.series.tolist() == [0, 0, 0, 0, 1, 1, 1]
    assert grid.ordinal.tolist() == [10, 11, 12, 13, 11, 12, 13]
    assert grid.y.tolist() == [2.0, 0.0, 7.0, 0.0, 5.0, 0.0, 0.0]
    assert grid.n_series == 3


def test_series_grid_dense_block_gives_the_series_by_series_grid_bit_for_bit(monkeypatch):
    """Random rows (negative and zero quantities, rows before a series' first demand and after the end, unsorted):
    both ways of laying the grid out give the same arrays, the sums' bits included."""
    rng = np.random.default_rng(3)
    for _ in range(200):
        n, rows, end = int(rng.integers(1, 20)), int(rng.integers(0, 300)), int(rng.integers(5, 30))
        code, ordinal = rng.integers(0, n, rows), rng.integers(-4, end + 3, rows)
        qty = rng.choice([0.0, 1.5, -2.0, 3.25, 0.1, -0.0], rows)
        grids = []
        for cells in (-(10**9), 10**9):
            monkeypatch.setattr(series_grids, "DENSE_CELLS", cells)
            grids.append(series_grid(code, ordinal, qty, n, end))
        for name in ("series", "ordinal", "y"):
            by_series, dense = getattr(grids[0], name), getattr(grids[1], name)
            assert by_series.dtype == dense.dtype and np.array_equal(by_series, dense)
        assert np.array_equal(np.signbit(grids[0].y), np.signbit(grids[1].y))


# ------------------------------------------------------------------ demand classes


def grid_of(*series):
    """A grid from plain value lists, one list per series, all ending at the same period."""
    code, ordinal, qty = [], [], []
    for i, values in enumerate(series):
        code += [i] * len(values)
        ordinal += list(range(100 - len(values), 100))
        qty += list(values)
    return series_grid(
        np.array(code, dtype=np.int64), np.array(ordinal, dtype=np.int64), np.array(qty, dtype=float), len(series), 100
    )


def test_demand_classes_one_series_per_class_and_no_demand():
    cls, adi, cv2 = demand_classes(
        grid_of(
            [10, 10, 12, 8],  # ADI 4/4 = 1; sizes mean 10, var (0+0+4+4)/4 = 2, CV2 2/100 = 0.02
            [1, 7, 1, 7],  # ADI 1; mean 4, var (9+9+9+9)/4 = 9, CV2 9/16 = 0.5625
            [4, 0, 4, 0],  # ADI 4/2 = 2; sizes 4, 4 -> CV2 0
            [1, 0, 7, 0],  # ADI 2; sizes 1, 7: mean 4, var 9, CV2 0.5625
            [0, 0, 0],  # nothing
        )
    )
    assert cls.tolist() == ["smooth", "erratic", "intermittent", "lumpy", "no_demand"]
    assert adi[:4].tolist() == pytest.approx([1.0, 1.0, 2.0, 2.0])
    assert cv2[:4].tolist() == pytest.approx([0.02, 0.5625, 0.0, 0.5625])
    assert np.isnan(adi[4]) and np.isnan(cv2[4])


def test_demand_classes_are_those_of_the_bincount_sums_bit_for_bit():
    """The compiled pass (rows, rows above 0, their sum and sum of squares per series, in row order) against
    `np.bincount` of the masked rows, on grids in and out of series order, values of very different sizes (the
    order of addition shows), zeros, negatives and NaN, and series without rows."""
    from pipelines.engines.models import ADI_CUTOFF, CV2_CUTOFF

    def by_bincount(grid):
        n, nz = grid.n_series, grid.y > 0
        length = np.bincount(grid.series, minlength=n)
        count = np.bincount(grid.series[nz], minlength=n)
        total = np.bincount(grid.series[nz], weights=grid.y[nz], minlength=n)
        squares = np.bincount(grid.series[nz], weights=grid.y[nz] ** 2, minlength=n)
        with np.errstate(invalid="ignore", divide="ignore"):
            adi = np.where(count > 0, length / count, np.nan)
            mean = total / count
            cv2 = np.where(count > 0, np.clip(squares / count - mean**2, 0, None) / mean**2, np.nan)
        cls = np.where(adi < ADI_CUTOFF, np.where(cv2 < CV2_CUTOFF, "smooth", "erratic"),
                       np.where(cv2 < CV2_CUTOFF, "intermittent", "lumpy")).astype(object)
        cls[count == 0] = "no_demand"
        return cls, adi, cv2

    rng = np.random.default_rng(3)
    for trial in range(300):
        n, rows = int(rng.integers(1, 30)), int(rng.integers(0, 400))
        series = rng.integers(0, n, rows)
        series = np.sort(series) if trial % 2 else series
        y = rng.normal(size=rows) * 10.0 ** rng.integers(-6, 10, rows)
        y[rng.random(rows) < 0.3] = 0.0
        y[rng.random(rows) < 0.02] = np.nan
        grid = SeriesGrid(series, np.arange(rows), y, n)
        cls, adi, cv2 = demand_classes(grid)
        expected = by_bincount(grid)
        assert cls.tolist() == expected[0].tolist(), trial
        assert adi.tobytes() == expected[1].tobytes() and cv2.tobytes() == expected[2].tobytes(), trial


def test_adi_counts_from_the_first_nonzero_period_to_the_end():
    cls, adi, _ = demand_classes(grid_of([0, 0, 0, 5, 5, 5, 0]))
    # leading zeros are not part of the series: from the first 5, 4 periods / 3 non-zero = 1.333
    assert adi[0] == pytest.approx(4 / 3)
    assert cls[0] == "intermittent"


def test_single_nonzero_period_has_cv2_zero():
    cls, adi, cv2 = demand_classes(grid_of([5, 0]))
    # 2 periods / 1 non-zero = ADI 2; one size -> CV2 0
    assert (adi[0], cv2[0]) == (2.0, 0.0)
    assert cls[0] == "intermittent"


def _adi_series(length, nonzero=25):
    """`nonzero` fives in `length` periods, starting with a five, zeros spread after it."""
    values = [5.0] * length
    for k in range(length - nonzero):
        values[1 + 3 * k] = 0.0
    return values


def test_adi_cutoff_1_32_below_at_and_above():
    series = [_adi_series(32), _adi_series(33), _adi_series(34)]
    assert [sum(v > 0 for v in s) for s in series] == [25, 25, 25]
    cls, adi, cv2 = demand_classes(grid_of(*series))
    # ADI 32/25 = 1.28, 33/25 = 1.32, 34/25 = 1.36; constant sizes, CV2 0
    assert adi.tolist() == pytest.approx([1.28, 1.32, 1.36])
    assert cv2.tolist() == [0.0, 0.0, 0.0]
    # below the cut-off is smooth; at and above it, intermittent (smooth needs ADI < 1.32)
    assert cls.tolist() == ["smooth", "intermittent", "intermittent"]


def test_cv2_cutoff_0_49_below_at_and_above():
    cls, adi, cv2 = demand_classes(grid_of([169, 31], [17, 3], [171, 29]))
    # sizes a, b: mean (a+b)/2, var ((a-b)/2)^2, CV2 ((a-b)/(a+b))^2
    # 138/200 = 0.69 -> 0.4761; 14/20 = 0.7 -> 0.49; 142/200 = 0.71 -> 0.5041; ADI 2/2 = 1
    assert cv2.tolist() == pytest.approx([0.4761, 0.49, 0.5041])
    assert adi.tolist() == [1.0, 1.0, 1.0]
    # smooth needs CV2 < 0.49: at the cut-off it is erratic
    assert cls.tolist() == ["smooth", "erratic", "erratic"]


# ------------------------------------------------------------------ forecast_cycle


def cfg(make_config, grain="top_down"):
    return make_config({"a": {"window": 4, "strategy": grain, "models": CROSTON}}, calendar={"horizon": 2})


def targets(rows):
    """rows: (product, site, customer, period_start, target[, share[, zero_reason]]); share defaults to 0.5."""
    full = [tuple(r) + (0.5, None)[len(r) - 5 :] for r in rows]
    frame = pd.DataFrame(
        full, columns=["product", "site", "customer", "period_start", "target", "share", "zero_reason"]
    )
    frame["period_start"] = pd.to_datetime(frame["period_start"])
    frame["cycle_date"] = CYCLE
    frame["parent_baseline"] = 1.0
    frame["zero_reason"] = frame["zero_reason"].astype(object)
    columns = [
        "product",
        "site",
        "customer",
        "period_start",
        "cycle_date",
        "target",
        "share",
        "parent_baseline",
        "zero_reason",
    ]
    return ReinitializedTarget.validate(frame[columns])


def constant_history(make_history, per_customer):
    """per_customer: {customer: weekly quantity} for all four weeks of P1/S1."""
    return make_history([("P1", "S1", c, w, q) for c, q in per_customer.items() for w in WEEKS])


def leaf_values(result, column="forecast"):
    leaf = result.leaf
    return {(c, p): v for c, p, v in zip(leaf["customer"], leaf["period_start"], leaf[column], strict=False)}


def test_leaf_is_parent_forecast_times_target_over_sum_of_targets(make_history, make_children, make_config):
    history = constant_history(make_history, {"C1": 4, "C2": 8})
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    tg = targets(
        [("P1", "S1", "C1", H1, 1), ("P1", "S1", "C2", H1, 3), ("P1", "S1", "C1", H2, 2), ("P1", "S1", "C2", H2, 2)]
    )
    res = forecast_cycle(history, children, tg, cfg(make_config), CYCLE)
    ParentForecast.validate(res.parent)
    StatisticalForecast.validate(res.leaf)
    # parent history 4 + 8 = 12 every week: smooth, Croston of a constant -> 12
    assert res.parent["forecast"].tolist() == pytest.approx([12.0, 12.0])
    assert set(res.parent["demand_class"]) == {"smooth"}
    assert set(res.parent["model"]) == {"croston_classic"}
    # week 1: 12 x 1/4 = 3, 12 x 3/4 = 9; week 2: 12 x 2/4 = 6 each
    assert leaf_values(res) == pytest.approx({("C1", H1): 3.0, ("C2", H1): 9.0, ("C1", H2): 6.0, ("C2", H2): 6.0})
    assert set(res.leaf["basis"]) == {"reinitialized_target"}
    assert res.leaf["parent_forecast"].tolist() == pytest.approx([12.0] * 4)


def test_intermittent_parent_forecast_by_hand_is_split_by_target(make_history, make_children, make_config):
    history = make_history([("P1", "S1", "C1", WEEKS[0], 4), ("P1", "S1", "C1", WEEKS[2], 6)])
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    tg = targets([("P1", "S1", c, h, t) for h in (H1, H2) for c, t in (("C1", 1), ("C2", 4))])
    res = forecast_cycle(history, children, tg, cfg(make_config), CYCLE)
    # parent series 4, 0, 6, 0: ADI 4/2 = 2, sizes 4, 6 -> CV2 1/25 = 0.04 -> intermittent
    assert set(res.parent["demand_class"]) == {"intermittent"}
    # sizes 4, 6: SES 4 -> 0.1 x 6 + 0.9 x 4 = 4.2; intervals 1, 2: SES 1 -> 0.1 x 2 + 0.9 x 1 = 1.1
    # forecast 4.2 / 1.1 = 3.8181...
    assert res.parent["forecast"].tolist() == pytest.approx([4.2 / 1.1] * 2)
    # split 1 : 4 -> C1 3.8181 / 5 = 0.7636, C2 3.8181 x 4 / 5 = 3.0545
    assert leaf_values(res) == pytest.approx(
        {
            ("C1", H1): 4.2 / 1.1 / 5,
            ("C2", H1): 4.2 / 1.1 * 4 / 5,
            ("C1", H2): 4.2 / 1.1 / 5,
            ("C2", H2): 4.2 / 1.1 * 4 / 5,
        }
    )


def test_parent_whose_targets_are_all_zero_is_split_by_shares(make_history, make_children, make_config):
    history = constant_history(make_history, {"C1": 4, "C2": 8})
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    tg = targets([("P1", "S1", c, h, 0.0, s) for h in (H1, H2) for c, s in (("C1", 0.25), ("C2", 0.75))])
    res = forecast_cycle(history, children, tg, cfg(make_config), CYCLE)
    # targets sum to 0 -> basis is the period's share: 12 x 0.25 = 3, 12 x 0.75 = 9
    assert leaf_values(res) == pytest.approx({("C1", H1): 3.0, ("C2", H1): 9.0, ("C1", H2): 3.0, ("C2", H2): 9.0})
    assert set(res.leaf["basis"]) == {"period_share"}


def test_parent_without_demand_is_forecast_zero(make_history, make_children, make_config):
    history = make_history([("P1", "S1", "C1", w, 0) for w in WEEKS])
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    tg = targets([("P1", "S1", c, h, 0.0) for h in (H1, H2) for c in ("C1", "C2")])
    res = forecast_cycle(history, children, tg, cfg(make_config), CYCLE)
    assert set(res.parent["demand_class"]) == {"no_demand"}
    assert res.parent["forecast"].tolist() == [0.0, 0.0]
    assert res.leaf["forecast"].tolist() == [0.0] * 4


def test_product_site_customer_parent_is_the_sum_of_its_leaf_forecasts(make_history, make_children, make_config):
    history = constant_history(make_history, {"C1": 4, "C2": 8})
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    # targets 3 : 1 would give 9 and 3; a bottom-up class ignores them
    tg = targets([("P1", "S1", c, h, t) for h in (H1, H2) for c, t in (("C1", 3), ("C2", 1))])
    res = forecast_cycle(
        history, children, tg, cfg(make_config, "bottom_up"), CYCLE
    )
    # each child forecast on its own: constant 4 -> 4, constant 8 -> 8
    assert leaf_values(res) == pytest.approx({("C1", H1): 4.0, ("C2", H1): 8.0, ("C1", H2): 4.0, ("C2", H2): 8.0})
    assert set(res.leaf["basis"]) == {"leaf_forecast"}
    # parent = 4 + 8 = 12
    assert res.parent["forecast"].tolist() == pytest.approx([12.0, 12.0])
    assert set(res.parent["model"]) == {"bottom_up"}
    assert set(res.parent["model_grain"]) == {"leaf"}


def test_new_customer_history_is_part_of_the_parent_series(make_history, make_children, make_config):
    # C2 is new (two weeks of its own); its volume is real parent volume, not a copy
    history = make_history([("P1", "S1", "C1", w, 6) for w in WEEKS] + [("P1", "S1", "C2", w, 6) for w in WEEKS[2:]])
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    tg = targets([("P1", "S1", c, h, 1.0) for h in (H1, H2) for c in ("C1", "C2")])
    res = forecast_cycle(history, children, tg, cfg(make_config), CYCLE)
    # parent 6, 6, 12, 12: sizes SES 6 -> 6 -> 6.6 -> 7.14, interval 1 -> Croston 7.14
    # (C1 alone, a constant 6, would forecast 6)
    assert res.parent["forecast"].tolist() == pytest.approx([7.14, 7.14])


def test_parent_period_whose_shares_are_all_zero_is_forecast_zero_with_its_reason(
    make_history, make_children, make_config
):
    history = constant_history(make_history, {"C1": 4, "C2": 8})
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    # H1 splits 1 : 3; in H2 the product has ended, every share 0 with reason product_not_active
    tg = targets(
        [("P1", "S1", "C1", H1, 1.0, 0.25), ("P1", "S1", "C2", H1, 3.0, 0.75)]
        + [("P1", "S1", c, H2, 0.0, 0.0, "product_not_active") for c in ("C1", "C2")]
    )
    res = forecast_cycle(history, children, tg, cfg(make_config), CYCLE)
    ParentForecast.validate(res.parent)
    # the model gives 12 in both weeks; H2 is set to 0 and says why
    assert res.parent["forecast"].tolist() == pytest.approx([12.0, 0.0])
    assert [None if pd.isna(r) else r for r in res.parent["zero_reason"]] == [None, "product_not_active"]
    # H1: 12 x 1/4 = 3, 12 x 3/4 = 9; H2: 0 and 0 (children still sum to the parent)
    assert leaf_values(res) == pytest.approx({("C1", H1): 3.0, ("C2", H1): 9.0, ("C1", H2): 0.0, ("C2", H2): 0.0})


def _series(nonzero_sizes, length):
    """The sizes in order, the first at period 0, zeros spread after it so the series has `length` periods."""
    values = [0.0] * length
    gaps = length - len(nonzero_sizes)
    slots = [0] + sorted(set(range(1, length)) - set(range(2, 2 + 3 * gaps, 3)))[: len(nonzero_sizes) - 1]
    for slot, size in zip(slots, nonzero_sizes, strict=False):
        values[slot] = float(size)
    return values


def test_both_cut_offs_at_once_the_four_corners():
    high = [17, 3] * 25  # 50 sizes, mean 10, variance 49 -> CV2 0.49 exactly
    low = [16, 4] * 25  # mean 10, variance 36 -> CV2 0.36
    series = [_series(high, 66), _series(low, 66), _series(high, 64), _series(low, 64)]
    cls, adi, cv2 = demand_classes(grid_of(*series))
    # ADI 66/50 = 1.32 (on the cut-off) and 64/50 = 1.28 (below it)
    assert adi.tolist() == pytest.approx([1.32, 1.32, 1.28, 1.28])
    assert cv2.tolist() == pytest.approx([0.49, 0.36, 0.49, 0.36])
    # on both cut-offs -> lumpy; on ADI only -> intermittent; on CV2 only -> erratic; neither -> smooth
    assert cls.tolist() == ["lumpy", "intermittent", "erratic", "smooth"]


def test_just_either_side_of_the_adi_cut_off():
    # 100 demands in 131, 132 and 133 periods: ADI 1.31, 1.32, 1.33
    cls, adi, _ = demand_classes(grid_of(_series([5] * 100, 131), _series([5] * 100, 132), _series([5] * 100, 133)))
    assert adi.tolist() == pytest.approx([1.31, 1.32, 1.33])
    assert cls.tolist() == ["smooth", "intermittent", "intermittent"]


# ------------------------------------------------------------------ strategies in the cycle


def auto_cfg(make_config, models=CROSTON):
    return make_config({"a": {"window": 4, "strategy": "auto", "models": models}}, calendar={"horizon": 2})


def test_auto_class_follows_forecast_proportions_chosen_by_the_backtest(make_history, make_children, make_config):
    history = constant_history(make_history, {"C1": 4, "C2": 8})
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    # targets 3 : 1 would give 9 and 3; forecast proportions follow the children's own forecasts 4 : 8
    tg = targets([("P1", "S1", c, h, t) for h in (H1, H2) for c, t in (("C1", 3), ("C2", 1))])
    res = forecast_cycle(history, children, tg, auto_cfg(make_config), CYCLE,
                         chosen={"a": "forecast_proportions"})
    # parent 12 (Croston of a constant) x 4/12 and x 8/12
    assert leaf_values(res) == pytest.approx({("C1", H1): 4.0, ("C2", H1): 8.0, ("C1", H2): 4.0, ("C2", H2): 8.0})
    assert set(res.leaf["basis"]) == {"children_forecast"}
    assert set(res.parent["strategy"]) == {"forecast_proportions"} and set(res.parent["model_grain"]) == {"both"}
    ParentForecast.validate(res.parent)
    StatisticalForecast.validate(res.leaf)


# twelve weeks of history for the MinT checks through the cycle: two parents of 3 and 2 children, every series
# with demand in its first week (so each model sees the same weeks), smooth and intermittent children
MINT_WEEKS = pd.date_range(end="2026-01-26", periods=12, freq="W-MON")
MINT_SERIES = {
    ("P1", "C1"): [10, 12, 9, 11, 10, 13, 9, 10, 12, 11, 10, 9],
    ("P1", "C2"): [3, 0, 0, 6, 0, 2, 0, 0, 5, 0, 0, 1],
    ("P1", "C3"): [1, 0, 4, 0, 0, 0, 7, 0, 0, 3, 0, 0],
    ("P2", "C1"): [5, 7, 4, 6, 8, 5, 6, 7, 5, 6, 4, 7],
    ("P2", "C2"): [2, 2, 0, 9, 1, 0, 0, 8, 2, 0, 1, 0],
}
# one parent whose reconciled C3 falls below 0: C2 jumps in the last week (its own SES follows, the parent's
# smoother SES does not, so the parent is under the children's sum), and C3, big early and 0 since, has the
# largest residual variance and a forecast near 0, so it takes most of the cut
NEGATIVE_SERIES = {
    ("P1", "C1"): [10, 12, 9, 11, 10, 13, 9, 10, 12, 11, 10, 9],
    ("P1", "C2"): [1, 0, 1, 0, 1, 0, 1, 0, 1, 0, 2, 30],
    ("P1", "C3"): [40, 35, 45, 30, 38, 0, 0, 0, 0, 0, 0, 0],
}


def _mint_reference(method, series_of, model):
    """hierarchicalforecast's reconciled values of each parent's tree, from base forecasts made outside the project.

    Base forecasts and in-sample fitted values: statsforecast's `model` on every series (a parent's series is the
    weekly sum of its children's), as the class's models say. Residuals y - fitted over the 12 weeks, 0 in the
    first week where the model has no fitted value (the cycle's documented convention,
    pipelines.engines.base_forecasts.residual_matrix). Reconciliation: hierarchicalforecast 1.5.3
    MinTrace(method=...) on the tree [parent; children] of each parent, S = [1'; I].
    Returns {(product, customer or ''): (reconciled, base) values over the 2 horizon weeks}.
    """
    from hierarchicalforecast.methods import MinTrace
    from statsforecast import StatsForecast

    out = {}
    for product in sorted({p for p, _ in series_of}):
        kids = [c for p, c in series_of if p == product]
        ys = np.array([series_of[(product, c)] for c in kids], dtype=float)
        series = np.vstack([ys.sum(axis=0), ys])
        frame = pd.DataFrame(
            {"unique_id": np.repeat(np.arange(len(series)), 12), "ds": np.tile(MINT_WEEKS, len(series)),
             "y": series.ravel()}
        )
        sf = StatsForecast(models=[model], freq="W-MON")
        name = repr(model)
        base = sf.forecast(df=frame, h=2, fitted=True).sort_values(["unique_id", "ds"])
        fitted = sf.forecast_fitted_values().sort_values(["unique_id", "ds"])
        y_hat = base[name].to_numpy().reshape(len(series), 2)
        residuals = np.nan_to_num(series - fitted[name].to_numpy().reshape(len(series), 12))
        S = np.vstack([np.ones((1, len(kids))), np.eye(len(kids))])
        rec = MinTrace(method=method).fit_predict(
            S=S, y_hat=y_hat, y_insample=residuals, y_hat_insample=np.zeros_like(residuals)
        )["mean"]
        for i, key in enumerate([(product, "")] + [(product, c) for c in kids]):
            out[key] = (rec[i], y_hat[i])
    return out


def _cycle(series_of, models, method, make_history, make_children, make_config):
    history = make_history(
        [(p, "S1", c, str(w.date()), q) for (p, c), qs in series_of.items() for w, q in zip(MINT_WEEKS, qs,
                                                                                           strict=True)]
    )
    children = make_children([(p, "S1", c) for p, c in series_of])
    tg = targets([(p, "S1", c, h, 1.0) for (p, c) in series_of for h in (H1, H2)])
    config = make_config({"a": {"window": 12, "strategy": "auto", "models": models}}, calendar={"horizon": 2})
    return forecast_cycle(history, children, tg, config, CYCLE, chosen={"a": method})


def _values(res, product, customer=""):
    frame = res.leaf if customer else res.parent
    rows = frame[(frame["product"] == product) & ((frame["customer"] == customer) if customer else True)]
    return rows.sort_values("period_start")


@pytest.mark.parametrize("method", ["mint_shrink", "wls_var"])
def test_auto_class_reconciled_by_mint_equals_hierarchicalforecast(method, make_history, make_children, make_config):
    from statsforecast.models import CrostonClassic

    res = _cycle(MINT_SERIES, CROSTON, method, make_history, make_children, make_config)
    expected = _mint_reference(method, MINT_SERIES, CrostonClassic())
    # the base forecasts were incoherent, so the reference moved them: this compares a real reconciliation
    moved = max(np.abs(rec - base).max() for rec, base in expected.values())
    assert moved > 0.05
    # no reconciled value below 0 here, so nothing was redistributed
    assert res.redistributed.empty and all((rec >= 0).all() for rec, _ in expected.values())
    # tolerance 1e-7 relative: the two compute W and the projection in different orders; the residuals and
    # base forecasts come from the same statsforecast model, so they agree to rounding
    for (product, customer), (values, _) in expected.items():
        got = _values(res, product, customer)
        if customer:
            np.testing.assert_allclose(got["forecast"], values, rtol=1e-7)
        else:
            np.testing.assert_allclose(got["strategy_forecast"], values, rtol=1e-7)
            np.testing.assert_allclose(got["forecast"], values, rtol=1e-7)
    assert set(res.leaf["basis"]) == {"reconciled"}


@pytest.mark.parametrize("method", ["mint_shrink", "wls_var"])
def test_a_reconciled_leaf_below_zero_is_redistributed_keeping_the_reconciled_parent(
    method, make_history, make_children, make_config
):
    from hierarchicalforecast.methods import TopDown
    from statsforecast.models import SimpleExponentialSmoothingOptimized

    models = {k: "ses" for k in ("smooth", "erratic", "intermittent", "lumpy")}
    res = _cycle(NEGATIVE_SERIES, models, method, make_history, make_children, make_config)
    expected = _mint_reference(method, NEGATIVE_SERIES, SimpleExponentialSmoothingOptimized())
    parent = expected[("P1", "")][0]
    leaves = np.vstack([expected[("P1", c)][0] for c in ("C1", "C2", "C3")])
    assert (leaves[2] < -1.0).all()  # MinT's C3 is well below 0 in both weeks
    # then the rule of pipelines.engines.hierarchy.nonnegative_keeping_parent, by the second reference:
    # hierarchicalforecast 1.5.3 TopDown(method="forecast_proportions") of the reconciled parent over the
    # reconciled leaves clipped at 0 (hierarchicalforecast's own MinTrace(nonnegative=True) solves a QP instead:
    # another rule, not compared)
    split = TopDown(method="forecast_proportions").fit_predict(
        S=np.vstack([np.ones((1, 3)), np.eye(3)]),
        y_hat=np.vstack([parent[None, :], np.clip(leaves, 0, None)]),
        tags={"parent": np.array([0]), "parent/child": np.arange(1, 4)},
    )["mean"][1:]
    got = np.vstack([_values(res, "P1", c)["forecast"].to_numpy() for c in ("C1", "C2", "C3")])
    np.testing.assert_allclose(got, split, rtol=1e-7)
    assert got[2].tolist() == [0.0, 0.0]
    # the parent keeps the reconciled value, and the moved volume (what C3 held below 0) is reported per period
    np.testing.assert_allclose(_values(res, "P1")["strategy_forecast"], parent, rtol=1e-7)
    np.testing.assert_allclose(got.sum(axis=0), parent, rtol=1e-7)
    moved = res.redistributed.sort_values("period_start")
    np.testing.assert_allclose(moved["volume_moved"], -leaves[2], rtol=1e-6)
    assert res.reconciled_negatives == 2


def test_auto_class_without_a_backtest_choice_is_a_named_config_error(make_history, make_children, make_config):
    history = constant_history(make_history, {"C1": 4})
    children = make_children([("P1", "S1", "C1")])
    tg = targets([("P1", "S1", "C1", h, 1.0) for h in (H1, H2)])
    with pytest.raises(ConfigError) as err:
        forecast_cycle(history, children, tg, auto_cfg(make_config), CYCLE)
    assert "product_classes.a.strategy" in str(err.value) and "strategy_choice" in str(err.value)


def test_forecast_models_table_names_model_and_croston_state(make_history, make_children, make_config):
    history = make_history([("P1", "S1", "C1", WEEKS[0], 4), ("P1", "S1", "C1", WEEKS[2], 6)])
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    tg = targets([("P1", "S1", c, h, 1.0) for h in (H1, H2) for c in ("C1", "C2")])
    res = forecast_cycle(history, children, tg, cfg(make_config), CYCLE)
    models = ForecastModels.validate(res.models)
    row = models.iloc[0]
    # one parent series (top-down): sizes 4, 6 -> 4.2; intervals 1, 2 -> 1.1 (see the intermittent test above)
    assert (row["grain"], row["customer"], row["model"], row["demand_class"]) == (
        "parent",
        "",
        "croston_classic",
        "intermittent",
    )
    assert row["parameters"] == "alpha=0.1 size=4.2 interval=1.1"
    assert len(models) == 1


def test_fitted_values_are_kept_for_the_classes_mint_reconciles(make_history, make_children, make_config):
    from pipelines.schemas_forecast import ForecastFittedValues

    history = constant_history(make_history, {"C1": 4, "C2": 8})
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")])
    tg = targets([("P1", "S1", c, h, 1.0) for h in (H1, H2) for c in ("C1", "C2")])
    res = forecast_cycle(history, children, tg, auto_cfg(make_config), CYCLE, chosen={"a": "wls_var"})
    fitted = ForecastFittedValues.validate(res.fitted)
    # parent and two leaves, 4 weeks each; statsforecast's Croston has no fitted value for the first week -> 3 each
    assert sorted(set(zip(fitted["grain"], fitted["customer"], strict=False))) == [
        ("leaf", "C1"),
        ("leaf", "C2"),
        ("parent", ""),
    ]
    leaf_c2 = fitted[fitted["customer"] == "C2"]
    assert leaf_c2["fitted"].tolist() == pytest.approx([8.0, 8.0, 8.0])
    assert leaf_c2["period_start"].tolist() == [pd.Timestamp(w) for w in WEEKS[1:]]
    # a top-down class needs no residuals, so nothing is kept
    assert forecast_cycle(history, children, tg, cfg(make_config), CYCLE).fitted.empty


def test_leaf_grain_child_is_forecast_zero_outside_its_active_periods(make_history, make_children, make_config):
    history = constant_history(make_history, {"C1": 4, "C2": 8})
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]).assign(
        first_active_period=[H1, H2], last_active_period=[H1, H2]  # C1 ends after H1, C2 starts in H2
    )
    tg = targets([("P1", "S1", c, h, 1.0) for h in (H1, H2) for c in ("C1", "C2")])
    res = forecast_cycle(history, children, tg, cfg(make_config, "bottom_up"), CYCLE)
    # own forecasts 4 and 8, kept only where active: C1 H1 4, C2 H2 8; the parent is their sum
    assert leaf_values(res) == pytest.approx({("C1", H1): 4.0, ("C2", H1): 0.0, ("C1", H2): 0.0, ("C2", H2): 8.0})
    assert res.parent["forecast"].tolist() == pytest.approx([4.0, 8.0])
    assert res.parent["zero_reason"].isna().all()


def test_forecast_proportions_split_among_the_active_children_only(make_history, make_children, make_config):
    history = constant_history(make_history, {"C1": 4, "C2": 8})
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]).assign(
        first_active_period=[H1, H1], last_active_period=[H1, H2]  # C1 ends after H1
    )
    tg = targets([("P1", "S1", "C1", H1, 1.0), ("P1", "S1", "C2", H1, 2.0), ("P1", "S1", "C1", H2, 0.0, 0.0),
                  ("P1", "S1", "C2", H2, 1.0, 1.0)])
    res = forecast_cycle(history, children, tg, auto_cfg(make_config), CYCLE, chosen={"a": "forecast_proportions"})
    # parent 12 (Croston of a constant 12); H1: own forecasts 4 : 8 -> 4 and 8; H2: C1 is not active, so C2's
    # own forecast is the only proportion and C2 takes all 12 (a split that gave C1 its 4 and then set it to 0
    # would lose 4 of the model's 12)
    assert leaf_values(res) == pytest.approx({("C1", H1): 4.0, ("C2", H1): 8.0, ("C1", H2): 0.0, ("C2", H2): 12.0})
    assert res.parent["strategy_forecast"].tolist() == pytest.approx([12.0, 12.0])
    assert res.parent["forecast"].tolist() == pytest.approx([12.0, 12.0])


def test_a_period_no_active_child_can_take_is_set_to_zero_with_its_reason(make_history, make_children, make_config):
    history = constant_history(make_history, {"C1": 4})
    children = make_children([("P1", "S1", "C1"), ("P1", "S1", "C2")]).assign(
        first_active_period=[H1, H2], last_active_period=[H1, H2]  # C1 ends after H1; new C2 starts in H2
    )
    # H2: C2 is new without history or share (awaiting_history): no own forecast, no share to fall back on
    tg = targets([("P1", "S1", "C1", H1, 1.0, 1.0), ("P1", "S1", "C2", H1, 0.0, 0.0),
                  ("P1", "S1", "C1", H2, 0.0, 0.0, "awaiting_history"),
                  ("P1", "S1", "C2", H2, 0.0, 0.0, "awaiting_history")])
    res = forecast_cycle(history, children, tg, auto_cfg(make_config), CYCLE, chosen={"a": "forecast_proportions"})
    # the model's 4 in H2 reaches nobody: the period is set to 0 and says why; the strategy's 4 stays on record
    assert res.parent["strategy_forecast"].tolist() == pytest.approx([4.0, 4.0])
    assert res.parent["forecast"].tolist() == pytest.approx([4.0, 0.0])
    assert [None if pd.isna(r) else r for r in res.parent["zero_reason"]] == [None, "awaiting_history"]
    assert leaf_values(res) == pytest.approx({("C1", H1): 4.0, ("C2", H1): 0.0, ("C1", H2): 0.0, ("C2", H2): 0.0})


def test_models_used_counts_each_parent_once_by_class_strategy_demand_class_and_model():
    # the demo's consumables (top-down, AutoETS) and spares given a strategy (MinT) and a model per demand
    # class, made by the stages' own runs; the metadata's parents per model (made from the per-parent arrays,
    # not from the table's rows) against the parent table's distinct parents
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parent))
    from stage_runs import demo_config, run_partition

    from assets.factory import graph_order
    from pipelines import definitions  # noqa: F401  (makes every stage asset, so the graph holds them all)
    from pipelines.keys import PARENT

    spec = next(s for s in graph_order() if s.tables[0].name == "statistical_forecast")
    models = {"smooth": "ses", "erratic": "ses", "intermittent": "croston_classic", "lumpy": "croston_sba"}
    config = demo_config(
        {"consumables": {"seasonality": "none"}, "spares": {"strategy": "mint_shrink", "models": models}}
    )
    columns = ["product_class", "strategy", "demand_class", "model"]
    for product_class in ("consumables", "spares"):
        run = run_partition(config, "2026-11-30", product_class, upto="statistical_forecast")
        settings = run.settings["statistical_forecast"]
        result = spec.run(**{name: run.tables[name] for name in spec.ins}, settings=settings)
        parent = result.outputs["parent_forecast"]
        expected = parent.drop_duplicates(PARENT).groupby(columns).size().rename("parents").reset_index()
        used = result.metadata["parent_forecast"]["models_used"]
        assert used["parents"].sum() == len(parent.drop_duplicates(PARENT)) > 1
        pd.testing.assert_frame_equal(used, expected, check_exact=True)
