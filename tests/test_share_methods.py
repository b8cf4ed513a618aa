"""The share methods `smoothed`, `seasonal` and `children_forecast`: hand-worked cases,
the per-period basis under the lifecycle rules, the config keys, and properties.

Weekly cases: cycle date 2026-02-02, age 1 = week 2026-01-26 ... age 5 = 2025-12-29;
horizon H1 = 02-02, H2 = 02-09, H3 = 02-16. Outside references are in
tests/test_share_methods_reference.py.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipelines.engines.period_shares import period_of_year, period_shares
from pipelines.engines.proofs import find_shares_not_summing_to_one
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.share_tuning import candidate_settings
from pipelines.engines.shares import cell_proportions, child_frame, compute_shares, horizon_basis, ratio_smoothed
from pipelines.errors import ConfigError
from pipelines.keys import LEAF
from pipelines.schemas import PERIOD_BASES, ReinitializedTarget, ShareTable
from pipelines.stages.reinitialized_target import reinitialize_target

CYCLE = pd.Timestamp("2026-02-02")
AGE = {1: "2026-01-26", 2: "2026-01-19", 3: "2026-01-12", 4: "2026-01-05", 5: "2025-12-29"}
H1, H2, H3 = "2026-02-02", "2026-02-09", "2026-02-16"
# every demand class forecast by seasonal naive with season 1, i.e. the last value: forecasts by hand
LAST_VALUE = {
    "smooth": "seasonal_naive",
    "erratic": "seasonal_naive",
    "intermittent": "seasonal_naive",
    "lumpy": "seasonal_naive",
}


def history_rows(volumes, product="P1", site="S1", dates=AGE):
    """volumes: {customer: {age or date key: quantity}} -> lifecycle history rows."""
    return [(product, site, c, dates[a], q) for c, by_age in volumes.items() for a, q in by_age.items()]


def by_customer(shares, column="share"):
    return dict(zip(shares["customer"], shares[column], strict=False))


def by_period(target, column="share"):
    """{customer: [value per horizon period]}"""
    t = target.sort_values(["customer", "period_start"])
    return {c: g[column].tolist() for c, g in t.groupby("customer")}


def basis_by_period(target):
    """[share_basis per horizon period] of a one-parent target."""
    return target.drop_duplicates("period_start").sort_values("period_start")["basis"].tolist()


def children(customers, product="P1"):
    return pd.DataFrame([(product, "S1", c, "a") for c in customers], columns=LEAF + ["product_class"])


# ------------------------------------------------------------------ smoothed
# ages 5..1 (oldest first): age 5 and age 3 have no parent volume
#   age 4: C1 1, C2 1 (0.5 / 0.5)   age 2: C1 1, C2 3 (0.25 / 0.75)   age 1: C1 3, C2 1 (0.75 / 0.25)
SMOOTHED = {"C1": {5: 0, 4: 1, 3: 0, 2: 1, 1: 3}, "C2": {5: 0, 4: 1, 3: 0, 2: 3, 1: 1}}


def test_smoothed_starts_at_the_first_proportion_and_skips_periods_without_parent_volume(make_history, make_config):
    config = make_config({"a": {"window": 5, "method": "smoothed", "smoothing": 0.5}})
    shares = compute_shares(make_history(history_rows(SMOOTHED)), children(["C1", "C2"]), config, CYCLE)
    # age 5: no volume, nothing to start from; age 4 starts p: C1 0.5, C2 0.5
    # age 3: no parent volume, p unchanged; age 2: C1 0.5 x 0.25 + 0.5 x 0.5 = 0.375, C2 0.5 x 0.75 + 0.5 x 0.5 = 0.625
    # age 1: C1 0.5 x 0.75 + 0.5 x 0.375 = 0.5625, C2 0.5 x 0.25 + 0.5 x 0.625 = 0.4375 (sum 1)
    # (pooled: C1 5/10 = 0.5; mean_of_ratios: (0.5 + 0.25 + 0.75) / 3 = 0.5)
    assert by_customer(shares, "history_share") == pytest.approx({"C1": 0.5625, "C2": 0.4375})
    assert by_customer(shares) == pytest.approx({"C1": 0.5625, "C2": 0.4375})
    assert set(shares["method"]) == {"smoothed"} and set(shares["fallback"]) == {"none"}
    ShareTable.validate(shares)


def test_smoothed_with_alpha_one_is_the_last_proportion(make_history, make_config):
    config = make_config({"a": {"window": 5, "method": "smoothed", "smoothing": 1.0}})
    shares = compute_shares(make_history(history_rows(SMOOTHED)), children(["C1", "C2"]), config, CYCLE)
    # alpha 1: p_t = y_t / Y_t, the last period's proportion 3/4, 1/4
    assert by_customer(shares) == pytest.approx({"C1": 0.75, "C2": 0.25})


def test_smoothed_leaves_a_shortage_period_out_like_one_without_volume(make_history, make_config):
    config = make_config({"a": {"window": 5, "method": "smoothed", "smoothing": 0.5}})
    rows = [("P1", "S1", c, AGE[a], q, "own", "P1", c, a == 1) for c, v in SMOOTHED.items() for a, q in v.items()]
    shares = compute_shares(make_history(rows), children(["C1", "C2"]), config, CYCLE)
    # age 1 is a shortage period: p stops after age 2 at C1 0.375, C2 0.625
    assert by_customer(shares) == pytest.approx({"C1": 0.375, "C2": 0.625})


def test_smoothed_parent_without_volume_falls_back_to_a_longer_window(make_history, make_config):
    config = make_config({"a": {"window": 2, "method": "smoothed", "smoothing": 0.5, "fallback_windows": [4]}})
    volumes = {"C1": {4: 1, 3: 3}, "C2": {4: 3, 3: 1}}  # nothing in ages 1-2
    shares = compute_shares(make_history(history_rows(volumes)), children(["C1", "C2"]), config, CYCLE)
    # window 4: age 4 starts C1 0.25, C2 0.75; age 3: C1 0.5 x 0.75 + 0.5 x 0.25 = 0.5, C2 0.5; ages 2, 1 empty
    assert by_customer(shares) == pytest.approx({"C1": 0.5, "C2": 0.5})
    assert set(shares["fallback"]) == {"longer_window"} and set(shares["window_used"]) == {4}


@settings(max_examples=200, deadline=None)
@given(
    st.lists(st.lists(st.integers(0, 9), min_size=6, max_size=6), min_size=1, max_size=5),
    st.floats(0.01, 1.0),
)
def test_property_smoothed_proportions_stay_a_probability_vector(volumes, alpha):
    # one parent, children x ages 1..6; each update is a convex combination of two probability vectors
    n = len(volumes)
    q = np.asarray(volumes, dtype=float)
    p = ratio_smoothed(*cell_proportions(q, np.zeros(n, dtype=np.int64), 1), alpha)  # column a - 1: age a
    assert (p >= 0).all() and (p <= 1 + 1e-12).all()
    if q.sum() > 0:
        assert p.sum() == pytest.approx(1.0, abs=1e-12)
    else:
        assert (p == 0).all()


# ------------------------------------------------------------------ seasonal (monthly)
# cycle 2026-03-01, horizon March and April 2026; seasonal_years 2 -> the Marches of 2025 and 2024,
# the Aprils of 2025 and 2024 (March 2023 is a third year: left out)
MONTHS = {
    "2023-03": "2023-03-01", "2024-03": "2024-03-01", "2025-03": "2025-03-01", "2024-04": "2024-04-01",
    "2025-04": "2025-04-01", "2025-02": "2025-02-01", "2025-06": "2025-06-01", "2026-02": "2026-02-01",
}
SEASONAL = {
    "C1": {"2023-03": 100, "2024-03": 2, "2025-03": 4, "2025-06": 10, "2026-02": 5},
    "C2": {"2024-03": 6, "2025-03": 4, "2025-06": 10, "2026-02": 5},
    "C3": {"2025-03": 4, "2025-06": 2, "2025-02": 1},
}
MONTH_CYCLE = pd.Timestamp("2026-03-01")


def monthly(make_config, **seasonal):
    return make_config(
        {"a": {"window": 12, "method": "seasonal"} | seasonal}, calendar={"period": "month", "horizon": 2}
    )


def test_seasonal_pools_the_same_month_of_the_last_years_and_falls_back_to_pooled(make_history, make_config):
    config = monthly(make_config, seasonal_years=2)
    history = make_history(history_rows(SEASONAL, dates=MONTHS))
    shares = compute_shares(history, children(["C1", "C2", "C3"]), config, MONTH_CYCLE)
    # summary (and fallback): pooled over the 12 months 2025-03 .. 2026-02:
    #   C1 4 + 10 + 5 = 19, C2 4 + 10 + 5 = 19, C3 4 + 2 = 6 (its 2025-02 is 13 months back) -> 44
    assert by_customer(shares, "history_share") == pytest.approx({"C1": 19 / 44, "C2": 19 / 44, "C3": 6 / 44})
    target = ReinitializedTarget.validate(reinitialize_target(shares, history, config, MONTH_CYCLE))
    # March 2026: Marches 2025 + 2024: C1 4 + 2 = 6, C2 4 + 6 = 10, C3 4 + 0 = 4 -> 20 (C1's 100 of 2023 left out)
    # April 2026: no volume in the Aprils of 2025 and 2024 -> the pooled share
    assert by_period(target) == {
        "C1": pytest.approx([0.3, 19 / 44]), "C2": pytest.approx([0.5, 19 / 44]), "C3": pytest.approx([0.2, 6 / 44])
    }
    assert basis_by_period(target) == ["period_of_year", "pooled_fallback"]
    # baseline: 44 over 12 months; March target of C1 0.3 x 44 / 12 = 1.1
    assert by_period(target, "target")["C1"][0] == pytest.approx(1.1)


def test_seasonal_band_pools_the_neighbouring_months_each_from_its_own_last_years(make_history, make_config):
    config = monthly(make_config, seasonal_years=2, seasonal_band=1)
    history = make_history(history_rows(SEASONAL, dates=MONTHS))
    shares = compute_shares(history, children(["C1", "C2", "C3"]), config, MONTH_CYCLE)
    target = reinitialize_target(shares, history, config, MONTH_CYCLE)
    # March: February (2026, 2025), March (2025, 2024), April (2025, 2024):
    #   C1 5 + 0 + 4 + 2 + 0 = 11, C2 5 + 0 + 4 + 6 + 0 = 15, C3 0 + 1 + 4 + 0 + 0 = 5 -> 31
    # April: March, April, May of 2025 and 2024: C1 6, C2 10, C3 4 -> 20 (now April has a basis)
    assert by_period(target) == {
        "C1": pytest.approx([11 / 31, 0.3]), "C2": pytest.approx([15 / 31, 0.5]), "C3": pytest.approx([5 / 31, 0.2])
    }
    assert basis_by_period(target) == ["period_of_year", "period_of_year"]


def test_seasonal_years_default_is_three(make_history, make_config):
    config = monthly(make_config)
    assert config.product_classes["a"].years == 3 and config.product_classes["a"].band == 0
    history = make_history(history_rows(SEASONAL, dates=MONTHS))
    target = reinitialize_target(
        compute_shares(history, children(["C1", "C2", "C3"]), config, MONTH_CYCLE), history, config, MONTH_CYCLE
    )
    # three Marches 2025, 2024, 2023: C1 4 + 2 + 100 = 106, C2 10, C3 4 -> 120
    assert [v[0] for v in by_period(target).values()] == pytest.approx([106 / 120, 10 / 120, 4 / 120])


# ------------------------------------------------------------------ seasonal (weekly): ISO week 53
WEEK_DATES = {d: d for d in ("2024-12-23", "2025-12-22", "2025-12-29", "2026-12-21", "2026-12-28", "2027-01-04")}


def test_iso_week_53_counts_as_week_52(make_history, make_config):
    # the calendar facts the case rests on, from pandas' ISO calendar
    assert tuple(pd.Timestamp("2026-12-28").isocalendar())[:2] == (2026, 53)
    assert tuple(pd.Timestamp("2025-12-29").isocalendar())[:2] == (2026, 1)
    assert period_of_year(pd.DatetimeIndex(["2026-12-21", "2026-12-28", "2027-01-04"]), "week")[0].tolist() == [
        51,
        51,
        0,
    ]
    config = make_config({"a": {"window": 52, "method": "seasonal", "seasonal_years": 2}}, calendar={"horizon": 2})
    volumes = {
        "C1": {"2026-12-21": 1, "2026-12-28": 3, "2025-12-22": 2, "2024-12-23": 50, "2027-01-04": 4, "2025-12-29": 0},
        "C2": {"2026-12-21": 3, "2026-12-28": 1, "2025-12-22": 6, "2024-12-23": 0, "2027-01-04": 4, "2025-12-29": 4},
    }
    cycle = pd.Timestamp("2027-12-27")  # ISO 2027-W52; H2 2028-01-03 is 2028-W01
    history = make_history(history_rows(volumes, dates=WEEK_DATES))
    target = reinitialize_target(compute_shares(history, children(["C1", "C2"]), config, cycle), history, config, cycle)
    # week 52, two most recent years: ISO 2026 (W52 2026-12-21 and W53 2026-12-28, one occurrence) and 2025 (W52
    # 2025-12-22);
    # 2024's W52 is a third year: C1 1 + 3 + 2 = 6, C2 3 + 1 + 6 = 10 -> 0.375, 0.625
    # week 1: 2027-W01 (2027-01-04) and 2026-W01 (2025-12-29): C1 4 + 0 = 4, C2 4 + 4 = 8 -> 1/3, 2/3
    assert by_period(target) == {"C1": pytest.approx([0.375, 1 / 3]), "C2": pytest.approx([0.625, 2 / 3])}


def test_horizon_week_53_reads_the_history_of_week_52(make_history, make_config):
    config = make_config({"a": {"window": 4, "method": "seasonal", "seasonal_years": 2}}, calendar={"horizon": 1})
    volumes = {
        "C1": {"2026-12-21": 1, "2025-12-22": 1, "2024-12-23": 9},
        "C2": {"2026-12-21": 3, "2025-12-22": 5, "2024-12-23": 0},
    }
    cycle = pd.Timestamp("2026-12-28")  # the horizon week is ISO 2026-W53
    history = make_history(history_rows(volumes, dates=WEEK_DATES))
    target = reinitialize_target(compute_shares(history, children(["C1", "C2"]), config, cycle), history, config, cycle)
    # W53 is read as W52; its two most recent years before the cycle: 2026-12-21 and 2025-12-22
    # C1 1 + 1 = 2, C2 3 + 5 = 8 -> 0.2, 0.8 (2024-12-23 is a third year)
    assert by_period(target) == {"C1": pytest.approx([0.2]), "C2": pytest.approx([0.8])}
    assert basis_by_period(target) == ["period_of_year"]


# ------------------------------------------------------------------ children_forecast
def lifecycle_children(rows):
    """rows: (product, customer, own_periods, first, last, reference_customer, scale) on site S1, class a."""
    frame = pd.DataFrame(
        rows,
        columns=[
            "product",
            "customer",
            "own_periods",
            "first_active_period",
            "last_active_period",
            "reference_customer",
            "scale",
        ],
    )
    frame.insert(1, "site", "S1")
    frame["product_class"] = "a"
    frame["initial_share"] = np.nan
    for c in ("first_active_period", "last_active_period"):
        frame[c] = pd.to_datetime(frame[c])
    return frame


def test_children_forecast_split_by_the_childrens_forecasts_under_the_lifecycle_rules(make_history, make_config):
    config = make_config(
        {"a": {"window": 4, "method": "children_forecast", "models": LAST_VALUE}},
        calendar={"horizon": 3},
        lifecycle={"min_history_periods": 3},
    )
    # P1 ages 4..1: C1 1, 2, 3, 6; C2 3, 3, 1, 2; C3 2, 0, 0, 0; C4 new (reference C1, scale 0.5, from H2);
    # C2 ends after H2. P2: C1 2, 2, 0, 0; C2 1, 0, 0, 0: both last values 0
    rows = history_rows(
        {"C1": {4: 1, 3: 2, 2: 3, 1: 6}, "C2": {4: 3, 3: 3, 2: 1, 1: 2}, "C3": {4: 2, 3: 0, 2: 0, 1: 0}}
    )
    rows += history_rows({"C1": {4: 2, 3: 2, 2: 0, 1: 0}, "C2": {4: 1, 3: 0, 2: 0, 1: 0}}, product="P2")
    kids = lifecycle_children(
        [
            ("P1", "C1", 4, H1, H3, None, np.nan),
            ("P1", "C2", 4, H1, H2, None, np.nan),
            ("P1", "C3", 4, H1, H3, None, np.nan),
            ("P1", "C4", 0, H2, H3, "C1", 0.5),
            ("P2", "C1", 4, H1, H3, None, np.nan),
            ("P2", "C2", 4, H1, H3, None, np.nan),
        ]
    )
    history = make_history(rows)
    shares = compute_shares(history, kids, config, CYCLE)
    p1 = shares[shares["product"] == "P1"]
    # summary: pooled over 4 weeks, C1 12, C2 9, C3 2 -> 23
    assert by_customer(p1, "history_share") == pytest.approx({"C1": 12 / 23, "C2": 9 / 23, "C3": 2 / 23, "C4": 0.0})
    target = ReinitializedTarget.validate(reinitialize_target(shares, history, config, CYCLE))
    t1, t2 = target[target["product"] == "P1"], target[target["product"] == "P2"]
    # forecasts = last values: C1 6, C2 2, C3 0 -> weights 0.75, 0.25, 0 in every period
    # H1: C4 not yet active -> 0.75, 0.25, 0, 0
    # H2: C4 takes 0.5 x 0.75 = 0.375 from C1 -> C1 0.375, C2 0.25, C3 0, C4 0.375
    # H3: C2 has ended -> C1 0.375 / 0.75 = 0.5, C4 0.5
    assert by_period(t1) == {
        "C1": pytest.approx([0.75, 0.375, 0.5]),
        "C2": pytest.approx([0.25, 0.25, 0.0]),
        "C3": pytest.approx([0.0, 0.0, 0.0]),
        "C4": pytest.approx([0.0, 0.375, 0.5]),
    }
    assert basis_by_period(t1) == ["children_forecast"] * 3
    # P2: both forecasts 0 -> pooled share C1 4/5, C2 1/5, recorded as the fallback
    assert by_period(t2) == {"C1": pytest.approx([0.8] * 3), "C2": pytest.approx([0.2] * 3)}
    assert basis_by_period(t2) == ["pooled_fallback"] * 3
    assert find_shares_not_summing_to_one(target).empty


def _lifecycle_case(make_history, make_config):
    """The config and history of the lifecycle cases below: three children with four, four and two periods of
    history, three needed to be established, a horizon of three."""
    config = make_config(
        {"a": {"window": 4, "method": "pooled", "models": LAST_VALUE}},
        calendar={"horizon": 3},
        lifecycle={"min_history_periods": 3},
    )
    rows = history_rows({"C1": {4: 1, 3: 2, 2: 3, 1: 6}, "C2": {4: 3, 3: 3, 2: 1, 1: 2}, "C3": {2: 2, 1: 0}})
    return config, make_history(rows)


def test_one_child_frame_for_every_window_and_method_gives_the_tables_made_alone(make_history, make_config):
    # the share tuning's candidates of an origin share one child_frame (backtest_origins.candidate_bases): each
    # table must equal compute_shares without it (a new customer with a reference, a late starter and a phase-out
    # among the children, so the lifecycle columns it carries are not trivial)
    config, history = _lifecycle_case(make_history, make_config)
    kids = lifecycle_children(
        [
            ("P1", "C1", 4, H1, H3, None, np.nan),
            ("P1", "C2", 4, H1, H2, None, np.nan),
            ("P1", "C3", 4, H2, H3, None, np.nan),
            ("P1", "C4", 0, H2, H3, "C1", 0.5),
        ]
    )
    config = ShareSettings.of(config)
    frame = child_frame(history, kids, config, CYCLE)
    for window, method in [(2, "pooled"), (4, "mean_of_ratios"), (3, "smoothed"), (4, "children_forecast")]:
        candidate = candidate_settings(config, window, method)
        shared = compute_shares(history, kids, candidate, CYCLE, frame)
        alone = compute_shares(history, kids, candidate, CYCLE)
        pd.testing.assert_frame_equal(shared, alone)
    assert set(alone["lifecycle_rule"]) == {"reference", "none", "phase_in", "phase_out"}


def test_a_share_basis_keeps_the_share_tables_rows_and_period_shares(make_history, make_config):
    # a named share basis of the plan takes only what period_shares reads of compute_shares' table
    # (horizon_basis, from a child_frame without the lifecycle texts) and the shares only of period_shares
    # (reasons=False): both must equal the full path's, to the bit, with a new customer on a reference, one on
    # an initial share, a late starter and a phase-out among the children, and the children out of key order
    config, history = _lifecycle_case(make_history, make_config)
    kids = lifecycle_children(
        [
            ("P1", "C4", 0, H2, H3, "C1", 0.5),
            ("P1", "C2", 4, H1, H2, None, np.nan),
            ("P1", "C1", 4, H1, H3, None, np.nan),
            ("P1", "C3", 4, H2, H3, None, np.nan),
            ("P1", "C5", 0, H1, H3, None, np.nan),
        ]
    )
    kids.loc[kids["customer"] == "C5", "initial_share"] = 0.2
    config = ShareSettings.of(config)
    lean = child_frame(history, kids, config, CYCLE, detail=False)
    assert lean.lifecycle[4] is None  # no texts written
    for window, method in [(2, "pooled"), (4, "mean_of_ratios"), (3, "smoothed")]:
        candidate = candidate_settings(config, window, method)
        table = compute_shares(history, kids, candidate, CYCLE)
        basis = horizon_basis(history, kids, candidate, CYCLE, lean)
        pd.testing.assert_frame_equal(basis, table[list(basis.columns)], check_exact=True)
        share, reason, _ = period_shares(table, candidate, CYCLE, history=history)
        alone, no_reason, _ = period_shares(basis, candidate, CYCLE, history=history, reasons=False)
        np.testing.assert_array_equal(alone, share)
        assert no_reason is None and reason is not None
    assert set(table["lifecycle_rule"]) == {"reference", "initial_share", "none", "phase_in", "phase_out"}


def test_pooled_and_mean_of_ratios_record_history_share_as_their_basis(make_history, make_config):
    volumes = {"C1": {2: 1, 1: 3}, "C2": {2: 3, 1: 1}}
    for method in ("pooled", "mean_of_ratios", "smoothed"):
        extra = {"smoothing": 0.3} if method == "smoothed" else {}
        config = make_config({"a": {"window": 2, "method": method} | extra}, calendar={"horizon": 2})
        history = make_history(history_rows(volumes))
        target = reinitialize_target(
            compute_shares(history, children(["C1", "C2"]), config, CYCLE), history, config, CYCLE
        )
        assert set(target["basis"]) == {"history_share"}


# ------------------------------------------------------------------ config
@pytest.mark.parametrize(
    ("section", "words"),
    [
        (
            {"window": 4, "smoothing": 0.2},
            ["product_classes.a", "smoothing applies only to method 'smoothed'", "'pooled'"],
        ),
        ({"window": 4, "method": "seasonal", "smoothing": 0.2}, ["smoothing applies only", "'seasonal'"]),
        ({"window": 4, "method": "smoothed"}, ["product_classes.a", "needs smoothing", "0 < alpha <= 1"]),
        (
            {"window": 4, "method": "smoothed", "smoothing": 0},
            ["product_classes.a.smoothing", "greater than 0 and at most 1"],
        ),
        ({"window": 4, "method": "smoothed", "smoothing": 1.5}, ["product_classes.a.smoothing", "at most 1", "1.5"]),
        ({"window": 4, "method": "seasonal", "seasonal_years": 0}, ["product_classes.a.seasonal_years", "1 to 10"]),
        ({"window": 4, "method": "seasonal", "seasonal_years": 11}, ["product_classes.a.seasonal_years", "1 to 10"]),
        ({"window": 4, "method": "seasonal", "seasonal_band": 5}, ["product_classes.a.seasonal_band", "0 to 4"]),
        (
            {"window": 4, "method": "mean_of_ratios", "seasonal_band": 1},
            ["seasonal_band applies only to method 'seasonal'"],
        ),
        (
            {"window": 4, "method": "weighted"},
            ["product_classes.a.method", "'smoothed'", "'seasonal'", "'children_forecast'"],
        ),
    ],
)
def test_config_refuses_bad_method_keys_naming_key_and_range(make_config, section, words):
    with pytest.raises(ConfigError) as err:
        make_config({"a": section})
    for word in words:
        assert word in str(err.value)


def test_config_accepts_each_method_with_its_keys(make_config):
    config = make_config(
        {
            "s": {"window": 26, "method": "smoothed", "smoothing": 0.2},
            "y": {"window": 52, "method": "seasonal", "seasonal_years": 2, "seasonal_band": 1},
            "f": {"window": 26, "method": "children_forecast"},
        }
    )
    assert config.product_classes["s"].smoothing == 0.2
    assert (config.product_classes["y"].years, config.product_classes["y"].band) == (2, 1)


# ------------------------------------------------------------------ property (hypothesis)
# Random history and lifecycle on up to 3 parents, each share method: per parent and period the shares
# sum to 1 or are all 0 with a recorded reason, they lie in [0, 1], and inactive or waiting children hold none.
WEEK = pd.Timedelta(days=7)
PROPERTY_HORIZON = 4


@st.composite
def method_inputs(draw):
    kids, history = [], []
    for p in range(draw(st.integers(1, 3))):
        product = f"P{p + 1}"
        customers = [f"C{c + 1}" for c in range(draw(st.integers(1, 4)))]
        for c in customers:
            first = draw(st.integers(0, PROPERTY_HORIZON))
            last = draw(st.integers(first - 1, PROPERTY_HORIZON))
            own = draw(st.sampled_from([0, 5]))
            others = [o for o in customers if o != c]
            reference = draw(st.one_of(st.none(), st.sampled_from(others))) if others and own == 0 else None
            initial = draw(st.one_of(st.none(), st.floats(0.0, 0.9))) if own == 0 and reference is None else None
            kids.append(
                (
                    product,
                    "S1",
                    c,
                    "a",
                    CYCLE + first * WEEK,
                    CYCLE + max(last, first - 1) * WEEK,
                    own,
                    reference,
                    draw(st.one_of(st.none(), st.floats(0.1, 1.0))),
                    initial,
                )
            )
            for age in range(1, draw(st.integers(0, 60)) + 1, draw(st.integers(1, 9))):
                history.append(
                    (
                        product,
                        "S1",
                        c,
                        CYCLE - age * WEEK,
                        float(draw(st.integers(0, 9))),
                        "own",
                        product,
                        c,
                        draw(st.booleans()) and draw(st.booleans()),
                    )
                )
    method = draw(st.sampled_from(["pooled", "mean_of_ratios", "smoothed", "seasonal", "children_forecast"]))
    return kids, history, method


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture]
)
@given(method_inputs())
def test_property_shares_of_every_method_sum_to_one_per_parent_and_period_or_are_all_zero(make_config, case):
    kid_rows, history_rows_, method = case
    extra = {
        "smoothed": {"smoothing": 0.3},
        "seasonal": {"seasonal_years": 1, "seasonal_band": 1},
        "children_forecast": {"models": LAST_VALUE},
    }
    config = make_config(
        {"a": {"window": 8, "method": method, "fallback_windows": [52]} | extra.get(method, {})},
        calendar={"horizon": PROPERTY_HORIZON},
        lifecycle={"min_history_periods": 3},
    )
    columns = LEAF + [
        "product_class",
        "first_active_period",
        "last_active_period",
        "own_periods",
        "reference_customer",
        "scale",
        "initial_share",
    ]
    kids = pd.DataFrame(kid_rows, columns=columns).astype(
        {"reference_customer": object, "scale": float, "initial_share": float}
    )
    # a span that ends before it starts is not active in the horizon: leave it out, as active_children does
    kids = kids[kids["last_active_period"] >= kids["first_active_period"]]
    hist_columns = LEAF + ["period_start", "quantity", "origin", "source_product", "source_customer", "shortage"]
    history = pd.DataFrame(history_rows_, columns=hist_columns).astype({"quantity": float, "shortage": bool})
    history["period_start"] = pd.to_datetime(history["period_start"])
    if kids.empty:
        return
    shares = compute_shares(history, kids, config, CYCLE)
    target = reinitialize_target(shares, history, config, CYCLE)

    assert find_shares_not_summing_to_one(target).empty
    assert target["share"].between(0, 1).all() and shares["share"].between(0, 1).all()
    assert target["basis"].isin(PERIOD_BASES).all()
    assert (target.groupby(["product", "site", "period_start"])["basis"].nunique() == 1).all()
    merged = target.merge(shares[LEAF + ["first_active_period", "last_active_period", "lifecycle_rule"]], on=LEAF)
    inactive = (merged["period_start"] < merged["first_active_period"]) | (
        merged["period_start"] > merged["last_active_period"]
    )
    assert (merged.loc[inactive | (merged["lifecycle_rule"] == "awaiting_history"), "share"] == 0).all()


def test_the_stored_period_basis_gives_the_same_target_as_computing_it(make_history, make_config):
    """The period basis is decided once (stage period_basis) and read by reinitialized_target: same numbers."""
    from pipelines.engines.share_settings import ShareSettings
    from pipelines.schemas import PeriodBasis
    from pipelines.stages import period_basis, reinitialized_target

    config = make_config(
        {"a": {"window": 4, "method": "children_forecast", "models": LAST_VALUE}},
        calendar={"horizon": 3},
        lifecycle={"min_history_periods": 3},
    )
    rows = history_rows({"C1": {4: 1, 3: 2, 2: 3, 1: 6}, "C2": {4: 3, 3: 3, 2: 1, 1: 2}})
    rows += history_rows({"C1": {4: 2, 3: 2, 2: 0, 1: 0}, "C2": {4: 1, 3: 0, 2: 0, 1: 0}}, product="P2")
    kids = lifecycle_children([(p, c, 4, H1, H3, None, np.nan) for p in ("P1", "P2") for c in ("C1", "C2")])
    history = make_history(rows)
    shares = compute_shares(history, kids, config, CYCLE)
    calendar = pd.DataFrame({"cycle_date": [CYCLE]})
    settings = ShareSettings.of(config)
    stored = period_basis.run(shares, history, calendar, settings).outputs["period_basis"]
    stored = PeriodBasis.validate(stored)  # as the store gives it back
    # P1: forecasts 6 and 2 -> 0.75 / 0.25 by children_forecast; P2: both 0 -> the pooled fallback
    assert set(stored["basis"]) == {"children_forecast", "pooled_fallback"} and len(stored) == 4 * 3
    result = reinitialized_target.run(shares, stored, history, None, calendar, settings)
    expected = reinitialize_target(shares, history, config, CYCLE)
    # the same rows, shares and bases (cycle_date differs only in its datetime unit)
    pd.testing.assert_frame_equal(result.outputs["reinitialized_target"], expected, check_dtype=False)
    assert result.checks["shares_sum_to_one"].rows.empty
    # one share per child (pooled): no rows stored, the history share in every period
    pooled = ShareSettings.of(make_config({"a": {"window": 4}}, calendar={"horizon": 3}))
    pooled_shares = compute_shares(history, kids, pooled, CYCLE)
    assert period_basis.run(pooled_shares, history, calendar, pooled).outputs["period_basis"].empty
