"""Integer leaf and parent ids (pipelines/keys.py): assigned once, carried, checked against the text keys.

Every expected value is worked out by hand in a comment; the ids are ranks of
the keys in text order (Python's string order, as `sorted` gives it).
"""

import numpy as np
import pandas as pd
import pandera.errors
import pytest

from pipelines.keys import (
    LEAF,
    LEAF_ID,
    PARENT,
    PARENT_ID,
    _ids_match_keys_by_row,
    add_ids,
    coded,
    extend_ids,
    ids_match_keys,
    ids_proven,
    key_ids,
    key_rank,
    lookup,
    pack_codes,
    rows_in,
)


def _history() -> pd.DataFrame:
    # leaves in text order: (A,S1,c1) 0, (A,S1,c2) 1, (A,S2,c1) 2, (B,S1,c1) 3; parents: (A,S1) 0, (A,S2) 1, (B,S1) 2
    return pd.DataFrame(
        {
            "product": ["B", "A", "A", "A", "A", "B"],
            "site": ["S1", "S2", "S1", "S1", "S1", "S1"],
            "customer": ["c1", "c1", "c2", "c1", "c2", "c1"],
            "quantity": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
        }
    )


def test_ids_are_the_ranks_of_the_keys_in_text_order():
    leaf, parent = key_ids(_history())
    assert leaf.dtype == np.int32 and parent.dtype == np.int32
    assert leaf.tolist() == [3, 2, 1, 0, 1, 3]
    assert parent.tolist() == [2, 1, 0, 0, 0, 2]


def test_coded_gives_the_key_of_every_id_and_the_rows_of_a_table():
    h = add_ids(_history())
    c = coded(h)
    assert c.leaves.values.tolist() == [["A", "S1", "c1"], ["A", "S1", "c2"], ["A", "S2", "c1"], ["B", "S1", "c1"]]
    assert c.parents.values.tolist() == [["A", "S1"], ["A", "S2"], ["B", "S1"]]
    # a table holding two of the leaves, in its own order: (A,S2,c1) at 0, (B,S1,c1) at 1
    table = pd.DataFrame({"product": ["A", "B"], "site": ["S2", "S1"], "customer": ["c1", "c1"]})
    assert c.leaf_rows(table).tolist() == [1, 0, -1, -1, -1, 1]
    assert c.leaf_rows(table).tolist() == lookup(h, LEAF, table).tolist()
    assert c.parent_rows(table).tolist() == lookup(h, PARENT, table).tolist() == [1, 0, -1, -1, -1, 1]


def test_coded_without_id_columns_codes_the_text_keys_alike():
    h = _history()
    assert coded(h).leaf.tolist() == coded(add_ids(h.copy())).leaf.tolist()


def test_children_without_history_get_ids_after_the_historys():
    h = add_ids(_history())
    # children: a known leaf (B,S1,c1) = 3; a new customer (A,S1,c0) of a known parent; a new parent (C,S1)
    children = pd.DataFrame({"product": ["B", "C", "A"], "site": ["S1", "S1", "S1"], "customer": ["c1", "c9", "c0"]})
    leaf, parent = extend_ids(children, h)
    # new leaves after 0..3 in key order: (A,S1,c0) 4, (C,S1,c9) 5; new parent (C,S1) after 0..2: 3
    assert leaf.tolist() == [3, 5, 4]
    assert parent.tolist() == [2, 3, 0]


def test_rows_in_and_key_rank_agree_with_the_text_keys():
    h = add_ids(_history())
    shares = h.drop_duplicates(LEAF).iloc[::-1].reset_index(drop=True)  # ids held once, in another order
    assert rows_in(h, shares, LEAF).tolist() == lookup(h, LEAF, shares).tolist()
    spans = shares[LEAF]  # no id columns: looked up through the distinct keys of h
    assert rows_in(h, spans, LEAF).tolist() == lookup(h, LEAF, spans).tolist()
    # ranks in text order: leaves as the ids (all in history), parents (A,S1) 0, (A,S2) 1, (B,S1) 2
    assert key_rank(h, LEAF).tolist() == [3, 2, 1, 0, 1, 3]
    assert key_rank(h, PARENT).tolist() == [2, 1, 0, 0, 0, 2]
    # ids out of key order (a child without history numbered after): the rank still sorts as the text
    extended = pd.DataFrame({"product": ["A", "C"], "site": ["S1", "S1"], "customer": ["c0", "c9"],
                             "leaf_id": [5, 4], "parent_id": [0, 3]})
    rank = key_rank(extended, LEAF)
    assert rank[0] < rank[1]  # (A,S1,c0) before (C,S1,c9), though its id 5 is after 4


def test_rows_of_ids_in_runs_out_of_order_agree_with_the_text_keys():
    """A forecast table's layout: each leaf's rows in a run, the runs not in id order (a child without history
    numbered after the others sits among them in key order), an id coming back in a later run; random tables."""
    from pipelines.keys import part_rows

    rng = np.random.default_rng(4)
    products = np.array(["A", "B", "C", "D"], dtype=object)
    for _ in range(200):
        n = int(rng.integers(1, 12))
        leaves = pd.DataFrame({"product": rng.choice(products, n), "site": rng.choice(["S1", "S2"], n),
                               "customer": [f"c{i}" for i in range(n)]})
        leaves["leaf_id"], leaves["parent_id"] = key_ids(leaves)
        runs = rng.integers(0, n, int(rng.integers(1, 3 * n)))  # which leaf each run is
        table = leaves.iloc[np.repeat(runs, rng.integers(1, 5, len(runs)))].reset_index(drop=True)
        spans = leaves[LEAF].sample(frac=0.7, random_state=int(rng.integers(1000))).reset_index(drop=True)
        assert rows_in(table, spans, LEAF).tolist() == lookup(table, LEAF, spans).tolist()
        master = pd.DataFrame({"product": products[::-1]})
        assert part_rows(table, ["product"], master).tolist() == lookup(table, ["product"], master).tolist()


def test_ids_that_do_not_match_the_keys_are_named_by_row():
    h = add_ids(_history())
    assert ids_match_keys(h).all()
    one_id_two_keys = h.copy()
    one_id_two_keys.loc[1, "leaf_id"] = 3  # (A,S2,c1) given (B,S1,c1)'s id: rows 0, 1 and 5 hold id 3
    assert ids_match_keys(one_id_two_keys).tolist() == [True, False, True, True, True, True]
    one_key_two_ids = h.copy()
    one_key_two_ids.loc[5, "leaf_id"] = 7  # (B,S1,c1) under ids 3 and 7: every row of both ids is named
    assert ids_match_keys(one_key_two_ids).tolist() == [False, True, True, True, True, False]
    parent_off = h.copy()
    parent_off.loc[2, "parent_id"] = 1  # a leaf of (A,S1) under (A,S2)'s parent id
    assert not ids_match_keys(parent_off).iloc[2]


def _corrupted(rng: np.random.Generator, frame: pd.DataFrame) -> pd.DataFrame:
    """`frame` with one cell changed at random: an id set to another row's, or a key cell to another row's."""
    out = frame.copy()
    i, j = rng.integers(0, len(out), size=2)
    column = rng.choice(["leaf_id", "parent_id", "product", "site", "customer"])
    out.iloc[i, out.columns.get_loc(column)] = out.iloc[j][column]
    return out


@pytest.mark.parametrize("order", ["by id", "shuffled", "runs out of id order"])
def test_the_whole_frame_proof_agrees_with_the_row_by_row_check(order):
    """ids_proven (neighbouring rows in id order, the parent on one row per leaf) holds exactly where every row
    passes the row-by-row check (each row against its id's first row), on 400 random one-cell corruptions
    of a history of 12 leaves under 5 parents; ids_match_keys names the same rows either way."""
    rng = np.random.default_rng(15)
    products, sites = np.array(["A", "B", "C"]), np.array(["S1", "S2"])
    h = pd.DataFrame({"product": products[rng.integers(0, 3, 60)], "site": sites[rng.integers(0, 2, 60)],
                      "customer": np.array(["c1", "c2"])[rng.integers(0, 2, 60)], "quantity": 1.0})
    h = add_ids(h).sort_values(["leaf_id"], kind="stable").reset_index(drop=True)
    if order == "shuffled":
        h = h.sample(frac=1.0, random_state=3)
    if order == "runs out of id order":  # each leaf's rows together, the leaves in descending id order
        h = h.iloc[np.argsort(-h["leaf_id"].to_numpy(), kind="stable")]
    assert ids_proven(h) and ids_match_keys(h).all()
    failed = 0
    for _ in range(400):
        bad = _corrupted(rng, h)
        by_row = _ids_match_keys_by_row(bad)
        assert ids_proven(bad) == bool(by_row.all())
        assert ids_match_keys(bad).tolist() == by_row.tolist()
        failed += not by_row.all()
    assert failed > 100  # most corruptions break the match (some copy an equal value)


def test_a_parent_id_that_differs_within_one_leaf_is_not_proven():
    h = add_ids(_history())
    bad = h.copy()
    bad.loc[0, "parent_id"] = 1  # (B,S1,c1) at row 0 under (A,S2)'s parent id; its row 5 keeps 2
    assert not ids_proven(bad)
    # parent id 1 now holds (B,S1) at row 0 and (A,S2) at row 1, and (B,S1) has ids 1 and 2 (row 5): all named
    assert ids_match_keys(bad).tolist() == [False, False, True, True, True, False]
    assert not ids_proven(h.assign(leaf_id=h["leaf_id"] - 1))  # a negative id: the row-by-row check names it


def test_the_history_schema_fails_on_an_id_that_names_another_leaf():
    from pipelines.schemas import LifecycleHistory

    h = add_ids(_history()).assign(
        period_start=pd.Timestamp("2026-01-05"), origin="own", source_product=lambda f: f["product"],
        source_customer=lambda f: f["customer"], shortage=False,
    )
    h["period_start"] = pd.to_datetime(["2026-01-05", "2026-01-05", "2026-01-05", "2026-01-05", "2026-01-12",
                                        "2026-01-12"])
    LifecycleHistory.validate(h, lazy=True)
    h.loc[1, "leaf_id"] = 3
    with pytest.raises(pandera.errors.SchemaErrors, match="ids_match_keys"):
        LifecycleHistory.validate(h, lazy=True)


def test_reconciliation_on_ids_equals_reconciliation_on_text_keys():
    from pipelines.stages.reconciliation import reconcile

    day = pd.Timestamp("2026-01-05")
    parent = pd.DataFrame({"cycle_date": day, "product": ["A", "B"], "site": ["S1", "S1"], "period_start": day,
                           "forecast": [3.0, 0.0], "strategy_forecast": [3.0, 2.0], "zero_reason": [None, "x"],
                           "parent_id": np.array([0, 2], dtype=np.int32)})
    # leaves of (A,S1) sum to 1 + 2 = 3; (C,S1) has leaves and no parent row: kept with its keys, parent blank
    leaf = pd.DataFrame({"cycle_date": day, "product": ["A", "A", "C"], "site": ["S1", "S1", "S1"],
                         "customer": ["c1", "c2", "c1"], "period_start": day, "forecast": [1.0, 2.0, 4.0],
                         "parent_id": np.array([0, 0, 3], dtype=np.int32)})
    on_ids = reconcile(parent, leaf)
    on_text = reconcile(parent.drop(columns="parent_id"), leaf.drop(columns="parent_id"))
    pd.testing.assert_frame_equal(on_ids, on_text)
    assert on_ids["product"].tolist() == ["A", "B", "C"] and on_ids["children_sum"].tolist() == [3.0, 0.0, 4.0]


def test_blank_ids_of_a_partition_stored_before_them_are_not_read():
    # the store widens a table's schema: a partition written before the ids reads them back blank
    h = _history().assign(leaf_id=np.nan, parent_id=np.nan)
    assert coded(h).leaf.tolist() == [3, 2, 1, 0, 1, 3]  # coded from the text keys instead
    table = pd.DataFrame({"product": ["A"], "site": ["S2"], "customer": ["c1"], "leaf_id": [2], "parent_id": [1]})
    assert rows_in(h, table, LEAF).tolist() == [-1, 0, -1, -1, -1, -1]


def test_week_ordinals_count_weeks_from_a_monday_as_python_dates_do():
    """period_ordinal (nanoseconds floor-divided by a week) against Python's own date arithmetic (reference:
    the standard library's `datetime.date`): whole weeks since Monday 1969-12-29, floored, for dates before and
    after it and at any time of day; a frame with a blank date takes the day-by-day path and agrees too."""
    import datetime as dt

    from pipelines.calendar import period_ordinal

    rng = np.random.default_rng(15)
    stamps = pd.to_datetime(rng.integers(-2 * 10**18, 3 * 10**18, 2000))  # 1906 to 2065, any time of day
    monday = dt.date(1969, 12, 29)
    expected = [(t.date() - monday).days // 7 for t in stamps]
    assert period_ordinal(pd.Series(stamps), "week").tolist() == expected
    with_blank = pd.Series(list(stamps[:5]) + [pd.NaT])
    assert period_ordinal(with_blank, "week")[:5].tolist() == expected[:5]


def test_packed_codes_are_equal_exactly_where_every_columns_code_is():
    rng = np.random.default_rng(3)
    parts = [rng.integers(0, size, 2_000) for size in (7, 300, 2)]
    packed = pack_codes(parts, [7, 300, 2])
    tuples = pd.factorize(pd.MultiIndex.from_arrays(parts))[0]
    assert (pd.factorize(packed)[0] == tuples).all()  # one code per distinct tuple, in the same order
    assert pack_codes(parts, [2**31, 2**31, 2]) is None  # past 62 bits: the caller groups another way
    assert pack_codes([np.zeros(3, np.int64)], [2**61]) is not None



def test_keys_of_sorted_ids_with_a_gap_are_those_of_the_same_rows_unsorted():
    # rows sorted by id (as the lifecycle stage writes them, found by bisection) and the same rows shuffled (found
    # by a drop of repeats) name the same key for every id; id 2, held by no row, gets empty text
    h = pd.DataFrame({"product": list("AAABBBD"), "site": ["S1"] * 7, "customer": ["c1", "c1", "c2", "c1", "c1", "c3",
                                                                                  "c9"]})
    h[LEAF_ID] = np.array([0, 0, 1, 3, 3, 4, 6], dtype=np.int32)
    h[PARENT_ID] = np.array([0, 0, 0, 1, 1, 1, 2], dtype=np.int32)
    by_runs = coded(h).leaves
    shuffled = coded(h.iloc[[5, 0, 6, 3, 2, 4, 1]].reset_index(drop=True)).leaves
    pd.testing.assert_frame_equal(by_runs, shuffled)
    assert by_runs["customer"].tolist() == ["c1", "c2", "", "c1", "c3", "", "c9"]
    assert by_runs["product"].tolist() == ["A", "A", "", "B", "B", "", "D"]
