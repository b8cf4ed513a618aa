"""`cleaned_history`: rejection, bucketing, returns, zero-fill, cycle date, audit.

Calendar used throughout (weekly): 2026-01-05, -12, -19, -26 and 2026-02-02 are
Mondays. Unless a test is about outliers, the Hampel rule is off
(`outliers.rule: none`) so that only the rule under test moves a number.
"""

from __future__ import annotations

import json

import pandas as pd
import pytest

from pipelines.stages.cleaned_history import clean_history, find_unexplained_changes, line_accounting

NO_OUTLIERS = {"outliers": {"rule": "none"}}


@pytest.fixture
def products(make_products):
    return make_products([("P1", "a")])


@pytest.fixture
def spans(make_spans):
    return make_spans([("P1", "S1", "C1"), ("P1", "S1", "C2")])


@pytest.fixture
def config(make_config):
    return make_config(calendar={"cycle_date": "2026-02-02"}, cleansing=NO_OUTLIERS)


def rows_of(cleaned, customer="C1"):
    """The cleaned rows of one customer, by period, as a plain frame."""
    out = cleaned[cleaned["customer"] == customer].sort_values("period_start").reset_index(drop=True)
    return out


def ts(day):
    return pd.Timestamp(day)


# ------------------------------------------------------------------ rejection


def test_blank_key_is_rejected_as_missing_key(make_raw, products, spans, config):
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "3"), ("P1", "S1", "", "2026-01-05", "5")])
    res = clean_history(raw, products, spans, config)
    # row 2 has a blank customer -> one rejection, reason missing_key
    assert res.rejected["source_row"].tolist() == [2]
    assert res.rejected["reason"].tolist() == ["missing_key"]


def test_first_applicable_reason_wins_missing_key_before_bad_date(make_raw, products, spans, config):
    raw = make_raw([("P1", "", "C1", "not-a-date", "x")])
    res = clean_history(raw, products, spans, config)
    # blank site, bad date and bad quantity all apply; missing_key is checked first
    assert res.rejected["reason"].tolist() == ["missing_key"]


def test_unparseable_date_is_rejected_as_bad_date(make_raw, products, spans, config):
    raw = make_raw(
        [("P1", "S1", "C1", "2026-01-05", "3"), ("P1", "S1", "C1", "2026-13-01", "4"), ("P1", "S1", "C1", "soon", "4")]
    )
    res = clean_history(raw, products, spans, config)
    # month 13 and a word are not dates -> rows 2 and 3
    assert res.rejected["source_row"].tolist() == [2, 3]
    assert res.rejected["reason"].tolist() == ["bad_date", "bad_date"]


def test_non_numeric_or_infinite_quantity_is_rejected_as_bad_quantity(make_raw, products, spans, config):
    raw = make_raw(
        [
            ("P1", "S1", "C1", "2026-01-05", "3"),
            ("P1", "S1", "C1", "2026-01-05", "three"),
            ("P1", "S1", "C1", "2026-01-05", "inf"),
            ("P1", "S1", "C1", "2026-01-05", "nan"),
        ]
    )
    res = clean_history(raw, products, spans, config)
    # "three" does not parse; inf and nan parse but are not finite
    assert res.rejected["source_row"].tolist() == [2, 3, 4]
    assert set(res.rejected["reason"]) == {"bad_quantity"}
    # only row 1 is used: 3 in week 01-05, then 01-12 .. 01-26 filled with 0 up to the cycle
    assert rows_of(res.cleaned)["quantity"].tolist() == [3.0, 0.0, 0.0, 0.0]
    assert int(res.cleaned["lines"].sum()) == 1


def test_product_missing_from_master_is_rejected_as_unknown_product(make_raw, products, spans, config):
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "3"), ("P9", "S1", "C1", "2026-01-05", "4")])
    res = clean_history(raw, products, spans, config)
    assert res.rejected["source_row"].tolist() == [2]
    assert res.rejected["reason"].tolist() == ["unknown_product"]


def test_leaf_without_customer_span_is_rejected_as_no_customer_span(make_raw, products, spans, config):
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "3"), ("P1", "S1", "C9", "2026-01-05", "4"), ("P1", "S2", "C1", "2026-01-05", "4")])
    res = clean_history(raw, products, spans, config)
    # P1/S1/C9 and P1/S2/C1 have no span (spans exist for S1 x C1, C2 only)
    assert res.rejected["source_row"].tolist() == [2, 3]
    assert res.rejected["reason"].tolist() == ["no_customer_span", "no_customer_span"]


def test_line_in_or_after_cycle_period_is_rejected_but_the_sunday_before_is_used(make_raw, products, spans, config):
    raw = make_raw(
        [
            ("P1", "S1", "C1", "2026-02-01", "3"),  # Sunday: week of 2026-01-26, before the cycle
            ("P1", "S1", "C1", "2026-02-02", "4"),  # the cycle Monday itself
            ("P1", "S1", "C1", "2026-02-20", "5"),  # later
        ]
    )
    res = clean_history(raw, products, spans, config)
    assert res.rejected["source_row"].tolist() == [2, 3]
    assert res.rejected["reason"].tolist() == ["on_or_after_cycle_date"] * 2
    # the Sunday line lands in the week starting 2026-01-26 with quantity 3
    assert res.cleaned[["period_start", "quantity"]].values.tolist() == [[ts("2026-01-26"), 3.0]]


def test_raw_lines_equal_used_lines_plus_rejected(make_raw, products, spans, config):
    raw = make_raw(
        [
            ("P1", "S1", "C1", "2026-01-05", "3"),
            ("P1", "S1", "C1", "2026-01-06", "2"),  # same week as row 1
            ("P1", "S1", "C2", "2026-01-12", "4"),
            ("P1", "S1", "", "2026-01-12", "4"),  # missing_key
            ("P9", "S1", "C1", "2026-01-12", "4"),  # unknown_product
            ("P1", "S1", "C1", "2026-01-19", "-1"),
            ("P1", "S1", "C1", "2026-02-03", "1"),  # on_or_after_cycle_date
        ]
    )
    res = clean_history(raw, products, spans, config)
    acct = line_accounting(len(raw), res.cleaned, res.rejected)
    # 7 raw lines: rows 4, 5, 7 rejected (3); rows 1, 2, 3, 6 used (4); 4 + 3 = 7
    assert acct == {"raw_lines": 7, "used_lines": 4, "rejected_lines": 3, "unaccounted": 0}


# ------------------------------------------------------------------ bucketing


def test_dates_are_bucketed_to_their_iso_week_monday(make_raw, products, spans, config):
    raw = make_raw(
        [
            ("P1", "S1", "C1", "2026-01-07", "1"),  # Wednesday -> Monday 2026-01-05
            ("P1", "S1", "C1", "2026-01-11", "2"),  # Sunday    -> Monday 2026-01-05
            ("P1", "S1", "C1", "2026-01-12", "4"),  # Monday    -> itself
        ]
    )
    c = rows_of(clean_history(raw, products, spans, config).cleaned)
    # week 2026-01-05: 1 + 2 = 3 from 2 lines; week 2026-01-12: 4 from 1 line;
    # weeks 01-19 and 01-26 (before the 02-02 cycle) have no line -> filled 0
    assert c["period_start"].tolist() == [ts("2026-01-05"), ts("2026-01-12"), ts("2026-01-19"), ts("2026-01-26")]
    assert c["quantity"].tolist() == [3.0, 4.0, 0.0, 0.0]
    assert c["lines"].tolist() == [2, 1, 0, 0]


def test_month_calendar_buckets_dates_to_the_first_of_the_month(make_raw, make_config, products, spans):
    config = make_config(calendar={"period": "month"}, cleansing=NO_OUTLIERS)
    raw = make_raw(
        [
            ("P1", "S1", "C1", "2026-01-31", "1"),  # -> 2026-01-01
            ("P1", "S1", "C1", "2026-02-01", "2"),  # -> 2026-02-01
            ("P1", "S1", "C1", "2026-02-27", "4"),  # -> 2026-02-01
        ]
    )
    res = clean_history(raw, products, spans, config)
    c = rows_of(res.cleaned)
    # January: 1; February: 2 + 4 = 6
    assert c["period_start"].tolist() == [ts("2026-01-01"), ts("2026-02-01")]
    assert c["quantity"].tolist() == [1.0, 6.0]
    # latest period is February -> the cycle is the next month
    assert res.cycle_date == ts("2026-03-01")


def test_duplicate_lines_of_one_leaf_and_period_are_summed_and_counted(make_raw, products, spans, config):
    raw = make_raw(
        [
            ("P1", "S1", "C1", "2026-01-05", "4"),
            ("P1", "S1", "C1", "2026-01-05", "6"),
            ("P1", "S1", "C1", "2026-01-08", "1.5"),
            ("P1", "S1", "C2", "2026-01-05", "7"),  # other leaf: not summed with C1
        ]
    )
    cleaned = clean_history(raw, products, spans, config).cleaned
    c = cleaned[cleaned["period_start"] == ts("2026-01-05")].sort_values("customer")
    # week 01-05 -- C1: 4 + 6 + 1.5 = 11.5 from 3 lines; C2: 7 from 1 line
    assert c["quantity"].tolist() == pytest.approx([11.5, 7.0])
    assert c["lines"].tolist() == [3, 1]


def test_return_nets_against_shipments_of_the_same_period(make_raw, products, spans, config):
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "10"), ("P1", "S1", "C1", "2026-01-09", "-3")])
    res = clean_history(raw, products, spans, config)
    first = rows_of(res.cleaned).iloc[0]
    # week 01-05: 10 - 3 = 7 from 2 lines; the net is not negative so no correction
    assert first["period_start"] == ts("2026-01-05")
    assert (first["quantity"], first["raw_quantity"], first["lines"]) == (7.0, 7.0, 2)
    assert not res.cleaned["corrected"].any()
    assert res.corrections.empty


def test_negative_net_period_is_set_to_zero_and_audited(make_raw, products, spans, config):
    raw = make_raw(
        [
            ("P1", "S1", "C1", "2026-01-05", "2"),
            ("P1", "S1", "C1", "2026-01-06", "-5"),
            ("P1", "S1", "C1", "2026-01-12", "4"),
        ]
    )
    res = clean_history(raw, products, spans, config)
    c = rows_of(res.cleaned)
    # week 01-05: 2 - 5 = -3 -> 0; week 01-12: 4 untouched; 01-19, 01-26 filled 0
    assert c["raw_quantity"].tolist() == [-3.0, 4.0, 0.0, 0.0]
    assert c["quantity"].tolist() == [0.0, 4.0, 0.0, 0.0]
    assert c["corrected"].tolist() == [True, False, False, False]
    corr = res.corrections
    assert len(corr) == 1
    row = corr.iloc[0]
    # before -3, after 0, delta = 0 - (-3) = 3
    assert (row["product"], row["site"], row["customer"]) == ("P1", "S1", "C1")
    assert row["period_start"] == ts("2026-01-05")
    assert row["rule"] == "negative_net_to_zero"
    assert row["before"] == -3.0
    assert row["after"] == 0.0
    assert row["delta"] == 3.0


# ------------------------------------------------------------------ zero-fill


def test_missing_period_inside_the_span_is_filled_with_zero(make_raw, products, spans, config):
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "3"), ("P1", "S1", "C1", "2026-01-19", "5")])
    c = rows_of(clean_history(raw, products, spans, config).cleaned)
    # open span, first line 01-05, cycle 02-02 -> periods 01-05 .. 01-26 (4 weeks);
    # 01-12 and 01-26 have no line -> filled with 0
    assert c["period_start"].tolist() == [ts("2026-01-05"), ts("2026-01-12"), ts("2026-01-19"), ts("2026-01-26")]
    assert c["quantity"].tolist() == [3.0, 0.0, 5.0, 0.0]
    assert c["raw_quantity"].tolist() == [3.0, 0.0, 5.0, 0.0]
    assert c["filled"].tolist() == [False, True, False, True]
    assert c["lines"].tolist() == [1, 0, 1, 0]


def test_span_without_start_is_not_filled_before_its_first_line(make_raw, products, spans, config):
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "3"), ("P1", "S1", "C2", "2026-01-19", "5")])
    c2 = rows_of(clean_history(raw, products, spans, config).cleaned, "C2")
    # history starts 01-05 (C1) but C2's first line is 01-19 and its span has no start:
    # C2 runs 01-19 .. 01-26 only
    assert c2["period_start"].tolist() == [ts("2026-01-19"), ts("2026-01-26")]
    assert c2["quantity"].tolist() == [5.0, 0.0]


def test_span_start_fills_from_span_start_but_never_before_first_history_period(make_raw, make_spans, products, config):
    spans = make_spans([("P1", "S1", "C1"), ("P1", "S1", "C2", "2026-01-14"), ("P1", "S1", "C3", "2025-06-01")])
    raw = make_raw(
        [("P1", "S1", "C1", "2026-01-05", "3"), ("P1", "S1", "C2", "2026-01-26", "5"), ("P1", "S1", "C3", "2026-01-26", "6")]
    )
    cleaned = clean_history(raw, products, spans, config).cleaned
    c2, c3 = rows_of(cleaned, "C2"), rows_of(cleaned, "C3")
    # C2 span starts Wed 2026-01-14 -> week 01-12; filled 01-12, 01-19, line 01-26
    assert c2["period_start"].tolist() == [ts("2026-01-12"), ts("2026-01-19"), ts("2026-01-26")]
    assert c2["filled"].tolist() == [True, True, False]
    # C3 span starts 2025-06-01, before the first history period 01-05 -> from 01-05: 4 weeks
    assert c3["period_start"].min() == ts("2026-01-05")
    assert len(c3) == 4
    assert c3["quantity"].tolist() == [0.0, 0.0, 0.0, 6.0]


def test_fill_stops_at_span_end(make_raw, make_spans, products, config):
    spans = make_spans([("P1", "S1", "C1", None, "2026-01-13")])
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "3")])
    c = rows_of(clean_history(raw, products, spans, config).cleaned)
    # span ends Tue 2026-01-13 -> last period 01-12; no fill for 01-19, 01-26
    assert c["period_start"].tolist() == [ts("2026-01-05"), ts("2026-01-12")]
    assert c["filled"].tolist() == [False, True]


# ------------------------------------------------------------------ cycle date


def test_latest_complete_period_is_the_period_after_the_last_history_period(make_raw, make_config, products, spans):
    config = make_config(cleansing=NO_OUTLIERS)  # cycle_date defaults to latest_complete_period
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "3"), ("P1", "S1", "C2", "2026-01-21", "5")])
    res = clean_history(raw, products, spans, config)
    # last line Wed 2026-01-21 -> week 01-19 -> cycle date the next Monday 01-26
    assert res.cycle_date == ts("2026-01-26")
    assert res.rejected.empty
    assert res.cleaned["period_start"].max() == ts("2026-01-19")


def test_explicit_cycle_date_is_used_and_cuts_history(make_raw, make_config, products, spans):
    config = make_config(calendar={"cycle_date": "2026-01-19"}, cleansing=NO_OUTLIERS)
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "3"), ("P1", "S1", "C1", "2026-01-21", "5")])
    res = clean_history(raw, products, spans, config)
    assert res.cycle_date == ts("2026-01-19")
    # the 01-21 line is in the cycle week -> rejected; history 01-05, 01-12 (filled)
    assert res.rejected["reason"].tolist() == ["on_or_after_cycle_date"]
    assert rows_of(res.cleaned)["quantity"].tolist() == [3.0, 0.0]


# ------------------------------------------------------------------ audit


def test_no_unexplained_change_on_a_clean_result(make_raw, products, spans, config):
    raw = make_raw(
        [("P1", "S1", "C1", "2026-01-05", "2"), ("P1", "S1", "C1", "2026-01-05", "-5"), ("P1", "S1", "C2", "2026-01-12", "4")]
    )
    res = clean_history(raw, products, spans, config)
    # C1: raw -3 + 0 + 0 + 0 = -3, delta +3, cleaned 0 -> -3 + 3 = 0 explained
    assert len(res.corrections) == 1
    assert find_unexplained_changes(res.cleaned, res.corrections).empty


def test_tampered_quantity_is_an_unexplained_change(make_raw, products, spans, config):
    raw = make_raw([("P1", "S1", "C1", "2026-01-05", "2"), ("P1", "S1", "C2", "2026-01-12", "4")])
    res = clean_history(raw, products, spans, config)
    cleaned = res.cleaned.copy()
    cleaned.loc[(cleaned["customer"] == "C2") & (cleaned["period_start"] == ts("2026-01-12")), "quantity"] += 5
    found = find_unexplained_changes(cleaned, res.corrections)
    # C2: raw 4 (+ 0 filled 01-19, 01-26), no corrections, cleaned 9 -> unexplained 9 - 4 - 0 = 5
    assert found["customer"].tolist() == ["C2"]
    assert found["unexplained"].tolist() == pytest.approx([5.0])


# ------------------------------------------------------------------ outliers


def _spike_raw(make_raw):
    """C1 weekly 10, 12, 100, 11, 13 from 2026-01-05; cycle 2026-02-09."""
    weeks = ["2026-01-05", "2026-01-12", "2026-01-19", "2026-01-26", "2026-02-02"]
    return make_raw([("P1", "S1", "C1", w, q) for w, q in zip(weeks, ["10", "12", "100", "11", "13"])])


def test_hampel_replace_with_median_puts_the_window_median(make_raw, make_config, products, spans):
    config = make_config(
        calendar={"cycle_date": "2026-02-09"},
        cleansing={"outliers": {"rule": "hampel", "window": 5, "k": 3, "replace_with": "median"}},
    )
    res = clean_history(_spike_raw(make_raw), products, spans, config)
    c = rows_of(res.cleaned)
    # window at 100 (01-19): [10, 12, 100, 11, 13], median 12;
    # |x - 12| = 2, 0, 88, 1, 1 -> sorted 0, 1, 1, 2, 88 -> MAD 1;
    # limit scale 3 * 1.4826 * 1 = 4.4478 < 88 -> flagged, replaced by the median 12.
    # Neighbours: at 12 (01-12) window {10, 12, 100, 11}, median 11.5, MAD 1.0,
    # |12 - 11.5| = 0.5 <= 4.4478; at 11 (01-26) window {12, 100, 11, 13}, median 12.5,
    # MAD 1.0, |11 - 12.5| = 1.5 <= 4.4478; edges have MAD 2 and deviations 2 and 0 -> kept.
    assert c["quantity"].tolist() == pytest.approx([10.0, 12.0, 12.0, 11.0, 13.0])
    assert len(res.corrections) == 1
    row = res.corrections.iloc[0]
    assert row["rule"] == "hampel_cap"
    assert row["period_start"] == ts("2026-01-19")
    # before 100, after 12, delta 12 - 100 = -88
    assert (row["before"], row["after"], row["delta"]) == pytest.approx((100.0, 12.0, -88.0))
    params = json.loads(row["parameters"])
    assert params["replace_with"] == "median"
    assert params["median"] == pytest.approx(12.0)
    assert params["limit_scale"] == pytest.approx(4.4478)


def test_hampel_limit_caps_at_median_plus_scaled_mad(make_raw, make_config, products, spans):
    config = make_config(
        calendar={"cycle_date": "2026-02-09"},
        cleansing={"outliers": {"rule": "hampel", "window": 5, "k": 3, "replace_with": "limit"}},
    )
    res = clean_history(_spike_raw(make_raw), products, spans, config)
    c = rows_of(res.cleaned)
    # same window as above: median 12, limit 12 + 3 * 1.4826 * 1 = 16.4478
    assert c["quantity"].tolist() == pytest.approx([10.0, 12.0, 16.4478, 11.0, 13.0])
    assert res.corrections["delta"].tolist() == pytest.approx([16.4478 - 100.0])


def test_outlier_rule_none_changes_nothing(make_raw, make_config, products, spans):
    config = make_config(calendar={"cycle_date": "2026-02-09"}, cleansing={"outliers": {"rule": "none"}})
    res = clean_history(_spike_raw(make_raw), products, spans, config)
    c = rows_of(res.cleaned)
    # the spike 100 stays; no correction at all
    assert c["quantity"].tolist() == [10.0, 12.0, 100.0, 11.0, 13.0]
    assert c["corrected"].tolist() == [False] * 5
    assert res.corrections.empty
