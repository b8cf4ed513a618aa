"""Integer coding through object runs (`pipelines.text_codes`) and the cleaned history's proofs on it
(`pipelines.engines.history_proofs`): each fast path against the general one it stands in for.

The reference here is pandas itself (`pd.factorize`) and the general path of each proof (every row coded and
grouped by its text keys), which the existing tests of `tests/test_cleaned_history.py` pin to hand-worked rows.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines import keys
from pipelines.engines import cleansing, history_proofs
from pipelines.engines.proofs import find_unaccounted_lines
from pipelines.schemas import RawHistory
from pipelines.stages.cleaned_history import clean_history, find_unexplained_changes
from pipelines.text_codes import codes_of

POOL = np.array(["a", "b", "", "c", None, np.nan, "d"], dtype=object)


@pytest.mark.parametrize("seed", range(40))
def test_codes_of_is_pd_factorize(seed):
    rng = np.random.default_rng(seed)
    values = POOL[rng.integers(0, len(POOL), int(rng.integers(0, 6000)))]
    if seed % 3 == 0:  # runs of one object
        values = np.sort(values.astype(str)).astype(object)
    if seed % 4 == 0:  # equal text in distinct objects
        values = np.array(["".join(list(v)) if isinstance(v, str) else v for v in values], dtype=object)
    for sentinel in (True, False):
        codes, uniques = codes_of(values, use_na_sentinel=sentinel)
        want, want_uniques = pd.factorize(values, use_na_sentinel=sentinel)
        assert codes.tolist() == want.tolist()
        assert [str(u) for u in uniques] == [str(u) for u in want_uniques]


@pytest.mark.parametrize("pool", [["x", "y", "z"], ["x", "y", None, "x2"], ["a", "".join(["a"]), "b", np.nan]])
def test_codes_of_few_objects_in_short_runs_is_pd_factorize(pool):
    """Cells in short runs of few objects (each object read at its address): texts only (the objects' own codes),
    missing cells, and one text in two distinct objects (a code shared by two objects)."""
    rng = np.random.default_rng(len(pool))
    cells = np.empty(len(pool), dtype=object)
    cells[:] = pool
    values = cells[rng.integers(0, len(pool), 5000)]
    for sentinel in (True, False):
        codes, uniques = codes_of(values, use_na_sentinel=sentinel)
        want, want_uniques = pd.factorize(values, use_na_sentinel=sentinel)
        assert codes.dtype == np.int64 and codes.tolist() == want.tolist()
        assert [str(u) for u in uniques] == [str(u) for u in want_uniques]


def test_keys_factorize_through_runs_is_the_packed_coding():
    rng = np.random.default_rng(3)
    leaves = [("P%d" % (i % 7), "S%d" % (i % 3), "C%d" % i) for i in range(60)]
    rows = [leaves[i] for i in np.repeat(rng.permutation(60), rng.integers(20, 40, 60))]
    frame = pd.DataFrame(rows, columns=keys.LEAF)
    codes, uniques = keys.factorize(frame, keys.LEAF)  # runs: a few per leaf
    shuffled = frame.iloc[rng.permutation(len(frame))].reset_index(drop=True)
    assert len(frame) > 1024
    packed, _ = keys.factorize(shuffled, keys.LEAF)  # no runs: every row packed
    assert codes.tolist() == tuple_codes(frame)
    assert uniques.values.tolist() == frame.drop_duplicates().values.tolist()
    assert packed.tolist() == tuple_codes(shuffled)


def tuple_codes(frame: pd.DataFrame) -> list[int]:
    """pd.factorize of each row's key as one tuple."""
    return pd.factorize(pd.Series(list(frame[keys.LEAF].itertuples(index=False, name=None))))[0].tolist()


@pytest.fixture
def cleaned_case(make_products, make_spans, make_config):
    """24 leaves x 40 weeks in two files, a line repeated in the later file, one unknown product, one return."""
    products = make_products([("P1", "a"), ("P2", "a"), ("P3", "a")])
    leaves = [(p, s, c) for p in ("P1", "P2", "P3") for s in ("S1", "S2") for c in ("C1", "C2", "C3", "C4")]
    spans = make_spans(leaves)
    weeks = pd.date_range("2025-04-07", periods=40, freq="7D").strftime("%Y-%m-%d")
    rows = []
    for file in ("history_a.csv", "history_b.csv"):
        mine = weeks[:20] if file == "history_a.csv" else weeks[20:]
        for p, s, c in leaves:
            rows += [(file, p, s, c, w, str(3 + (len(rows) % 5))) for w in mine]
    rows.append(("history_b.csv", *rows[0][1:]))  # the first line again, in the later file
    rows.append(("history_b.csv", "P9", "S1", "C1", weeks[30], "4"))
    rows.append(("history_a.csv", "P2", "S1", "C2", weeks[3], "-50"))  # a return beyond the week: a correction
    raw = pd.DataFrame(rows, columns=["source_file", "product", "site", "customer", "period_start", "quantity"])
    raw.insert(1, "source_row", np.arange(1, len(raw) + 1))
    raw = RawHistory.validate(raw)
    config = make_config(calendar={"cycle_date": "2026-01-12"})
    return raw, clean_history(raw, products, spans, config)


def general(monkeypatch, proof, *args):
    """The proof with the runs refused, so every row is coded (the general path)."""
    with monkeypatch.context() as m:
        m.setattr(history_proofs, "leaf_runs", lambda frame: None)
        return proof(*args)


def test_unexplained_changes_on_runs_are_those_of_every_row(cleaned_case, monkeypatch):
    raw, res = cleaned_case
    assert history_proofs.cell_positions(res.cleaned, res.corrections) is not None  # the fast path is taken
    assert set(res.rejected["reason"]) == {"duplicate_of_other_file", "unknown_product"}
    assert len(res.corrections) == 1
    cleaned = res.cleaned.copy()
    cleaned.loc[[5, 300], "quantity"] += [2.0, -1.5]
    orphan = res.corrections.head(1).assign(period_start=pd.Timestamp("2024-01-01"), delta=1.0)
    corrections = pd.concat([res.corrections, orphan], ignore_index=True)
    for frame, corr in ((res.cleaned, res.corrections), (cleaned, res.corrections), (cleaned, corrections)):
        fast = find_unexplained_changes(frame, corr)
        pd.testing.assert_frame_equal(fast, general(monkeypatch, find_unexplained_changes, frame, corr))
    assert len(find_unexplained_changes(cleaned, corrections)) == 3


def test_unaccounted_lines_on_runs_are_those_of_every_row(cleaned_case, monkeypatch):
    raw, res = cleaned_case
    assert history_proofs.accounted_lines(raw, res.cleaned, res.rejected) is not None  # the fast path is taken
    more_lines = res.cleaned.copy()
    more_lines.loc[[7, 400], "lines"] += 1
    twice = pd.concat([res.rejected, res.rejected.tail(1)], ignore_index=True)
    stranger = res.rejected.assign(source_file="elsewhere.csv")
    cases = [
        (res.cleaned, res.rejected),
        (more_lines, res.rejected),
        (res.cleaned, res.rejected.iloc[0:0]),
        (res.cleaned, twice),
        (res.cleaned, stranger),
    ]
    for cleaned, rejected in cases:
        fast = find_unaccounted_lines(raw, cleaned, rejected)
        pd.testing.assert_frame_equal(fast, general(monkeypatch, find_unaccounted_lines, raw, cleaned, rejected))
    assert len(find_unaccounted_lines(raw, more_lines, res.rejected)) == 2
    assert find_unaccounted_lines(raw, res.cleaned, res.rejected).empty


def test_line_rejection_on_key_runs_is_that_of_every_line(make_products, make_spans, make_config, make_key_runs,
                                                         monkeypatch):
    """`cleansing.reject_lines` codes and judges the keys once per run of lines (past 1,024 lines in few runs);
    the reference is its own general path, every line coded (`_key_runs` refused)."""
    products = make_products([("P1", "a"), ("P2", "a")])
    leaves = [(p, s, c) for p in ("P1", "P2") for s in ("S1", "S2") for c in ("C1", "C2", "C3", "C4", "C5")]
    spans = make_spans(leaves[:-1])  # the last leaf has no span
    weeks = pd.date_range("2025-01-06", periods=60, freq="7D").strftime("%Y-%m-%d")
    rows = []
    for file in ("history_a.csv", "history_b.csv"):
        mine = weeks[:30] if file == "history_a.csv" else weeks  # the later file repeats the earlier one's weeks
        for p, s, c in leaves + [("P9", "S1", "C1"), ("P1", "", "C1")]:
            rows += [(file, p, s, c, w, str(3 + i % 7)) for i, w in enumerate(mine)]
    rows.append(("history_b.csv", "P1", "S1", "C1", "not a date", "2"))
    rows.append(("history_b.csv", "P1", "S1", "C2", weeks[4], "x"))
    raw = make_key_runs(rows)  # the lines in runs of one key
    assert len(raw) >= 1024 and len(cleansing._key_runs(raw)[0]) < len(raw) / 4  # the runs path is taken
    config = make_config(calendar={"cycle_date": "2026-03-02"})
    fast = clean_history(raw, products, spans, config)
    starts, heads = history_proofs.leaf_runs(raw)  # the raw lines' runs the stage hands to its proofs
    assert np.array_equal(fast.raw_runs[0], starts)
    pd.testing.assert_frame_equal(fast.raw_runs[1], heads, check_exact=True)
    missing = raw.assign(customer=raw["customer"].where(np.arange(len(raw)) >= 3, None))  # a key missing
    assert history_proofs.leaf_runs(missing) is None
    assert clean_history(missing, products, spans, config).raw_runs is None
    with monkeypatch.context() as m:
        m.setattr(cleansing, "_key_runs", lambda frame: (frame, None))
        slow = clean_history(raw, products, spans, config)
    assert {"missing_key", "unknown_product", "no_customer_span", "duplicate_of_other_file", "bad_date",
            "bad_quantity"} <= set(fast.rejected["reason"])
    for name in ("cleaned", "rejected", "corrections"):
        pd.testing.assert_frame_equal(getattr(fast, name), getattr(slow, name), check_exact=True)


@pytest.mark.parametrize("seed", range(6))
def test_stable_order_through_runs_is_numpys_stable_argsort(seed):
    """`cleansing_blocks.stable_order` (the lines grouped by leaf through their runs) against its reference,
    numpy's stable argsort, on codes in runs (the fast path) and not (its fallback)."""
    from pipelines.engines.cleansing_blocks import stable_order

    rng = np.random.default_rng(seed)
    for _ in range(100):
        n, k = int(rng.integers(0, 400)), int(rng.integers(1, 30))
        m = max(n // int(rng.integers(1, 20)), 1)
        runs = np.repeat(rng.integers(0, k, m), rng.integers(1, 12, m))[:n]
        for codes in (runs, rng.integers(0, k, n)):
            codes = codes.astype(np.int64)
            assert np.array_equal(stable_order(codes), np.argsort(codes, kind="stable"))


def test_unexplained_changes_before_the_epoch_are_those_of_every_row(cleaned_case, monkeypatch):
    """The same proof on periods dated before 1970 (whole days below zero: the distinct days counted on a
    shifted copy), a change planted and an orphan correction."""
    _, res = cleaned_case
    back = pd.Timedelta(days=7 * 52 * 60)
    cleaned = res.cleaned.assign(period_start=res.cleaned["period_start"] - back)
    cleaned.loc[[7], "quantity"] += 3.0
    corr = res.corrections.assign(period_start=res.corrections["period_start"] - back)
    corr = pd.concat([corr, corr.head(1).assign(period_start=pd.Timestamp("1950-01-02"), delta=1.0)], ignore_index=True)
    assert cleaned["period_start"].max() < pd.Timestamp("1970-01-01")
    assert history_proofs.cell_positions(cleaned, corr) is not None  # the fast path is taken
    fast = find_unexplained_changes(cleaned, corr)
    pd.testing.assert_frame_equal(fast, general(monkeypatch, find_unexplained_changes, cleaned, corr))
    assert len(fast) == 2
