"""`explain_leaf`: how one leaf forecast was made, told from small hand-built tables of one weekly cycle.

Cycle 2026-02-02, horizon 3 weeks: H1 = 2026-02-02, H2 = 02-09, H3 = 02-16.
One parent P1 x S1 (class a, pooled, window 4 weeks = 2026-01-05 to 01-26):
C1 shipped 30 and C2 20 of the parent's 50 in the window, so the history
shares are C1 30 / 50 = 0.6 and C2 20 / 50 = 0.4. C3 is a new customer with a
planner-given initial share 0.2, active from H2: in H2 and H3 the others are
scaled by 1 - 0.2, C1 0.6 x 0.8 = 0.48, C2 0.4 x 0.8 = 0.32, C3 0.2; in H1 C3
is not active, C1 0.6, C2 0.4. Parent forecast 100, 120, 90.
Leaf forecast of C1 = period share x parent: 0.6 x 100 = 60, 0.48 x 120 = 57.6,
0.48 x 90 = 43.2 (total 160.8).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.errors import PlanningError, UnknownKeyError
from pipelines.explain import explain_leaf
from pipelines.schemas import HistoryCorrections, LifecycleAudit, ReinitializedTarget
from pipelines.schemas_forecast import ForecastModels, ParentForecast, StatisticalForecast

CYCLE = pd.Timestamp("2026-02-02")
H1, H2, H3 = "2026-02-02", "2026-02-09", "2026-02-16"
PARENT_FORECAST = {H1: 100.0, H2: 120.0, H3: 90.0}
# (customer, period) -> period share, worked by hand in the module docstring
SHARES = {
    ("C1", H1): 0.6, ("C1", H2): 0.48, ("C1", H3): 0.48,
    ("C2", H1): 0.4, ("C2", H2): 0.32, ("C2", H3): 0.32,
    ("C3", H1): 0.0, ("C3", H2): 0.2, ("C3", H3): 0.2,
}


def share_table(make_share_table):
    table = make_share_table(
        [
            # base shares, every child active: C1 0.6 x 0.8, C2 0.4 x 0.8, C3 0.2
            ("P1", "S1", "C1", 0.48, 4, {"history_share": 0.6}),
            ("P1", "S1", "C2", 0.32, 4, {"history_share": 0.4}),
            (
                "P1",
                "S1",
                "C3",
                0.2,
                4,
                {"rule": "initial_share", "history_share": 0.0, "first": H2, "initial_share": 0.2, "own_periods": 0},
            ),
        ]
    )
    table["child_volume"] = [30.0, 20.0, 0.0]
    table["parent_volume"] = 50.0
    return table


def target(zero_h3=False):
    rows = []
    for (customer, start), share in SHARES.items():
        reason = None
        if zero_h3 and start == H3:
            share, reason = 0.0, "product_not_active"
        rows.append(("P1", "S1", customer, pd.Timestamp(start), CYCLE, share * 12.5, share, 12.5, reason))
    frame = pd.DataFrame(
        rows,
        columns=[
            "product",
            "site",
            "customer",
            "period_start",
            "cycle_date",
            "target",
            "share",
            "parent_baseline",
            "zero_reason",
        ],
    )
    return ReinitializedTarget.validate(frame)


def parent_forecast(strategy="top_down", zero_h3=False):
    rows = []
    for start, value in PARENT_FORECAST.items():
        zero = zero_h3 and start == H3
        rows.append(
            (
                CYCLE,
                "a",
                "P1",
                "S1",
                pd.Timestamp(start),
                0.0 if zero else value,
                "auto_ets(season_length=1)",
                "smooth",
                "parent",
                strategy,
                "product_not_active" if zero else None,
            )
        )
    frame = pd.DataFrame(
        rows,
        columns=[
            "cycle_date",
            "product_class",
            "product",
            "site",
            "period_start",
            "forecast",
            "model",
            "demand_class",
            "model_grain",
            "strategy",
            "zero_reason",
        ],
    )
    return ParentForecast.validate(frame)


def leaf_forecast(target_frame, parent_frame, basis="reinitialized_target"):
    merged = target_frame.merge(
        parent_frame[["period_start", "forecast"]].rename(columns={"forecast": "parent_forecast"}), on="period_start"
    )
    frame = merged.assign(product_class="a", forecast=merged["share"] * merged["parent_forecast"], basis=basis)
    return StatisticalForecast.validate(
        frame[
            [
                "product",
                "site",
                "customer",
                "period_start",
                "cycle_date",
                "product_class",
                "forecast",
                "parent_forecast",
                "basis",
            ]
        ]
    )


def models():
    frame = pd.DataFrame(
        [
            (
                CYCLE,
                "parent",
                "a",
                "P1",
                "S1",
                "",
                "smooth",
                1.0,
                0.05,
                "auto_ets(season_length=1)",
                "ETS(A,N,N) alpha=0.2",
            )
        ],
        columns=[
            "cycle_date",
            "grain",
            "product_class",
            "product",
            "site",
            "customer",
            "demand_class",
            "adi",
            "cv2",
            "model",
            "parameters",
        ],
    )
    return ForecastModels.validate(frame)


def corrections():
    # C1: two Hampel caps (-10, -5: net -15); C2: one
    rows = [
        ("P1", "S1", "C1", pd.Timestamp("2026-01-05"), "hampel_cap", 40.0, 30.0, -10.0, "{}"),
        ("P1", "S1", "C1", pd.Timestamp("2026-01-12"), "hampel_cap", 25.0, 20.0, -5.0, "{}"),
        ("P1", "S1", "C2", pd.Timestamp("2026-01-12"), "hampel_cap", 9.0, 8.0, -1.0, "{}"),
    ]
    frame = pd.DataFrame(
        rows, columns=["product", "site", "customer", "period_start", "rule", "before", "after", "delta", "parameters"]
    )
    return HistoryCorrections.validate(frame)


@pytest.fixture
def tables(make_share_table):
    t = target()
    p = parent_forecast()
    audit = LifecycleAudit.validate(
        pd.DataFrame(columns=["product", "site", "customer", "rule", "periods", "quantity", "detail"])
    )
    return {
        "share_tables": share_table(make_share_table),
        "reinitialized_target": t,
        "parent_forecast": p,
        "statistical_forecast": leaf_forecast(t, p),
        "forecast_models": models(),
        "history_corrections": corrections(),
        "lifecycle_audit": audit,
    }


def test_one_period_shows_share_times_parent_equals_leaf(tables):
    text = explain_leaf(tables, "P1", "S1", "C1", period=H2)
    # window 4 weeks before the cycle: 2026-01-05 to 2026-01-26; C1 30 of 50 -> 0.6
    assert "2026-01-05 to 2026-01-26" in text
    assert "shipped 30.00 of the parent's 50.00" in text
    assert "History share over the parent's established customers: 0.600000" in text
    assert "Base share (every customer of the parent active): 0.480000" in text
    # H2: 0.48 x 120 = 57.6
    assert "Period share: 0.480000 (48.00 %)" in text
    assert "Parent forecast: 120.00" in text
    assert "0.480000 x 120.00 = 57.60, as stored" in text
    assert "Model auto_ets(season_length=1), ETS(A,N,N) alpha=0.2." in text
    assert "Demand class smooth (ADI 1.00, CV^2 0.050" in text
    assert "Strategy top_down" in text
    # two Hampel caps on C1: -10 and -5
    assert "2 corrected periods: hampel_cap 2 periods (net -15.00)" in text


def test_a_date_inside_the_week_finds_its_period(tables):
    # 2026-02-11 is the Wednesday of H2
    assert "0.480000 x 120.00 = 57.60" in explain_leaf(tables, "P1", "S1", "C1", period="2026-02-11")


def test_whole_horizon_is_one_line_per_period_and_names_the_customer_that_starts(tables):
    text = explain_leaf(tables, "P1", "S1", "C1")
    lines = text.splitlines()
    # 0.6 x 100 = 60; 0.48 x 120 = 57.6; 0.48 x 90 = 43.2; total 160.8
    assert any(line.split()[:4] == ["2026-02-02", "0.600000", "100.00", "60.00"] for line in lines)
    assert any(line.split()[:4] == ["2026-02-09", "0.480000", "120.00", "57.60"] for line in lines)
    assert any(line.split()[:4] == ["2026-02-16", "0.480000", "90.00", "43.20"] for line in lines)
    assert any(line.split()[:3] == ["total", "310.00", "160.80"] for line in lines)
    assert "From 2026-02-09 the share is 0.480000 (was 0.600000): C3 starts in it." in text


def test_new_customer_with_initial_share(tables):
    text = explain_leaf(tables, "P1", "S1", "C3", period=H2)
    assert "Rule: initial_share" in text
    assert "Initial share given by the planner: 0.200000" in text
    assert "Active in the horizon from 2026-02-09" in text
    # 0.2 x 120 = 24
    assert "0.200000 x 120.00 = 24.00, as stored" in text
    assert "None: no rule changed a period" in text


def test_period_where_every_share_is_zero(tables):
    t = target(zero_h3=True)
    p = parent_forecast(zero_h3=True)
    tables.update(reinitialized_target=t, parent_forecast=p, statistical_forecast=leaf_forecast(t, p))
    text = explain_leaf(tables, "P1", "S1", "C1", period=H3)
    assert "Every share of the parent is 0 in this period (product_not_active" in text
    assert "leaf forecast 0.00" in text


def test_bottom_up_leaf_reports_its_proportion_not_a_split(tables):
    # own forecast of C1 in H1 = 60 of the parent's 100 (the sum of its customers): 60 %
    p = parent_forecast(strategy="bottom_up")
    tables.update(
        parent_forecast=p, statistical_forecast=leaf_forecast(tables["reinitialized_target"], p, basis="leaf_forecast")
    )
    text = explain_leaf(tables, "P1", "S1", "C1", period=H1)
    assert "Strategy bottom_up" in text
    assert "Leaf forecast 60.00, 60.00 % of the parent forecast 100.00: the customer's own forecast, bottom-up" in text


def test_stored_value_that_does_not_match_share_times_parent_is_flagged(tables):
    leaf = tables["statistical_forecast"].copy()
    leaf.loc[(leaf["customer"] == "C1") & (leaf["period_start"] == pd.Timestamp(H1)), "forecast"] = 61.0
    tables["statistical_forecast"] = leaf
    # 0.6 x 100 = 60, but 61 is stored: proportion 0.61
    text = explain_leaf(tables, "P1", "S1", "C1", period=H1)
    assert "= 60.00; but the stored leaf forecast is 61.00, a proportion of 0.610000" in text


def test_unknown_customer_names_close_matches_and_the_parents_customers(tables):
    with pytest.raises(UnknownKeyError) as err:
        explain_leaf(tables, "P1", "S1", "C10")
    message = str(err.value)
    assert "customer 'C10' is not a customer of P1 x S1" in message
    assert "Close matches: C1" in message
    assert "Customers there (3): C1, C2, C3." in message


def test_unknown_site_and_product_say_which_part_did_not_match(tables):
    with pytest.raises(UnknownKeyError, match=r"site 'S2' is not a site of product P1.*Sites there \(1\): S1\."):
        explain_leaf(tables, "P1", "S2", "C1")
    with pytest.raises(UnknownKeyError, match=r"product 'p1' is not a product.*Close matches: P1\."):
        explain_leaf(tables, "p1", "S1", "C1")


def test_period_outside_the_horizon(tables):
    with pytest.raises(UnknownKeyError, match=r"period 2026-03-02 .* runs from 2026-02-02 to 2026-02-16"):
        explain_leaf(tables, "P1", "S1", "C1", period="2026-03-02")


def test_missing_required_table(tables):
    del tables["parent_forecast"]
    with pytest.raises(PlanningError, match="parent_forecast"):
        explain_leaf(tables, "P1", "S1", "C1")


def test_optional_tables_may_be_absent(tables):
    for name in ("forecast_models", "history_corrections", "lifecycle_audit"):
        del tables[name]
    text = explain_leaf(tables, "P1", "S1", "C1", period=H1)
    assert "(history_corrections not given)" in text
    assert "0.600000 x 100.00 = 60.00, as stored" in text


def test_explains_the_tables_the_stages_themselves_make(make_history, make_config):
    """share_tables -> reinitialized_target -> forecast_cycle on a tiny parent, then explain.

    Weeks 2026-01-05 .. 01-26: C1 ships 4 and C2 8 every week (parent 12); C3 is new
    with initial share 0.25 from H2. History shares: C1 16 / 48 = 1/3, C2 2/3.
    Period shares: H1 C1 1/3, C2 2/3; H2 C1 1/3 x 0.75 = 0.25, C2 0.5, C3 0.25.
    Parent forecast: croston_classic of a constant 12 is 12 (see test_statistical_forecast).
    C1: H1 12 / 3 = 4, H2 0.25 x 12 = 3.
    """
    from pipelines.engines.shares import compute_shares
    from pipelines.stages.reinitialized_target import reinitialize_target
    from pipelines.stages.statistical_forecast import forecast_cycle

    croston = {d: "croston_classic" for d in ("smooth", "erratic", "intermittent", "lumpy")}
    config = make_config(
        {"a": {"window": 4, "strategy": "top_down", "models": croston}},
        calendar={"horizon": 2}, lifecycle={"min_history_periods": 4},
    )
    weeks = ["2026-01-05", "2026-01-12", "2026-01-19", "2026-01-26"]
    history = make_history([("P1", "S1", c, w, q) for c, q in (("C1", 4), ("C2", 8)) for w in weeks])
    children = pd.DataFrame(
        {
            "product": "P1", "site": "S1", "customer": ["C1", "C2", "C3"], "product_class": "a",
            "first_active_period": pd.to_datetime([H1, H1, H2]), "last_active_period": pd.Timestamp(H2),
            "own_periods": [4, 4, 0], "initial_share": [np.nan, np.nan, 0.25],
        }
    )
    shares = compute_shares(history, children, config, CYCLE)
    target = reinitialize_target(shares, history, config, CYCLE)
    result = forecast_cycle(
        history,
        shares[["product", "site", "customer", "product_class", "first_active_period", "last_active_period"]],
        target,
        config,
        CYCLE,
    )
    tables = {"share_tables": shares, "reinitialized_target": target, "parent_forecast": result.parent,
              "statistical_forecast": result.leaf, "forecast_models": result.models}
    text = explain_leaf(tables, "P1", "S1", "C1", period=H2)
    assert "shipped 16.00 of the parent's 48.00" in text
    assert "0.250000 x 12.00 = 3.00, as stored" in text
    assert "Model croston_classic" in text
    whole = explain_leaf(tables, "P1", "S1", "C1")
    assert any(line.split()[:4] == ["2026-02-02", "0.333333", "12.00", "4.00"] for line in whole.splitlines())
    assert "From 2026-02-09 the share is 0.250000 (was 0.333333): C3 starts in it." in whole
