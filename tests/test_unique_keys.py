"""The unique-key check on integers (pipelines/unique_keys.py) against pandas' own `DataFrame.duplicated`.

The reference is pandas (`DataFrame.duplicated` over the text key, what
pandera's own check calls): `key_unique` may only answer True where pandas
finds no duplicate, and on a table whose ids match its keys it must answer
exactly as pandas does.
"""

import numpy as np
import pandas as pd
import pandera.errors
import pytest

from pipelines.keys import add_ids
from pipelines.unique_keys import key_unique

KEY = ["product", "site", "customer", "period_start", "origin"]


def _history(rng: np.random.Generator, rows: int) -> pd.DataFrame:
    """Random leaves x weeks x origin (duplicates likely), ids added, sorted by leaf, period and origin."""
    frame = pd.DataFrame(
        {
            "product": np.array(["A", "B", "C"])[rng.integers(0, 3, rows)],
            "site": np.array(["S1", "S2"])[rng.integers(0, 2, rows)],
            "customer": np.array(["c1", "c2", "c3"])[rng.integers(0, 3, rows)],
            "period_start": pd.Timestamp("2026-01-05") + pd.to_timedelta(7 * rng.integers(0, 6, rows), unit="D"),
            "origin": np.array(["own", "successor"])[rng.integers(0, 2, rows)],
        }
    )
    return add_ids(frame).sort_values(["leaf_id", "period_start", "origin"], kind="stable").reset_index(drop=True)


@pytest.mark.parametrize("order", ["sorted", "shuffled", "runs out of id order"])
def test_key_unique_answers_as_pandas_duplicated_where_the_ids_match(order):
    """`runs out of id order`: each leaf's rows together and sorted, the leaves in descending id order (as late
    ids of children without history sit among the others), with a leaf's run split in two now and then."""
    rng = np.random.default_rng(15)
    unique_seen = duplicated_seen = 0
    for rows in [2, 5, 20, 40, 80] * 40:
        frame = _history(rng, rows).drop_duplicates(KEY) if rng.random() < 0.5 else _history(rng, rows)
        if order == "shuffled":
            frame = frame.sample(frac=1.0, random_state=int(rng.integers(1 << 30)))
        if order == "runs out of id order":
            frame = frame.iloc[np.argsort(-frame["leaf_id"].to_numpy(), kind="stable")]
            if rng.random() < 0.3:  # one row moved to the end: its leaf in two runs
                at = int(rng.integers(0, len(frame)))
                frame = pd.concat([frame.drop(frame.index[at]), frame.iloc[[at]]])
        expected = not frame.duplicated(KEY).any()
        assert key_unique(frame, KEY) == expected
        unique_seen += expected
        duplicated_seen += not expected
    assert unique_seen > 40 and duplicated_seen > 40  # both outcomes were tried


def test_key_unique_is_never_true_on_a_duplicate_even_with_ids_that_do_not_match():
    rng = np.random.default_rng(16)
    for _ in range(200):
        frame = _history(rng, 30).drop_duplicates(KEY).reset_index(drop=True)
        i, j = rng.integers(0, len(frame), size=2)
        bad = frame.copy()
        column = rng.choice(["leaf_id", "parent_id", "customer", "origin", "period_start"])
        bad.iloc[i, bad.columns.get_loc(column)] = bad.iloc[j][column]
        if bad.duplicated(KEY).any():
            assert not key_unique(bad, KEY)
    # ids that hide a duplicate: two rows of one text key under two leaf ids are not unique for the key
    frame = _history(rng, 30).drop_duplicates(KEY).reset_index(drop=True)
    twin = pd.concat([frame, frame.iloc[[0]].assign(leaf_id=frame["leaf_id"].max() + 1)], ignore_index=True)
    assert not key_unique(twin, KEY)


@pytest.mark.parametrize("order", ["by leaf run", "shuffled"])
def test_without_ids_key_unique_answers_as_pandas_or_leaves_it_to_pandera(order):
    """No ids: a table grouped by its text key (each leaf's rows together, periods rising) is proven unique exactly
    where pandas finds no duplicate; in another order nothing is proven (pandera's own check decides)."""
    rng = np.random.default_rng(17)
    proven = refused = 0
    for rows in [3, 10, 30, 60] * 50:
        frame = _history(rng, rows).drop(columns=["leaf_id", "parent_id"])
        if rng.random() < 0.5:
            frame = frame.drop_duplicates(KEY)
        leaf_order = pd.Series(rng.permutation(20)[:18]).to_numpy()  # runs of leaves in any order of the leaves
        rank = frame.groupby(["product", "site", "customer"]).ngroup().map(dict(enumerate(leaf_order)))
        frame = frame.assign(rank=rank).sort_values(["rank", "origin", "period_start"], kind="stable").drop(
            columns="rank")
        if order == "shuffled":
            frame = frame.sample(frac=1.0, random_state=int(rng.integers(1 << 30)))
        expected = not frame.duplicated(KEY).any()
        answer = key_unique(frame, KEY)
        assert not answer or expected  # never unique where pandas finds a duplicate
        if order == "by leaf run":
            assert answer == expected
        proven += answer
        refused += expected and not answer
    assert proven > 40
    assert order == "by leaf run" or refused > 40


def test_runs_of_a_key_split_in_two_are_a_duplicate():
    """A leaf's rows in two runs, a period in both: the runs' keys are equal, so not proven (nor unique)."""
    frame = pd.DataFrame({"product": ["A", "A", "B", "A"], "site": "S1", "customer": "c1", "origin": "own",
                          "period_start": pd.to_datetime(["2026-01-05", "2026-01-12", "2026-01-05", "2026-01-12"])})
    assert frame.duplicated(KEY).any() and not key_unique(frame, KEY)
    assert key_unique(frame.iloc[:3], KEY)  # rows 0-2: runs (A: two periods rising), (B: one)


def _lifecycle(rows: int = 40) -> pd.DataFrame:
    frame = _history(np.random.default_rng(7), rows).drop_duplicates(KEY).reset_index(drop=True)
    return frame.assign(
        quantity=1.0, source_product=frame["product"], source_customer=frame["customer"], shortage=False
    )[["product", "site", "customer", "period_start", "quantity", "origin", "source_product", "source_customer",
       "shortage", "leaf_id", "parent_id"]].astype({"leaf_id": np.int32, "parent_id": np.int32})


@pytest.mark.parametrize("where", ["next to it", "at the end"])
def test_a_duplicated_history_row_fails_the_schema_naming_both_rows(where):
    """A row of lifecycle_history repeated (ids and all): the integer proof finds the pair, pandera's own
    check names it, as `LifecycleHistory.validate` (pandera's model) does."""
    from pipelines.schemas import LifecycleHistory
    from pipelines.text_dtype import validate_table

    frame = _lifecycle()
    validate_table(LifecycleHistory, frame)
    copy = frame.iloc[[5]]
    if where == "next to it":
        bad = pd.concat([frame.iloc[:6], copy, frame.iloc[6:]], ignore_index=True)  # rows 5 and 6
        named = {5, 6}
    else:
        bad = pd.concat([frame, copy], ignore_index=True)  # rows 5 and the last
        named = {5, len(frame)}
    with pytest.raises(pandera.errors.SchemaErrors) as err:
        validate_table(LifecycleHistory, bad)
    cases = err.value.failure_cases
    assert set(cases.loc[cases["check"] == "multiple_fields_uniqueness", "index"].astype(int)) == named


def test_a_repeated_column_name_is_left_to_pandera():
    frame = _lifecycle(10)
    twice = pd.concat([frame, frame[["customer"]]], axis=1)  # two columns named customer
    assert not key_unique(twice, KEY)
