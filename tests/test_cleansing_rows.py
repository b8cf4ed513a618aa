"""The one compiled pass per leaf row (`pipelines/engines/cleansing_rows.py`) against the block path of numpy
passes (`cleansing_blocks`), the reference it must equal bit for bit, and against a row worked by hand."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from test_cleaned_history import _PRODUCTS, _SPANS, _cleansing_case

from pipelines.engines import cleansing_blocks
from pipelines.engines.cleansing_rows import NEGATIVE, OUTLIER, clean_rows
from pipelines.engines.outliers import MAD_SCALE
from pipelines.stages.cleaned_history import clean_history

TABLES = ("cleaned", "rejected", "corrections", "outlier_rules", "shortage_periods")


def _bits(frame: pd.DataFrame) -> dict:
    """Each float column as its bits (0.0 and -0.0 apart, NaN by its payload)."""
    return {c: frame[c].to_numpy().view(np.int64).tolist() for c in frame.columns if frame[c].dtype == np.float64}


def _both_paths(raw, shortages, config, monkeypatch):
    monkeypatch.setattr(cleansing_blocks, "CHUNK_CELLS", 10**12)  # the block path, numpy passes
    blocks = clean_history(raw, _PRODUCTS, _SPANS, config, shortages=shortages)
    monkeypatch.setattr(cleansing_blocks, "CHUNK_CELLS", 0)  # the one pass wherever its classes allow it
    rows = clean_history(raw, _PRODUCTS, _SPANS, config, shortages=shortages)
    return blocks, rows


_taken = {"one pass": 0, "rows": 0}


@settings(
    max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture]
)
@given(case=_cleansing_case())
def test_the_one_pass_gives_the_block_paths_tables_bit_for_bit(case, monkeypatch):
    """Property: on every history the hypothesis strategy of the stage's tests draws (both calendars, Hampel,
    Tukey and none, both sides and replacements, shortages, returns, rejected lines), the one pass's five
    tables equal the block path's exactly, float bits included. Where a class needs seasonal adjustment or the
    shortage rule is fill_baseline the block path runs in both (`cleansing_rows.takes`)."""
    from pipelines.engines.cleansing_rows import takes
    from pipelines.stages.cleaned_history import CleaningSettings

    rows, shortages, config = case
    raw = pd.DataFrame(rows, columns=["product", "site", "customer", "period_start", "quantity"])
    raw.insert(0, "source_row", np.arange(1, len(raw) + 1))
    raw.insert(0, "source_file", "history.csv")
    try:
        blocks, one = _both_paths(raw, shortages, config, monkeypatch)
    except Exception as err:  # only a history without a single usable line may stop the stage
        assert "no usable row" in str(err)
        return
    for name in TABLES:
        a, b = getattr(blocks, name), getattr(one, name)
        pd.testing.assert_frame_equal(a, b, check_exact=True, obj=name)
        assert _bits(a) == _bits(b), name
    if takes(np.array(sorted(_PRODUCTS["product_class"]), dtype=object), CleaningSettings.of(config)):
        _taken["one pass"] += 1
        _taken["rows"] += len(one.corrections)


def test_the_property_ran_the_one_pass_on_corrected_histories():
    """The property above is not vacuous: some of its histories took the one pass, with correction rows."""
    if not _taken["one pass"]:
        pytest.skip("run with the property test")
    assert _taken["rows"] > 0


def _one_row(lines, t, start, end, kind, window=5, scale=3.0 * MAD_SCALE, both=False, to_median=False,
             short=None):
    col = np.array([c for c, _ in lines], dtype=np.int32)
    qty = np.array([q for _, q in lines], dtype=np.float64)
    by_parent = np.zeros((1, t), dtype=bool) if short is None else np.array([short])
    out = [np.empty(t, dtype=np.int64), np.empty(t), np.empty(t), np.empty(t, dtype=np.int64)]
    out += [np.empty(t, dtype=bool) for _ in range(3)]
    found = [np.empty(2 * t, dtype=d) for d in (np.int64, np.int32, np.int8, np.float64, np.float64)]
    stats = np.empty((2 * t, 3))
    kept, flagged = np.zeros(1, dtype=np.int64), np.zeros((1, t), dtype=np.int64)
    runs = (np.array([0]), np.array([len(lines)]), np.ones(len(lines), dtype=bool), col, np.int32(0))
    cells, k = clean_rows(
        np.array([0, 1]), *runs, np.arange(len(lines)), qty, t, np.array([start]), np.array([end]),
        np.zeros(1, dtype=np.int64),
        by_parent, np.zeros(1, dtype=np.int64), np.array([kind]), np.array([window]), np.array([scale]),
        np.array([both]), np.array([to_median]), np.arange(t, dtype=np.int64) * 10, *out, 0, kept, flagged,
        *found, stats, 7,
    )
    return [o[:cells] for o in out], [f[:k] for f in found], stats[:k], kept, flagged


def test_a_row_worked_by_hand():
    """One leaf over 8 periods, fill range 1..6, window 5, Hampel k = 3 (upper side, cap at the limit).

    Lines (column, quantity): (0, 4), (2, 5), (2, -1), (3, -2), (4, 100), (5, 6), (7, 5) - column 0 and 7 lie
    outside the fill range but hold lines, so they are kept; column 1 and 6 are filled with 0.
    Nets: 4, 0, 4, -2 -> 0 (negative net: a correction row, before -2 after 0), 100, 6, 0, 5.
    Hampel at column 4: window columns 2..6 = 4, 0, 100, 6, 0 -> median 4, |x - 4| = 0, 4, 96, 2, 4 -> MAD 4;
    limit 4 + 3 * 1.4826 * 4 = 21.7912 < 100: capped to 21.7912 (a correction row, before 100).
    No other cell crosses its limit (column 5: window 0, 100, 6, 0, 5 -> median 5, MAD 5, 6 < 5 + 22.2).
    """
    (period, qty, raw, lines, filled, corrected, short), found, stats, kept, flagged = _one_row(
        [(0, 4.0), (2, 5.0), (2, -1.0), (3, -2.0), (4, 100.0), (5, 6.0), (7, 5.0)], 8, 1, 6, kind=0
    )
    limit = 4.0 + 3.0 * MAD_SCALE * 4.0
    assert period.tolist() == [0, 10, 20, 30, 40, 50, 60, 70]
    assert qty.tolist() == [4.0, 0.0, 4.0, 0.0, limit, 6.0, 0.0, 5.0]
    assert raw.tolist() == [4.0, 0.0, 4.0, -2.0, 100.0, 6.0, 0.0, 5.0]
    assert lines.tolist() == [1, 0, 2, 1, 1, 1, 0, 1]
    assert filled.tolist() == [False, True, False, False, False, False, True, False]
    assert corrected.tolist() == [False, False, False, True, True, False, False, False]
    assert not short.any() and kept.tolist() == [8] and not flagged.any()
    leaf, col, rule, before, after = found
    assert leaf.tolist() == [7, 7] and col.tolist() == [3, 4]
    assert rule.tolist() == [NEGATIVE, OUTLIER]
    assert before.tolist() == [-2.0, 100.0] and after.tolist() == [0.0, limit]
    assert stats[1, :2].tolist() == [4.0, 4.0]  # the cap's window median and MAD


def test_a_shortage_is_flagged_not_judged_and_cells_outside_the_range_are_dropped():
    """Tukey, fence 0.5, window 5, fill range 2..4 of 6 periods; a shortage recorded on the parent in columns
    1 and 3. Lines: (2, 1), (3, 50), (4, 2). Kept: columns 2..4 only (column 1 has no line and lies outside
    the range, so its shortage flags nothing). Column 3 is a shortage: neither judged nor in a window, so
    the windows hold 1 and 2 only (Q1 1.25, Q3 1.75): nothing is capped, 50 stays."""
    (period, qty, raw, lines, filled, corrected, short), found, _, kept, flagged = _one_row(
        [(2, 1.0), (3, 50.0), (4, 2.0)], 6, 2, 4, kind=1, scale=0.5,
        short=[False, True, False, True, False, False],
    )
    assert period.tolist() == [20, 30, 40] and qty.tolist() == [1.0, 50.0, 2.0]
    assert short.tolist() == [False, True, False] and flagged.tolist() == [[0, 0, 0, 1, 0, 0]]
    assert not corrected.any() and len(found[0]) == 0 and kept.tolist() == [3]


def test_the_one_pass_reads_lines_in_runs_of_one_key_as_the_block_path(make_products, make_spans, make_config,
                                                                       make_key_runs, monkeypatch):
    """Past 1,024 lines in runs of one key, `reject_lines` leaves the used lines in place as runs (a leaf's
    runs in two files, rejected lines inside runs, a run wholly rejected); the one pass reads them through the
    runs and must give the block path's tables exactly."""
    products = make_products([("P1", "a"), ("P2", "a")])
    leaves = [(p, s, c) for p in ("P1", "P2") for s in ("S1", "S2") for c in ("C1", "C2", "C3", "C4", "C5")]
    spans = make_spans(leaves[:-1])  # the last leaf has no span: its runs are rejected whole
    weeks = pd.date_range("2025-01-06", periods=60, freq="7D").strftime("%Y-%m-%d")
    rows = []
    for file in ("history_a.csv", "history_b.csv"):
        mine = weeks[:30] if file == "history_a.csv" else weeks[20:]
        for p, s, c in leaves:
            rows += [(file, p, s, c, w, str((3 + i % 7) * (40 if i % 11 == 5 else 1) - (9 if i % 13 == 4 else 0)))
                     for i, w in enumerate(mine)]
    rows.insert(0, ("history_a.csv", "P1", "S1", "C1", "not a date", "2"))  # a run whose first line is rejected
    raw = make_key_runs(rows)  # the lines in runs of one key
    from pipelines.engines import cleansing

    assert len(raw) >= 1024 and len(cleansing._key_runs(raw)[0]) < len(raw) / 4  # the runs path is taken
    config = make_config(calendar={"cycle_date": "2026-03-02"})
    monkeypatch.setattr(cleansing_blocks, "CHUNK_CELLS", 10**12)
    blocks = clean_history(raw, products, spans, config)
    monkeypatch.setattr(cleansing_blocks, "CHUNK_CELLS", 0)
    one = clean_history(raw, products, spans, config)
    assert {"negative_net_to_zero", "hampel_cap"} <= set(one.corrections["rule"])
    assert {"bad_date", "no_customer_span"} <= set(one.rejected["reason"])
    for name in TABLES:
        pd.testing.assert_frame_equal(getattr(blocks, name), getattr(one, name), check_exact=True, obj=name)
        assert _bits(getattr(blocks, name)) == _bits(getattr(one, name)), name
