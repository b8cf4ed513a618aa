"""Integer coding of key columns, so group sums run on integers not strings."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from pipelines.cell_runs import text_changes
from pipelines.text_codes import RUNS_SHARE, addresses, codes_of, run_starts

LEAF = ["product", "site", "customer"]
PARENT = ["product", "site"]


def factorize(df: pd.DataFrame, cols: list[str]) -> tuple[np.ndarray, pd.DataFrame]:
    """Dense int64 codes 0..n-1 for the distinct tuples of `cols`, and those tuples.

    `uniques.iloc[code]` gives back the key of a row; codes follow first appearance.
    """
    if len(cols) == 1:
        codes, uniques = codes_of(df[cols[0]])
        return codes, pd.DataFrame({cols[0]: uniques})
    if len(df) >= 1024 and all(df[c].dtype == object for c in cols):  # rows in runs of one key: the runs coded
        starts = run_starts([df[c].to_numpy() for c in cols])
        if len(starts) * RUNS_SHARE <= len(df):
            codes, uniques = factorize(pd.DataFrame({c: df[c].to_numpy()[starts] for c in cols}), cols)  # no copy
            return np.repeat(codes, np.diff(np.append(starts, len(df)))), uniques
    coded_cols = [codes_of(df[c]) for c in cols]
    combined = pack_codes([k for k, _ in coded_cols], [len(u) for _, u in coded_cols])
    if combined is None:  # cannot pack: fall back to pandas' own grouping
        codes = df.groupby(cols, sort=False, dropna=False).ngroup().to_numpy(np.int64)
        first = first_rows(codes)
        return codes, df[cols].iloc[first].reset_index(drop=True)
    codes = pd.factorize(combined)[0].astype(np.int64)
    first = first_rows(codes)
    return codes, df[cols].iloc[first].reset_index(drop=True)


def any_blank(column: pd.Series) -> bool:
    """`column.isna().any()`, an object column judged at the starts of its runs of one cell object only (a run
    holds one object: blank on every row or on none), as a leaf's keys repeat over its periods."""
    values = column.to_numpy()
    if values.dtype != object or len(values) < 1024:
        return bool(column.isna().any())
    where = addresses(values)
    return bool(pd.isna(values[np.flatnonzero(np.r_[True, where[1:] != where[:-1]])]).any())


def first_rows(codes: np.ndarray) -> np.ndarray:
    """Position of the first row holding each code, for codes numbered by first appearance.

    A hash-based drop of repeats: about 8x faster than np.unique(..., return_index=True),
    which sorts, on millions of rows.
    """
    return pd.Series(codes).drop_duplicates().index.to_numpy()


def joint_codes(left: pd.DataFrame, right: pd.DataFrame, cols: list[str]) -> tuple[np.ndarray, np.ndarray] | None:
    """Int64 codes of the `cols` tuples of `left` and of `right`, equal exactly where the tuples are equal.

    Each column is coded once over both frames by hashing (pd.factorize: no
    sort, unlike a MultiIndex, which sorts every level) and the codes are
    packed into one integer. None when the packed codes would not fit in 62 bits.
    """
    n = len(left)
    coded_cols = [pd.factorize(pd.concat([left[c], right[c]], ignore_index=True), use_na_sentinel=False) for c in cols]
    combined = pack_codes([k for k, _ in coded_cols], [len(u) for _, u in coded_cols])
    return None if combined is None else (combined[:n], combined[n:])


def pack_codes(codes: list[np.ndarray], sizes: list[int]) -> np.ndarray | None:
    """One int64 per row from each column's integer codes (`codes[i]` below `sizes[i]`): equal exactly where
    every column's code is. None when the packed codes would not fit in 62 bits (the caller groups otherwise)."""
    if math.prod(max(int(size), 1) for size in sizes) >= 2**62:
        return None
    combined = np.zeros(len(codes[0]) if codes else 0, dtype=np.int64)
    for k, size in zip(codes, sizes, strict=True):
        combined = combined * max(size, 1) + k
    return combined


def lookup(df: pd.DataFrame, cols: list[str], table: pd.DataFrame) -> np.ndarray:
    """Row position in `table` of each row's key in `df` (-1 where absent)."""
    left = pd.MultiIndex.from_frame(df[cols]) if len(cols) > 1 else pd.Index(df[cols[0]])
    right = pd.MultiIndex.from_frame(table[cols]) if len(cols) > 1 else pd.Index(table[cols[0]])
    return right.get_indexer(left)


# ------------------------------------------------------------------ integer ids carried between the stages
LEAF_ID, PARENT_ID = "leaf_id", "parent_id"
ID_DTYPE = np.int32


def key_ids(frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(leaf_id, parent_id) of every row: the rank of its leaf key and of its parent key among the frame's
    distinct keys, in key order (product, then site, then customer, as text), int32.

    The lifecycle stage assigns them once to its history; the later stages group and join on them and
    touch the text keys only at the edges (`coded`, the output columns). Ids in key order make a frame
    sorted by leaf key sorted by leaf_id, and the parent of a run of leaf ids one run of parent ids.
    """
    if frame.empty:
        return np.zeros(0, ID_DTYPE), np.zeros(0, ID_DTYPE)
    code, leaves = factorize(frame, LEAF)
    leaf_rank, parent_of_rank = _ranks(leaves)
    return leaf_rank[code].astype(ID_DTYPE), parent_of_rank[leaf_rank[code]].astype(ID_DTYPE)


def _ranks(leaves: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(rank of each distinct leaf in key order, parent rank of each leaf rank)."""
    ordered = leaves.sort_values(LEAF, kind="stable")
    rank = np.empty(len(leaves), dtype=np.int64)
    rank[ordered.index.to_numpy()] = np.arange(len(leaves))
    product, site = ordered["product"].to_numpy(object), ordered["site"].to_numpy(object)
    new_parent = np.ones(len(leaves), dtype=bool)
    new_parent[1:] = (product[1:] != product[:-1]) | (site[1:] != site[:-1])
    return rank, np.cumsum(new_parent) - 1


def extend_ids(
    children: pd.DataFrame, history: pd.DataFrame, keys: Coded | None = None, leaf: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """(leaf_id, parent_id) of each row of `children` (leaf keys): the history's ids where its leaf or parent
    has history, else new ids after the history's, in key order (a new customer, a parent with no history).

    The share table carries them; the stages after it read its ids. keys: `coded(history)`, leaf: each child's
    row in `keys.leaves` (-1: none), when the caller has them.
    """
    c = keys if keys is not None else coded(history)
    leaf = lookup(children, LEAF, c.leaves) if leaf is None else np.array(leaf, dtype=np.int64)
    parent = lookup(children, PARENT, c.parents)
    for ids, cols, base in ((leaf, LEAF, len(c.leaves)), (parent, PARENT, len(c.parents))):
        new = np.flatnonzero(ids < 0)
        if len(new):
            code, keys = factorize(children.iloc[new], cols)
            order = keys.sort_values(cols, kind="stable").index.to_numpy()
            rank = np.empty(len(keys), dtype=np.int64)
            rank[order] = np.arange(len(keys))
            ids[new] = base + rank[code]
    return leaf.astype(ID_DTYPE), parent.astype(ID_DTYPE)


class Coded:
    """A frame's leaf and parent ids (from its `leaf_id` / `parent_id` columns, or coded from its text keys
    when it has none), and the text key of every id: the one place the stages go from ids to keys.

    `leaf_rows(table)` / `parent_rows(table)`: the position in `table` (a small frame of keys, e.g. the
    share table) of each row's leaf / parent, -1 where absent, found by looking up the distinct keys only.
    """

    def __init__(self, frame: pd.DataFrame):
        if len(ids_in(frame)) == 2:  # the ids as stored: widened to int64 only when `leaf` / `parent` is read
            self._leaf, self._parent = frame[LEAF_ID].to_numpy(), frame[PARENT_ID].to_numpy()
            if self._leaf.dtype.kind not in "iu":
                self._leaf = self._leaf.astype(np.int64)
        else:
            self._leaf, self._parent = row_ids(frame)
        self.leaves = _keys_of_ids(frame, self._leaf, LEAF)
        self.parents = _keys_of_ids(frame, self._parent, PARENT)

    @property
    def leaf(self) -> np.ndarray:
        """Each row's leaf id, int64 (as `row_ids` gives it)."""
        if self._leaf.dtype != np.int64:
            self._leaf = self._leaf.astype(np.int64)
        return self._leaf

    @property
    def leaf_ids(self) -> np.ndarray:
        """Each row's leaf id as the frame holds it (int32 from the lifecycle stage: no copy of every row)."""
        return self._leaf

    @property
    def parent(self) -> np.ndarray:
        """Each row's parent id, int64 (as `row_ids` gives it)."""
        if self._parent.dtype != np.int64:
            self._parent = self._parent.astype(np.int64)
        return self._parent

    def leaf_rows(self, table: pd.DataFrame) -> np.ndarray:
        return lookup(self.leaves, LEAF, table)[self._leaf] if len(self._leaf) else np.zeros(0, np.int64)

    def parent_rows(self, table: pd.DataFrame) -> np.ndarray:
        return lookup(self.parents, PARENT, table)[self.parent] if len(self.parent) else np.zeros(0, np.int64)


def coded(frame: pd.DataFrame) -> Coded:
    return Coded(frame)


def _keys_of_ids(frame: pd.DataFrame, ids: np.ndarray, cols: list[str]) -> pd.DataFrame:
    """The `cols` key of ids 0..max (rows of `frame`; an id no row holds gets the keys of none: empty text)."""
    n = int(ids.max()) + 1 if len(ids) else 0
    if len(ids) > 1 and bool(np.all(ids[1:] >= ids[:-1])):  # sorted by id: each id's first row, by bisection
        first = np.searchsorted(ids, np.arange(n, dtype=ids.dtype))  # in the ids' own type: no widened copy
        held = np.flatnonzero(ids[np.minimum(first, len(ids) - 1)] == np.arange(n))
        first = first[held]
    else:  # each id's first row starts a run of one id: only the runs' first rows are looked at (a forecast
        # table's ids come in runs of its horizon), in row order, so the same rows as over every row
        starts = np.flatnonzero(np.r_[True, ids[1:] != ids[:-1]]) if len(ids) else np.zeros(0, np.int64)
        unique = pd.Series(ids[starts]).drop_duplicates()
        first, held = starts[unique.index.to_numpy()], unique.to_numpy()
    out = {}
    for c in cols:  # column by column: `frame[cols]` would copy every row first
        values = np.full(n, "", dtype=object)
        values[held] = frame[c].to_numpy(object)[first]
        out[c] = values
    return pd.DataFrame(out)


def add_ids(frame: pd.DataFrame) -> pd.DataFrame:
    """`frame` (a stage's own new frame) with its `leaf_id` and `parent_id` columns set by `key_ids`, in place."""
    frame[LEAF_ID], frame[PARENT_ID] = key_ids(frame)
    return frame


def ids_match_keys(frame: pd.DataFrame) -> pd.Series:
    """Per row: its leaf_id is held by no other leaf key and its key by no other leaf_id, and the same for
    parent_id and the parent key (product, site). Rows of a frame without the id columns pass.

    Proven for the whole frame at once where it holds (`ids_proven`); only a frame where that proof fails is
    judged row by row, so the rows named are the same.
    """
    if ids_proven(frame):
        return pd.Series(True, index=frame.index)
    return _ids_match_keys_by_row(frame)


def ids_proven(frame: pd.DataFrame) -> bool:
    """True when every row passes `ids_match_keys`, decided by comparing neighbouring rows in id order (no
    gather when the frame is sorted by id, as the stages write it); False when not proven.

    Per id: the rows of one id hold one key, and the ids' first rows hold distinct keys. With both ids the
    parent's part is proven on one row per leaf: every row of a leaf holds the parent_id of the leaf's first
    row, and those first rows pass the parent check (a row's parent key is part of its leaf key, which its
    leaf's first row holds too). A frame whose ids are blank, negative or not integers is not proven here.
    """
    present = [c for c in (LEAF_ID, PARENT_ID) if c in frame.columns]
    if frame.empty or not present:
        return True
    if frame.columns.has_duplicates or any(frame[c].dtype.kind not in "iu" for c in present):
        return False
    parent = frame[PARENT_ID].to_numpy() if PARENT_ID in present else None  # as stored (int32): no copy
    if LEAF_ID not in present:
        return _first_rows_if_one_key(parent, [frame[c].to_numpy(object) for c in PARENT]) is not None
    constant = [] if parent is None else [parent]
    first = _first_rows_if_one_key(frame[LEAF_ID].to_numpy(), [frame[c].to_numpy(object) for c in LEAF], constant)
    if first is None or parent is None:
        return first is not None
    return _first_rows_if_one_key(parent[first], [frame[c].to_numpy(object)[first] for c in PARENT]) is not None


def _first_rows_if_one_key(ids: np.ndarray, keys: list[np.ndarray], constant: list[np.ndarray] = ()):
    """Positions of each id's first row (in id order) when the rows of each id hold one key (the `keys` arrays,
    and the `constant` ones too) and no two ids hold the same key; None otherwise (or when an id is negative).

    Judged on the runs of one id in row order: along each run the key holds (the key changes only where the id
    does), then on one row per run, sorted by id when the runs are not in ascending id order (a table whose
    late ids, given to children without history, sit among the others in key order): the runs of one id hold
    one key. Only the runs' first rows are gathered and sorted, never every row."""
    if not len(ids):
        return np.zeros(0, np.int64)
    if ids.min() < 0:
        return None
    new = np.r_[True, ids[1:] != ids[:-1]]
    for values in [*keys, *constant]:
        if values.dtype == object:  # where the key changes, a new id starts
            if not bool(new[text_changes(values)].all()):
                return None
        elif not bool(np.all((values[1:] == values[:-1]) | new[1:])):
            return None
    first = np.flatnonzero(new)
    run_ids = ids[first]
    if not bool(np.all(run_ids[1:] > run_ids[:-1])):  # an id in several runs, or the runs out of id order
        at = first[np.argsort(run_ids, kind="stable")]
        starts = np.r_[True, ids[at][1:] != ids[at][:-1]]
        for values in [*keys, *constant]:
            values = values[at]
            if values.dtype == object:
                if not bool(starts[text_changes(values)].all()):
                    return None
            elif not bool(np.all((values[1:] == values[:-1]) | starts[1:])):
                return None
        first = at[starts]
    if pd.DataFrame({i: values[first] for i, values in enumerate(keys)}).duplicated().any():
        return None
    return first


def _ids_match_keys_by_row(frame: pd.DataFrame) -> pd.Series:
    """`ids_match_keys` judged row by row (each row against its id's first row): the rows that fail named."""
    ok = np.ones(len(frame), dtype=bool)
    for id_col, cols in ((LEAF_ID, LEAF), (PARENT_ID, PARENT)):
        if id_col not in frame.columns or frame.empty:
            continue
        ids = frame[id_col].to_numpy(np.int64)
        unique = pd.Series(ids).drop_duplicates()
        first = np.zeros(int(ids.max()) + 1 if ids.min() >= 0 else 1, dtype=np.int64)
        if ids.min() < 0:
            return pd.Series(ids >= 0, index=frame.index)  # the column's own check names these rows
        first[unique.to_numpy()] = unique.index.to_numpy()
        same = np.ones(len(frame), dtype=bool)
        for c in cols:  # one key per id: every row holds the key of its id's first row
            values = frame[c].to_numpy(object)
            same &= values == values[first[ids]]
        keys = frame[cols].iloc[unique.index.to_numpy()]
        shared = keys.duplicated(keep=False).to_numpy()  # one id per key: two ids' first rows never share a key
        bad_ids = unique.to_numpy()[shared]
        ok &= same & ~np.isin(ids, bad_ids)
    return pd.Series(ok, index=frame.index)


def row_ids(frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(leaf_id, parent_id) of every row as int64: its id columns, or `key_ids` of its text keys without them."""
    if len(ids_in(frame)) == 2:
        return frame[LEAF_ID].to_numpy(np.int64), frame[PARENT_ID].to_numpy(np.int64)
    leaf, parent = key_ids(frame)
    return leaf.astype(np.int64), parent.astype(np.int64)


def rows_in(frame: pd.DataFrame, table: pd.DataFrame, cols: list[str] = LEAF) -> np.ndarray:
    """Row position in `table` of each row's key in `frame` (-1 where absent), like `lookup`, but through the
    integer id of the key (`leaf_id` for the leaf key, `parent_id` for the parent key) when both frames carry it.
    `table` holds each id at most once.
    """
    id_col = {tuple(LEAF): LEAF_ID, tuple(PARENT): PARENT_ID}.get(tuple(cols))
    if id_col is None or not ids_in(frame, (id_col,)):
        return lookup(frame, cols, table)
    ids = frame[id_col].to_numpy(np.int64)
    if not ids_in(table, (id_col,)):  # the distinct keys of `frame` looked up, then spread to its rows by id
        return lookup(_keys_of_ids(frame, ids, cols), cols, table)[ids] if len(ids) else np.zeros(0, np.int64)
    held = table[id_col].to_numpy(np.int64)
    if not len(ids) or not len(held):
        return np.full(len(ids), -1, dtype=np.int64)
    pos = np.full(max(int(ids.max()), int(held.max())) + 1, -1, dtype=np.int64)
    pos[held] = np.arange(len(held))
    return pos[ids]


def part_rows(frame: pd.DataFrame, cols: list[str], table: pd.DataFrame) -> np.ndarray:
    """Row position in `table` of each row's `cols` key, a part of its leaf key (e.g. the product), -1 where
    absent: like `lookup`, but through the frame's `leaf_id` (else `parent_id`), looking up each id's key once."""
    id_col = next((c for c in (LEAF_ID, PARENT_ID) if ids_in(frame, (c,))), None)
    if id_col is None or not len(frame):
        return lookup(frame, cols, table)
    ids = frame[id_col].to_numpy(np.int64)
    return lookup(_keys_of_ids(frame, ids, cols), cols, table)[ids]


def key_rank(frame: pd.DataFrame, cols: list[str] = LEAF) -> np.ndarray:
    """Per row, a rank of its `cols` key (LEAF or PARENT) in text order (not dense): sorting or
    grouping by it orders rows as the text keys would, but sorts the distinct keys only (through the rows' ids;
    ids given after the history's, to children without history, need not follow the key order themselves).
    """
    id_col = LEAF_ID if cols == LEAF else PARENT_ID
    if not ids_in(frame, (id_col,)):
        return factorize_sorted(frame, cols)
    ids = frame[id_col].to_numpy(np.int64)
    if not len(ids):
        return ids
    keys = _keys_of_ids(frame, ids, cols)
    rank = np.empty(len(keys), dtype=np.int64)
    rank[keys.sort_values(cols, kind="stable").index.to_numpy()] = np.arange(len(keys))
    return rank[ids]


def factorize_sorted(frame: pd.DataFrame, cols: list[str]) -> np.ndarray:
    """Per row, the rank of its `cols` key in text order (coded from the text keys)."""
    code, keys = factorize(frame, cols)
    rank = np.empty(len(keys), dtype=np.int64)
    rank[keys.sort_values(cols, kind="stable").index.to_numpy()] = np.arange(len(keys))
    return rank[code]


def ids_in(frame: pd.DataFrame, wanted: tuple[str, ...] = (LEAF_ID, PARENT_ID)) -> list[str]:
    """The id columns of `wanted` that `frame` carries whole (a frame made before the ids, or by hand, has none;
    a partition stored before them, read under the table's widened schema, has them blank: not carried)."""
    return [c for c in wanted if c in frame.columns and not frame[c].isna().any()]
