"""`plan_measures`: each measure split to the leaf by its own rule, pins kept, integer split.

Weekly cycle 2026-02-02, horizon 3: weeks W1 2026-02-02, W2 2026-02-09, W3 2026-02-16.
Parent A / S1 has customers c1, c2 and c3; c3 is active from W2 only. Every expected
value is worked out by hand in the comment beside it.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipelines.config import parse_config
from pipelines.engines.measure_inputs import share_bases_of, share_basis_tables
from pipelines.engines.measure_split import find_pins_not_kept, find_sum_violations, plan_totals
from pipelines.engines.shares import compute_shares
from pipelines.errors import ConfigError, PinError
from pipelines.schemas_forecast import PlanMeasures
from pipelines.stages.plan_measures import plan_measures
from pipelines.stages.reinitialized_target import reinitialize_target
from pipelines.stages.statistical_forecast import forecast_cycle

CYCLE = pd.Timestamp("2026-02-02")
W1, W2, W3 = (pd.Timestamp(d) for d in ("2026-02-02", "2026-02-09", "2026-02-16"))
CROSTON = {
    "smooth": "croston_classic",
    "erratic": "croston_classic",
    "intermittent": "croston_classic",
    "lumpy": "croston_classic",
}


def config(measures, classes=None, **sections):
    data = {"product_classes": classes or {"a": {"window": 4}}, "calendar": {"horizon": 3}, "measures": measures}
    data.update(sections)
    return parse_config(data)


def children(rows=None):
    """rows: (product, site, customer[, first active week[, last active week]]); default A/S1 c1, c2, c3 (c3 from
    W2).
    """
    rows = rows or [("A", "S1", "c1"), ("A", "S1", "c2"), ("A", "S1", "c3", W2)]
    full = [
        (r[0], r[1], r[2], pd.Timestamp(r[3]) if len(r) > 3 else W1, pd.Timestamp(r[4]) if len(r) > 4 else W3)
        for r in rows
    ]
    frame = pd.DataFrame(full, columns=["product", "site", "customer", "first_active_period", "last_active_period"])
    return frame.assign(product_class="a")


def adjustments(rows=()):
    frame = pd.DataFrame(list(rows), columns=["measure", "product", "site", "period_start", "value"])
    return frame.assign(period_start=pd.to_datetime(frame["period_start"]), value=frame["value"].astype(float))


def pins(rows=()):
    frame = pd.DataFrame(list(rows), columns=["product", "site", "customer", "period_start", "measure", "value"])
    return frame.assign(period_start=pd.to_datetime(frame["period_start"]), value=frame["value"].astype(float))


def targets(rows=()):
    """rows: (customer, week, target, share) of parent A / S1."""
    frame = pd.DataFrame(
        [("A", "S1", *r) for r in rows], columns=["product", "site", "customer", "period_start", "target", "share"]
    )
    return frame.assign(period_start=pd.to_datetime(frame["period_start"]))


EMPTY_PARENT = pd.DataFrame({"product": [], "site": [], "period_start": pd.to_datetime([]), "forecast": []})
EMPTY_LEAF = pd.DataFrame(
    {"product": [], "site": [], "customer": [], "period_start": pd.to_datetime([]), "forecast": []}
)


def run(
    cfg,
    adj=(),
    pin=(),
    kids=None,
    target=None,
    share_bases=None,
    parent_forecast=EMPTY_PARENT,
    leaf_forecast=EMPTY_LEAF,
):
    res = plan_measures(
        children() if kids is None else kids, parent_forecast, leaf_forecast, targets() if target is None else target,
        adjustments(adj), pins(pin), cfg, CYCLE, share_bases,
    )
    PlanMeasures.validate(res.plan)
    return res


def values(res, measure, column="value"):
    rows = res.plan[res.plan["measure"] == measure]
    return {(c, p): v for c, p, v in zip(rows["customer"], rows["period_start"], rows[column], strict=False)}


def assert_checks_pass(res, cfg):
    assert find_sum_violations(res.plan, res.parents, cfg.measures).empty
    assert find_pins_not_kept(res.plan, res.pins_applied, res.pins_not_applied).empty


# ------------------------------------------------------------------ replicate and even


def test_replicate_copies_the_parent_value_and_a_pin_overrides_one_child():
    cfg = config({"list_price": {"rule": "replicate"}})
    res = run(
        cfg, [("list_price", "A", "S1", w, 10.0) for w in (W1, W2, W3)], [("A", "S1", "c1", W1, "list_price", 9.5)]
    )
    # every active child holds 10; c1 keeps its pin 9.5 in W1; c3 has no row in W1 (not active yet)
    expected = {("c1", W1): 9.5, ("c2", W1): 10.0}
    expected.update({(c, w): 10.0 for c in ("c1", "c2", "c3") for w in (W2, W3)})
    assert values(res, "list_price") == expected
    assert (
        values(res, "list_price", "basis")[("c1", W1)] == "pin"
        and values(res, "list_price", "basis")[("c2", W1)] == "parent"
    )
    assert_checks_pass(res, cfg)


def test_even_splits_over_the_children_active_in_the_period():
    cfg = config({"promotion_uplift": {"rule": "even"}})
    # W1: 10 entered on Monday and 20 on Wednesday: one value of 30 for the week
    res = run(cfg, [("promotion_uplift", "A", "S1", W1, 10), ("promotion_uplift", "A", "S1", "2026-02-04", 20),
                    ("promotion_uplift", "A", "S1", W2, 30)])
    # W1: 30 / 2 active (c1, c2) = 15; W2: 30 / 3 = 10; W3 has no value, so no rows
    assert values(res, "promotion_uplift") == pytest.approx(
        {("c1", W1): 15, ("c2", W1): 15, ("c1", W2): 10, ("c2", W2): 10, ("c3", W2): 10}
    )
    assert set(res.plan["basis"]) == {"even"} and set(res.plan["fallback"]) == {"none"}
    assert_checks_pass(res, cfg)


def test_replicate_averages_two_values_of_one_period():
    cfg = config({"list_price": {"rule": "replicate"}})
    res = run(cfg, [("list_price", "A", "S1", W1, 10), ("list_price", "A", "S1", "2026-02-05", 12)])
    # two prices entered in week W1: the week's price is their mean, 11
    assert set(values(res, "list_price").values()) == {11.0}


# ------------------------------------------------------------------ pro rata


def test_pro_rata_by_the_target_falls_back_to_the_period_share_then_even():
    cfg = config({"volume": {"rule": "pro_rata", "basis": {"kind": "reinitialized_target"}}})
    tg = targets(
        [
            ("c1", W1, 1, 0.25),
            ("c2", W1, 3, 0.75),
            ("c1", W2, 0, 0.25),
            ("c2", W2, 0, 0.75),
            ("c1", W3, 0, 0),
            ("c2", W3, 0, 0),
        ]
    )
    kids = children([("A", "S1", "c1"), ("A", "S1", "c2")])
    res = run(cfg, [("volume", "A", "S1", w, 40) for w in (W1, W2, W3)], kids=kids, target=tg)
    # W1: targets 1 : 3 -> 10, 30; W2: targets 0, shares 0.25 : 0.75 -> 10, 30 (period_share);
    # W3: targets and shares 0 -> even, 20 each
    assert values(res, "volume") == pytest.approx(
        {("c1", W1): 10, ("c2", W1): 30, ("c1", W2): 10, ("c2", W2): 30, ("c1", W3): 20, ("c2", W3): 20}
    )
    assert values(res, "volume", "fallback") == {
        ("c1", W1): "none",
        ("c2", W1): "none",
        ("c1", W2): "period_share",
        ("c2", W2): "period_share",
        ("c1", W3): "even",
        ("c2", W3): "even",
    }
    assert (
        values(res, "volume", "basis")[("c1", W3)] == "even"
        and values(res, "volume", "basis")[("c1", W2)] == "reinitialized_target"
    )
    assert_checks_pass(res, cfg)


def test_pro_rata_by_another_measure_in_packs_of_five():
    cfg = config({
        "adjustment": {"rule": "pro_rata", "basis": {"kind": "measure", "name": "volume"}, "integer": {"pack_size": 5}},
        "volume": {"rule": "pro_rata", "basis": {"kind": "reinitialized_target"}},
    })
    kids = children([("A", "S1", "c1"), ("A", "S1", "c2")])
    tg = targets([("c1", W1, 1, 0.25), ("c2", W1, 3, 0.75)])
    res = run(cfg, [("volume", "A", "S1", W1, 100), ("adjustment", "A", "S1", W1, 37)], kids=kids, target=tg)
    # volume (split first, the adjustment reads it): 100 x 1/4 = 25, 100 x 3/4 = 75
    assert values(res, "volume") == pytest.approx({("c1", W1): 25, ("c2", W1): 75})
    # adjustment 37 -> nearest multiple of 5 = 35 = 7 packs; quotas 7 x 25/100 = 1.75, 7 x 75/100 = 5.25;
    # floors 1 + 5 = 6, 1 pack left -> larger remainder 0.75 (c1) -> 2 and 5 packs = 10 and 25
    assert values(res, "adjustment") == {("c1", W1): 10.0, ("c2", W1): 25.0}
    assert values(res, "adjustment", "basis")[("c1", W1)] == "measure:volume"
    # the check expects the rounded parent, 35
    assert_checks_pass(res, cfg)
    assert res.parents.set_index("measure").loc["adjustment", "split_total"] == 35.0
    # measures are listed in config order, whatever order they were split in
    assert list(pd.unique(res.plan["measure"])) == ["adjustment", "volume"]


def test_pro_rata_by_a_named_share_table_with_its_own_window(make_history, make_children):
    cfg = config({"promotion_uplift": {"rule": "pro_rata", "basis": {"kind": "share_table", "name": "recent"}}},
                 share_bases={"recent": {"window": 2}})
    # 6 older weeks c1 3, c2 1; the last 2 weeks c1 1, c2 3
    weeks = pd.date_range("2025-12-08", periods=8, freq="7D")
    history = make_history([("A", "S1", c, str(w.date()), (3 if c == "c1" else 1) if i < 6 else (1 if c == "c1" else 3))
                            for i, w in enumerate(weeks) for c in ("c1", "c2")])
    kids = make_children([("A", "S1", "c1"), ("A", "S1", "c2")])
    products = pd.DataFrame(
        {"product": ["A"], "product_class": ["a"], "active_from": [pd.NaT], "active_to": [pd.NaT], "successor": [None]}
    )
    bases = share_basis_tables(share_bases_of(history, kids, products, cfg, CYCLE))
    # window 2, pooled: c1 (1 + 1) / 8 = 0.25, c2 6 / 8 = 0.75 (the class's own window 4 would give 0.5 each)
    recent = bases["recent"].set_index(["customer", "period_start"])["share"]
    assert recent.loc["c1"].tolist() == pytest.approx([0.25] * 3) and recent.loc["c2"].tolist() == pytest.approx(
        [0.75] * 3
    )
    # the same engine as share_tables: a class with window 2 gives the same shares
    same = compute_shares(history, kids, config({"x": {"rule": "even"}}, classes={"a": {"window": 2}}), CYCLE)
    assert same.set_index("customer")["share"].to_dict() == pytest.approx({"c1": 0.25, "c2": 0.75})
    res = run(
        cfg,
        [("promotion_uplift", "A", "S1", W1, 40)],
        kids=kids.assign(first_active_period=W1, last_active_period=W3),
        share_bases=bases,
    )
    # 40 x 0.25 = 10, 40 x 0.75 = 30
    assert values(res, "promotion_uplift") == pytest.approx({("c1", W1): 10, ("c2", W1): 30})
    assert set(res.plan["basis"]) == {"share_table:recent"}


def test_a_negative_adjustment_is_split_with_its_sign():
    cfg = config(
        {"adjustment": {"rule": "pro_rata", "basis": {"kind": "reinitialized_target"}, "integer": {"pack_size": 1}}}
    )
    kids = children([("A", "S1", "c1"), ("A", "S1", "c2")])
    tg = targets([("c1", W1, 1, 0.5), ("c2", W1, 2, 0.5)])
    res = run(cfg, [("adjustment", "A", "S1", W1, -10)], kids=kids, target=tg)
    # |-10| = 10 units, quotas 10/3 = 3.33 and 20/3 = 6.67 -> floors 3, 6, 1 left to remainder .67 (c2)
    # -> 3 and 7 units, with the minus sign
    assert values(res, "adjustment") == {("c1", W1): -3.0, ("c2", W1): -7.0}
    assert_checks_pass(res, cfg)


# ------------------------------------------------------------------ pins


VOLUME = {"volume": {"rule": "pro_rata", "basis": {"kind": "reinitialized_target"}}}
TG_112 = targets([(c, W1, t, t / 4) for c, t in (("c1", 1), ("c2", 1), ("c3", 2))])
KIDS3 = children([("A", "S1", "c1"), ("A", "S1", "c2"), ("A", "S1", "c3")])


def test_pinned_child_keeps_its_value_and_the_rest_is_split_over_the_others():
    cfg = config(VOLUME)
    res = run(cfg, [("volume", "A", "S1", W1, 100)], [("A", "S1", "c3", W1, "volume", 60)], kids=KIDS3, target=TG_112)
    # c3 pinned at 60; the rest 100 - 60 = 40 by targets 1 : 1 over c1, c2 -> 20 each
    assert values(res, "volume") == pytest.approx({("c1", W1): 20, ("c2", W1): 20, ("c3", W1): 60})
    assert values(res, "volume", "pinned") == {("c1", W1): False, ("c2", W1): False, ("c3", W1): True}
    assert res.overflow.empty
    assert_checks_pass(res, cfg)


def test_pins_above_the_parent_stop_with_the_parent_period_pins_and_overflow_named():
    cfg = config(VOLUME, pins={"on_overflow": "error"})
    with pytest.raises(PinError) as err:
        run(
            cfg,
            [("volume", "A", "S1", W1, 100)],
            [("A", "S1", "c1", W1, "volume", 50), ("A", "S1", "c3", W1, "volume", 60)],
            kids=KIDS3,
            target=TG_112,
        )
    # pins 50 + 60 = 110 against a parent of 100: 10 over
    message = str(err.value)
    for text in ("volume A / S1 2026-02-02", "parent 100", "pins 110", "c1=50, c3=60", "10 over", "pins.on_overflow"):
        assert text in message


def test_pins_above_the_parent_in_warn_mode_keep_the_pins_and_give_the_others_zero():
    cfg = config(VOLUME, pins={"on_overflow": "warn"})
    res = run(
        cfg,
        [("volume", "A", "S1", W1, 100)],
        [("A", "S1", "c1", W1, "volume", 50), ("A", "S1", "c3", W1, "volume", 60)],
        kids=KIDS3,
        target=TG_112,
    )
    # the pins stay; c2 gets 0, not the negative rest 100 - 110 = -10
    assert values(res, "volume") == {("c1", W1): 50.0, ("c2", W1): 0.0, ("c3", W1): 60.0}
    assert values(res, "volume", "fallback")[("c2", W1)] == "pins_overflow"
    row = res.overflow.iloc[0]
    assert (
        row["measure"],
        row["product"],
        row["period_start"],
        row["parent_value"],
        row["pins_sum"],
        row["overflow"],
        row["pins"],
    ) == ("volume", "A", W1, 100.0, 110.0, 10.0, "c1=50, c3=60")
    # the children sum to the pins, which the sum check accepts for an overflow listed by the WARN check
    assert_checks_pass(res, cfg)


def test_every_child_pinned_to_less_than_the_parent_is_an_overflow_too():
    cfg = config(VOLUME, pins={"on_overflow": "warn"})
    res = run(
        cfg,
        [("volume", "A", "S1", W1, 100)],
        [("A", "S1", c, W1, "volume", 10) for c in ("c1", "c2", "c3")],
        kids=KIDS3,
        target=TG_112,
    )
    # 30 pinned, 70 left and no unpinned child to carry it
    assert len(res.overflow) == 1 and res.overflow["overflow"].iloc[0] == 70.0


def test_a_negative_parent_overflows_when_the_pins_take_off_more_than_it():
    cfg = config(VOLUME, pins={"on_overflow": "warn"})
    res = run(cfg, [("volume", "A", "S1", W1, -20)], [("A", "S1", "c1", W1, "volume", -30)], kids=KIDS3, target=TG_112)
    # -20 - (-30) = +10: the rest has the other sign than the parent -> overflow, c2 and c3 get 0
    assert len(res.overflow) == 1 and values(res, "volume")[("c2", W1)] == 0.0
    res = run(cfg, [("volume", "A", "S1", W1, -20)], [("A", "S1", "c1", W1, "volume", -5)], kids=KIDS3, target=TG_112)
    # -20 - (-5) = -15 by targets 1 : 2 over c2, c3 -> -5, -10
    assert values(res, "volume") == pytest.approx({("c1", W1): -5, ("c2", W1): -5, ("c3", W1): -10})


def test_pins_on_an_inactive_or_unknown_customer_are_not_applied_and_fail_pins_kept():
    cfg = config({"list_price": {"rule": "replicate"}})
    res = run(cfg, [("list_price", "A", "S1", W1, 10)], [
        ("A", "S1", "c3", W1, "list_price", 8),  # c3 starts in W2
        ("A", "S1", "c9", W1, "list_price", 8),  # no such customer of A / S1
        ("A", "S1", "c1", "2026-03-30", "list_price", 8),  # after the horizon: not used, not a failure
    ])
    failing = find_pins_not_kept(res.plan, res.pins_applied, res.pins_not_applied)
    assert sorted(failing["customer"]) == ["c3", "c9"]
    assert failing.set_index("customer").loc["c3", "reason"].startswith("customer not active in this period")
    assert res.unused_rows[["input", "customer", "reason"]].values.tolist() == [["pins", "c1", "outside_horizon"]]


def test_pins_kept_fails_when_a_pinned_value_was_overwritten():
    cfg = config(VOLUME)
    res = run(cfg, [("volume", "A", "S1", W1, 100)], [("A", "S1", "c3", W1, "volume", 60)], kids=KIDS3, target=TG_112)
    broken = res.plan.copy()
    broken.loc[broken["pinned"], "value"] = 59.0
    failing = find_pins_not_kept(broken, res.pins_applied, res.pins_not_applied)
    assert failing[["customer", "pin", "value", "reason"]].values.tolist() == [
        ["c3", 60.0, 59.0, "value differs from the pin"]
    ]
    # the sum check catches the same break: 20 + 20 + 59 = 99, not 100
    assert find_sum_violations(broken, res.parents, cfg.measures)["children_sum"].tolist() == [99.0]


# ------------------------------------------------------------------ what the checks catch


def test_a_value_without_active_child_fails_the_sum_check_for_additive_measures_only():
    cfg = config({"uplift": {"rule": "even"}, "list_price": {"rule": "replicate"}})
    res = run(
        cfg, [("uplift", "B", "S9", W1, 12), ("list_price", "B", "S9", W1, 5), ("uplift", "A", "S1", "2025-12-01", 7)]
    )
    failing = find_sum_violations(res.plan, res.parents, cfg.measures)
    # B / S9 has no customer: the 12 units of uplift are carried by no one; the price needs no carrier
    assert failing[["measure", "product", "reason"]].values.tolist() == [
        ["uplift", "B", "no active child carries the value"]
    ]
    # the row before the horizon is not used, and listed
    assert res.unused_rows[["input", "measure", "reason"]].values.tolist() == [
        ["adjustments", "uplift", "outside_horizon"]
    ]


def test_the_sum_check_catches_a_leaf_changed_after_the_split():
    cfg = config({"uplift": {"rule": "even"}, "list_price": {"rule": "replicate"}})
    res = run(cfg, [("uplift", "A", "S1", W1, 12), ("list_price", "A", "S1", W1, 5)])
    broken = res.plan.copy()
    broken.loc[(broken["customer"] == "c2"), "value"] += 1.0
    failing = find_sum_violations(broken, res.parents, cfg.measures)
    # uplift: 6 + 7 = 13 against 12; list price: c2 holds 6, not 5
    assert sorted(failing["reason"]) == ["a child differs from the parent value", "children do not sum to the parent"]


def test_totals_per_measure_parent_against_leaf():
    cfg = config({"uplift": {"rule": "even"}, "list_price": {"rule": "replicate"}})
    res = run(cfg, [("uplift", "A", "S1", W1, 12), ("uplift", "A", "S1", W2, 9), ("list_price", "A", "S1", W1, 5)])
    totals = plan_totals(res.plan, res.parents).set_index("measure")
    # uplift: 12 + 9 = 21 at both grains; price: mean 5 at both
    assert totals.loc["uplift", ["statistic", "parent", "leaf", "leaf_rows"]].tolist() == ["total", 21.0, 21.0, 5]
    assert totals.loc["list_price", ["statistic", "parent", "leaf"]].tolist() == ["mean", 5.0, 5.0]


# ------------------------------------------------------------------ inputs and config


def test_an_unknown_measure_in_the_inputs_is_a_named_error():
    cfg = config({"list_price": {"rule": "replicate"}})
    with pytest.raises(
        ConfigError, match=r"adjustments input names measure\(s\) \['list_prise'\].*defined: \['list_price'\]"
    ):
        run(cfg, [("list_prise", "A", "S1", W1, 10)])
    with pytest.raises(ConfigError, match=r"pins input names measure\(s\) \['volume'\]"):
        run(cfg, pin=[("A", "S1", "c1", W1, "volume", 1)])


def test_adjustment_rows_of_the_forecast_measure_are_refused():
    cfg = config(
        {
            "statistical_forecast": {
                "rule": "pro_rata",
                "basis": {"kind": "reinitialized_target"},
                "parent_values": "parent_forecast",
            }
        }
    )
    with pytest.raises(ConfigError, match="parent_values: parent_forecast"):
        run(cfg, [("statistical_forecast", "A", "S1", W1, 10)])


@pytest.mark.parametrize(
    "measures, message",
    [
        (
            {
                "x": {"rule": "pro_rata", "basis": {"kind": "measure", "name": "y"}},
                "y": {"rule": "pro_rata", "basis": {"kind": "measure", "name": "x"}},
            },
            "cycle: x -> y -> x",
        ),
        ({"x": {"rule": "pro_rata", "basis": {"kind": "measure", "name": "x"}}}, "cycle: x -> x"),
        (
            {"x": {"rule": "pro_rata", "basis": {"kind": "share_table", "name": "promo"}}},
            "not a key of share_bases; valid names: []",
        ),
        (
            {"x": {"rule": "pro_rata", "basis": {"kind": "measure", "name": "z"}}},
            "not a key of measures; valid names: ['x']",
        ),
        ({"x": {"rule": "pro_rata"}}, "rule pro_rata needs a basis"),
        ({"x": {"rule": "even", "basis": {"kind": "reinitialized_target"}}}, "rule even takes no basis"),
        ({"x": {"rule": "replicate", "integer": {"pack_size": 5}}}, "integer split applies to even and pro_rata only"),
        ({"x": {"rule": "spread"}}, "'replicate', 'even' or 'pro_rata'"),
        ({"x": {"rule": "even", "split": 1}}, "valid keys here: ['basis', 'integer', 'parent_values', 'rule']"),
        ({"x": {"rule": "pro_rata", "basis": {"kind": "measure"}}}, "needs a name"),
        ({"x": {"rule": "even", "integer": {"pack_size": 0}}}, "measures.x.integer.pack_size"),
    ],
)
def test_measure_config_errors_name_the_key_and_the_choices(measures, message):
    with pytest.raises(ConfigError) as err:
        config(measures)
    assert message in str(err.value)


def test_share_basis_fallbacks_must_grow_and_window_must_fit_the_history():
    with pytest.raises(ConfigError, match="fallback_windows must each be longer"):
        config({"x": {"rule": "even"}}, share_bases={"p": {"window": 52, "fallback_windows": [26]}})
    cfg = config({"x": {"rule": "even"}}, share_bases={"p": {"window": 52}})
    with pytest.raises(ConfigError, match="share_bases.p.window is 52 periods but the history holds only 40"):
        cfg.check_share_bases_fit(40)


def test_default_measures_are_the_statistical_forecast_split_by_its_target():
    cfg = parse_config({"product_classes": {"a": {"window": 4}}})
    m = cfg.measures["statistical_forecast"]
    assert (m.rule, m.basis.kind, m.parent_values, cfg.pins.on_overflow) == (
        "pro_rata",
        "reinitialized_target",
        "parent_forecast",
        "error",
    )


# ------------------------------------------------------------------ the statistical forecast, reproduced


def test_the_statistical_forecast_measure_reproduces_the_leaf_forecast(make_history, make_children, make_config):
    # class a is split top-down by the reinitialized target, class b forecast bottom-up at the leaf;
    # A1 / S1 customer k3 ends in W2, B1 / S1 customer k2 has no history (its leaf forecast is 0)
    classes = {"a": {"window": 4, "strategy": "top_down", "models": CROSTON},
               "b": {"window": 4, "strategy": "bottom_up", "models": CROSTON}}
    cfg = make_config(classes, calendar={"horizon": 3})
    weeks = ["2026-01-05", "2026-01-12", "2026-01-19", "2026-01-26"]
    qty = {
        ("A1", "k1"): [4, 6, 5, 7],
        ("A1", "k2"): [1, 0, 2, 1],
        ("A1", "k3"): [3, 3, 0, 3],
        ("B1", "k1"): [2, 0, 0, 3],
    }
    history = make_history([(p, "S1", c, w, q) for (p, c), v in qty.items() for w, q in zip(weeks, v, strict=False)])
    kids = pd.concat(
        [
            make_children([("A1", "S1", "k1"), ("A1", "S1", "k2"), ("A1", "S1", "k3")]).assign(
                last_active_period=[W3, W3, W2]
            ),
            make_children([("B1", "S1", "k1", "b"), ("B1", "S1", "k2", "b")]).assign(last_active_period=W3),
        ],
        ignore_index=True,
    ).assign(first_active_period=W1)
    shares = compute_shares(history, kids, cfg, CYCLE)
    target = reinitialize_target(shares, history, cfg, CYCLE)
    forecast = forecast_cycle(history, shares, target, cfg, CYCLE)
    res = plan_measures(shares, forecast.parent, forecast.leaf, target, adjustments(), pins(), cfg, CYCLE)
    assert_checks_pass(res, cfg)
    merged = forecast.leaf.merge(
        res.plan, on=["product", "site", "customer", "period_start"], how="left", suffixes=("_leaf", "")
    )
    # every leaf row the plan does not hold is a period the child is not active in, forecast 0
    assert merged["value"].isna().sum() == 1 and merged.loc[merged["value"].isna(), "forecast"].tolist() == [0.0]
    both = merged[merged["value"].notna()]
    assert (both["forecast"] > 0).sum() >= 6  # not a vacuous comparison of zeros
    np.testing.assert_allclose(both["value"], both["forecast"], rtol=1e-12, atol=0)
    basis = both.groupby("product")["basis"].unique().map(list).to_dict()
    assert basis == {"A1": ["reinitialized_target"], "B1": ["leaf_forecast"]}


# ------------------------------------------------------------------ properties


@st.composite
def scenarios(draw):
    """Random parents and children, active periods, targets, parent values and pins that fit under them."""
    n_parents = draw(st.integers(1, 3))
    rows, tgt = [], []
    for p in range(n_parents):
        for c in range(draw(st.integers(1, 4))):
            first = draw(st.sampled_from([W1, W2]))
            rows.append((f"P{p}", "S", f"c{c}", first, draw(st.sampled_from([W2, W3]))))
            for w in (W1, W2, W3):
                tgt.append((f"P{p}", "S", f"c{c}", w, draw(st.sampled_from([0.0, 1.0, 2.5, 7.0])), 0.0))
    kids = children(rows)
    value = st.floats(0, 500, allow_nan=False).map(lambda v: round(v, 2))
    # values only where a child is active: elsewhere nobody can carry them (a failure the check reports,
    # tested by hand above)
    carried = {(r[0], w) for r in rows for w in (W1, W2, W3) if r[3] <= w <= r[4]}
    adj = [
        (m, f"P{p}", "S", w, draw(value))
        for m in ("volume", "units")
        for p in range(n_parents)
        for w in (W1, W2, W3)
        if (f"P{p}", w) in carried and draw(st.booleans())
    ]
    pin_rows = []
    for r in rows:
        for w in (W1, W2, W3):
            if r[3] <= w <= r[4] and draw(st.integers(0, 4)) == 0:
                pin_rows.append(
                    (
                        r[0],
                        "S",
                        r[2],
                        w,
                        draw(st.sampled_from(["volume", "units", "price"])),
                        draw(st.sampled_from([0.0, 1.0, 5.0, 12.5])),
                    )
                )
    pack = draw(st.sampled_from([1, 5]))
    frame = pd.DataFrame(tgt, columns=["product", "site", "customer", "period_start", "target", "share"])
    return kids, frame, adj, pin_rows, pack


@settings(max_examples=40, deadline=None)
@given(scenarios())
def test_parts_sum_to_the_parent_pins_are_kept_and_nothing_goes_negative(scenario):
    kids, tg, adj, pin_rows, pack = scenario
    cfg = config({
        "volume": {"rule": "pro_rata", "basis": {"kind": "reinitialized_target"}},
        "units": {"rule": "pro_rata", "basis": {"kind": "measure", "name": "volume"}, "integer": {"pack_size": pack}},
        "price": {"rule": "replicate"},
    }, pins={"on_overflow": "warn"})
    res = plan_measures(kids, EMPTY_PARENT, EMPTY_LEAF, tg, adjustments(adj), pins(pin_rows), cfg, CYCLE)
    PlanMeasures.validate(res.plan)
    # parts sum to the parent (or the pins, where they overflow), pins kept: the blocking checks pass
    assert_checks_pass(res, cfg)
    plan = res.plan
    # non-negative parents and pins give non-negative parts
    assert (plan["value"] >= -1e-9).all()
    # integer parts are whole packs (pins are kept as given)
    units = plan[(plan["measure"] == "units") & ~plan["pinned"]]
    np.testing.assert_allclose(units["value"] / pack, np.rint(units["value"] / pack), atol=1e-9)
    # where nothing overflows, the children sum to the parent exactly as entered (volume) or rounded (units)
    ok = res.parents[(res.parents["status"] == "split") & (res.parents["measure"] == "volume")]
    got = plan.groupby(["measure", "product", "period_start"])["value"].sum()
    for _, row in ok.iterrows():
        assert got.get(("volume", row["product"], row["period_start"]), 0.0) == pytest.approx(
            0.0 if np.isnan(row["parent_value"]) else row["parent_value"], abs=1e-9)


def test_leaf_matrix_reads_a_frame_in_table_order_as_it_reads_any_order():
    """A leaf table with one row per child and period in the children's order is read by a reshape
    (`measure_inputs._aligned`); the same rows shuffled, or with one id changed, go through the key look-up:
    the matrices must be equal. By hand: child C1 holds 1, 2 and C2 holds 3, 4 over the two weeks."""
    from pipelines.calendar import period_ordinal
    from pipelines.engines.measure_inputs import _aligned, leaf_matrix

    starts = pd.DatetimeIndex(["2026-01-05", "2026-01-12"])
    first_ord = int(period_ordinal(starts[:1], "week")[0])
    table = pd.DataFrame({"product": ["P", "P"], "site": ["S", "S"], "customer": ["C1", "C2"], "leaf_id": [4, 7]})
    frame = pd.DataFrame({
        "product": ["P"] * 4, "site": ["S"] * 4, "customer": ["C1", "C1", "C2", "C2"], "leaf_id": [4, 4, 7, 7],
        "period_start": np.tile(starts.values, 2), "value": [1.0, 2.0, 3.0, 4.0],
    })
    keys = ["product", "site", "customer"]
    expected = np.array([[1.0, 2.0], [3.0, 4.0]])
    assert _aligned(frame, keys, table, first_ord, 2, "week")
    np.testing.assert_array_equal(leaf_matrix(frame, keys, table, "value", first_ord, 2, "week"), expected)
    shuffled = frame.iloc[[3, 0, 2, 1]].reset_index(drop=True)
    assert not _aligned(shuffled, keys, table, first_ord, 2, "week")
    np.testing.assert_array_equal(leaf_matrix(shuffled, keys, table, "value", first_ord, 2, "week"), expected)
    later = frame.assign(period_start=np.tile((starts + pd.Timedelta(weeks=1)).values, 2))  # not the horizon's
    assert not _aligned(later, keys, table, first_ord, 2, "week")
    np.testing.assert_array_equal(
        leaf_matrix(later, keys, table, "value", first_ord, 2, "week"), np.array([[0.0, 1.0], [0.0, 3.0]])
    )


def test_group_sizes_counts_as_pandas_groupby_size_whether_rows_come_in_runs_or_not():
    from pipelines.engines.plan_codes import group_sizes

    # reference: pandas' own groupby(...).size() (groups sorted, rows with a missing key left out)
    rng = np.random.default_rng(3)
    words = np.array(["b", "a", "c", None], dtype=object)
    shuffled = pd.DataFrame({c: words[rng.integers(0, 4, 3000)] for c in ("x", "y")})
    runs = pd.DataFrame({c: np.repeat(words[rng.integers(0, 3, 60)], 50) for c in ("x", "y")})  # runs of one object
    for frame in (shuffled, runs, runs.iloc[:10]):
        expected = frame.groupby(["x", "y"]).size().rename("rows").reset_index()
        pd.testing.assert_frame_equal(group_sizes(frame, ["x", "y"], "rows"), expected)


def test_key_sums_found_by_rows_of_equal_pandas_groupby_sums_with_runs_or_without():
    from pipelines.engines.plan_codes import key_sums, rows_of

    # reference: pandas' groupby(key).sum() / size() on the same rows
    rng = np.random.default_rng(5)
    weeks = pd.date_range("2026-01-05", periods=4, freq="7D")
    key = ["measure", "product", "site", "period_start"]
    n = 4000
    run = np.repeat(np.arange(n // 8), 8)  # rows in runs of one (measure, product, site) object
    names = {c: np.array([f"{c}{i % 7}" for i in range(n // 8)], dtype=object) for c in key[:3]}
    runs = pd.DataFrame({c: names[c][run] for c in key[:3]})
    runs["period_start"] = weeks[rng.integers(0, 4, n)]
    runs["value"], runs["pinned"] = rng.normal(size=n), rng.random(n) < 0.1
    shuffled = runs.sample(frac=1.0, random_state=1).reset_index(drop=True).astype({c: object for c in key[:3]})
    shuffled[key[:3]] = shuffled[key[:3]].map(lambda x: "".join(x))  # a new object per cell: no runs
    for plan in (runs, shuffled):
        sums = key_sums(plan, key)
        expected = plan.assign(pins=np.where(plan["pinned"], plan["value"], 0.0)).groupby(key)
        parents = expected.size().reset_index()[key]
        at = rows_of(parents, key, sums)
        assert (at >= 0).all()
        assert sums["children"].to_numpy()[at].tolist() == expected.size().tolist()
        assert sums["children_sum"].to_numpy()[at] == pytest.approx(expected["value"].sum().to_numpy(), abs=1e-12)
        assert sums["pins_in_plan"].to_numpy()[at] == pytest.approx(expected["pins"].sum().to_numpy(), abs=1e-12)
    assert sums.attrs["found"][0] != "dense" and key_sums(runs, key).attrs["found"][0] == "dense"


def test_rows_of_many_parent_periods_in_runs_equal_a_lookup_of_every_row():
    from pipelines.engines.plan_codes import key_sums, rows_of
    from pipelines.keys import lookup

    # 2,000 parent periods (500 parents x 4 weeks) in runs of one parent, as the plan's parents table holds them:
    # rows_of looks the parents up on their runs' first rows only; each row must get its own key's row of the
    # sums, as a lookup of every row's key gives it, and -1 for a parent the plan has none of
    rng = np.random.default_rng(8)
    weeks = pd.date_range("2026-01-05", periods=4, freq="7D")
    key = ["measure", "product", "site", "period_start"]
    names = np.array([f"p{i}" for i in range(500)], dtype=object)
    plan = pd.DataFrame({"measure": "m", "product": np.repeat(names, 12), "site": "s"})
    plan[key[:3]] = plan[key[:3]].to_numpy(object)
    plan["period_start"] = weeks[rng.integers(0, 4, len(plan))]
    plan["value"], plan["pinned"] = rng.normal(size=len(plan)), False
    sums = key_sums(plan, key)
    assert sums.attrs["found"][0] == "dense"
    parents = pd.DataFrame({"measure": "m", "product": np.repeat(names, 4), "site": "s"})
    parents["product"] = parents["product"].to_numpy(object)
    parents.loc[40:43, "product"] = "none"  # one run of a parent without rows
    parents["period_start"] = np.tile(weeks.values, 500)
    keys, periods = sums.attrs["found"][1]
    expected = [
        -1 if (k < 0 or p < 0) else k * len(periods) + p
        for k, p in zip(
            lookup(parents, key[:3], keys), pd.Index(periods).get_indexer(parents["period_start"]), strict=True
        )
    ]
    found = rows_of(parents, key, sums)
    assert found.tolist() == expected
    assert (found[40:44] == -1).all() and (np.delete(found, range(40, 44)) >= 0).sum() > 1500
