"""The share engine's compiled passes over the history (`pipelines.engines.share_rows`) and its per-period
split against plain numpy.

References: a week's ordinal by numpy's floor division of the nanoseconds since the epoch Monday (what
`calendar.period_ordinal` computes); a sum per leaf by `np.bincount` with weights over the rows kept, which
adds each bin's values in row order from 0.0 (numpy's documented `bincount`: out[x[i]] += w[i]). Every
comparison is to the bit (float64 viewed as int64), on data where another order of addition or a window one
period off gives other bits (asserted too, so the comparisons can fail).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipelines.calendar import EPOCH_MONDAY_NS, WEEK_NS, period_ordinal
from pipelines.engines.children import _run_periods
from pipelines.engines.hierarchy import parent_sums
from pipelines.engines.lifecycle_shares import counts_by, split_shares
from pipelines.engines.period_shares import share_steps
from pipelines.engines.proofs import key_sums
from pipelines.engines.share_rows import (
    ShareRows,
    _run_window_sums,
    _week_ages,
    _week_runs,
    bin_window_volumes,
    child_sums,
    period_ages,
    period_sums,
)
from pipelines.vocabulary import NEW_CUSTOMER_RULES

CYCLE_ORD = 2970


def bits(values: np.ndarray) -> np.ndarray:
    return np.asarray(values, dtype=np.float64).view(np.int64)


def history(seed: int, n_leaves: int = 60, sort: bool = True):
    """Random rows: leaf runs of consecutive weeks with gaps and a repeated week, quantities of mixed scale with
    a NaN, a -0.0 and cents, a few shortage rows; rows sorted by leaf id (and period) or shuffled."""
    rng = np.random.default_rng(seed)
    leaf, week = [], []
    for leaf_id in range(n_leaves):
        n = int(rng.integers(0, 40))
        start = CYCLE_ORD - int(rng.integers(1, 80))
        weeks = start + np.cumsum(rng.choice([1, 1, 1, 2, 5, 0], size=n))  # gaps and a repeated week
        leaf += [leaf_id] * n
        week += weeks.tolist()
    leaf, week = np.array(leaf, dtype=np.int32), np.array(week, dtype=np.int64)
    qty = np.round(rng.lognormal(2, 2, len(leaf)), 2) * rng.choice([1.0, 1e-3, 1e6], len(leaf))
    qty[rng.integers(0, len(qty), 3)] = [np.nan, -0.0, 0.1]
    ns = EPOCH_MONDAY_NS + (week - 0) * WEEK_NS + rng.choice([0, 86_400 * 10**9 * 3], len(week))  # some mid-week
    if not sort:
        order = rng.permutation(len(leaf))
        leaf, ns, qty = leaf[order], ns[order], qty[order]
    return leaf, ns, qty


def reference_ages(ns: np.ndarray) -> np.ndarray:
    return CYCLE_ORD - (ns - EPOCH_MONDAY_NS) // WEEK_NS


def share_rows(leaf, ns, qty, n_leaves, short=None, sort=True) -> ShareRows:
    age = period_ages(pd.Series(ns.astype("datetime64[ns]")), "week", CYCLE_ORD)
    counts = age >= 1
    if short is not None:
        counts &= ~short
    first = np.searchsorted(leaf, np.arange(n_leaves + 1, dtype=leaf.dtype)) if sort else None
    return ShareRows(leaf, age, qty, counts, n_leaves, True, first)


@pytest.mark.parametrize("seed", range(4))
def test_week_ages_are_the_week_ordinals_floor_division(seed):
    _, ns, _ = history(seed)
    ns = np.concatenate([ns, [EPOCH_MONDAY_NS - 1, EPOCH_MONDAY_NS - WEEK_NS, EPOCH_MONDAY_NS - 1 + WEEK_NS]])
    age = period_ages(pd.Series(ns.astype("datetime64[ns]")), "week", CYCLE_ORD)
    assert age.dtype == np.int32
    assert np.array_equal(age, reference_ages(ns))
    assert np.array_equal(age, CYCLE_ORD - period_ordinal(pd.Series(ns.astype("datetime64[ns]")), "week"))


def test_week_ages_take_the_row_before_only_one_week_apart():
    # a step of one week is one period; a step of 6 days from a Sunday crosses one week boundary, so the
    # kernel's shortcut must not fire for it (a kernel reading "less than a week: same age - 1" would fail)
    sunday = EPOCH_MONDAY_NS + 6 * 86_400 * 10**9
    ns = np.array([EPOCH_MONDAY_NS, EPOCH_MONDAY_NS + WEEK_NS, sunday + WEEK_NS, sunday + WEEK_NS + 6 * 86_400 * 10**9])
    out = np.empty(len(ns), np.int32)
    assert _week_ages(ns, CYCLE_ORD, out)
    assert out.tolist() == reference_ages(ns).tolist() == [CYCLE_ORD, CYCLE_ORD - 1, CYCLE_ORD - 1, CYCLE_ORD - 2]


def test_week_ages_with_a_missing_date_take_the_general_path():
    ns = pd.Series(pd.to_datetime(["2026-11-23", None, "2026-11-09"]))
    out = np.empty(3, np.int32)
    assert not _week_ages(ns.to_numpy().view(np.int64), CYCLE_ORD, out)
    age = period_ages(ns, "week", CYCLE_ORD)
    expected = CYCLE_ORD - period_ordinal(ns, "week")
    assert np.array_equal(age, expected, equal_nan=True)


def reference_child_sums(rows: ShareRows, leaves, window, leaf_of_child):
    window = np.broadcast_to(np.asarray(window), (rows.n_leaves,)) if np.ndim(window) == 0 else window
    keep = rows.counts & (rows.age <= window[rows.leaf])
    if leaves is not None:
        keep &= leaves[rows.leaf]
    per_leaf = np.append(np.bincount(rows.leaf[keep], weights=rows.qty[keep], minlength=rows.n_leaves), 0.0)
    return per_leaf[leaf_of_child]


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("sort", [True, False])
def test_child_sums_are_bincounts_sums_to_the_bit(seed, sort):
    n_leaves = 60
    leaf, ns, qty = history(seed, n_leaves, sort)
    rng = np.random.default_rng(100 + seed)
    rows = share_rows(leaf, ns, qty, n_leaves, short=rng.random(len(leaf)) < 0.05, sort=sort)
    leaf_of_child = np.append(rng.permutation(n_leaves)[:50], [-1, -1])  # two children without history
    per_leaf_window = rng.choice([0, 4, 13, 26, 52], n_leaves).astype(np.int32)
    open_leaves = rng.random(n_leaves) < 0.4
    for leaves, window in ((None, per_leaf_window), (open_leaves, 26), (None, 13), (open_leaves, per_leaf_window)):
        got = child_sums(rows, leaves, window, leaf_of_child)
        assert np.array_equal(bits(got), bits(reference_child_sums(rows, leaves, window, leaf_of_child)))


def test_the_sums_comparison_can_fail():
    # the data tell a row-order sum from a reversed one and a window one period longer, so a kernel that
    # summed in another order or compared age < window + 1 wrongly would not pass the test above
    leaf, ns, qty = history(3, 60)
    rows = share_rows(leaf, ns, qty, 60)
    window = np.full(60, 52, np.int32)
    forward = _run_window_sums(rows.first, np.arange(60), rows.age, rows.qty, rows.counts, window, 60)
    backward = np.zeros(61)
    for i in range(len(leaf) - 1, -1, -1):  # the same rows, last to first
        if rows.counts[i] and rows.age[i] <= 52:
            backward[leaf[i]] += qty[i]
    assert np.allclose(forward, backward, rtol=1e-12, equal_nan=True)  # the same sums but for rounding...
    assert not np.array_equal(bits(forward), bits(backward))  # ...but not the same bits
    longer = _run_window_sums(rows.first, np.arange(60), rows.age, rows.qty, rows.counts, window + 1, 60)
    assert not np.array_equal(bits(forward), bits(longer))


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("sort", [True, False])
def test_period_sums_are_bincounts_cells_to_the_bit(seed, sort):
    n_leaves, window = 60, 26
    leaf, ns, qty = history(seed, n_leaves, sort)
    rng = np.random.default_rng(200 + seed)
    rows = share_rows(leaf, ns, qty, n_leaves, short=rng.random(len(leaf)) < 0.05, sort=sort)
    member_leaves = rng.permutation(n_leaves)[:25]
    member_of_leaf = np.full(n_leaves, -1, np.int64)
    member_of_leaf[member_leaves] = rng.permutation(25)
    got = period_sums(rows, member_of_leaf, window, 25)
    # reference: the rows that count inside the window, member x age cells summed by bincount in row order
    m = member_of_leaf[rows.leaf]
    keep = (m >= 0) & rows.counts & (rows.age >= 1) & (rows.age <= window)
    cell = m[keep] * window + (rows.age[keep].astype(np.int64) - 1)
    expected = np.bincount(cell, weights=rows.qty[keep], minlength=25 * window).reshape(25, window)
    assert got.shape == (25, window)
    assert np.array_equal(bits(got), bits(expected))
    off = np.bincount(cell + 1, weights=rows.qty[keep], minlength=25 * window + 1)[:-1].reshape(25, window)
    assert not np.array_equal(bits(got), bits(off))  # an age one column off is told apart


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("sort", [True, False])
def test_bin_window_volumes_are_the_reinitialized_targets_bincount(seed, sort):
    # reference: the stage's former numpy steps - each bin's largest age (at least 0), its window cut to it,
    # and a bincount of the rows inside that window outside a shortage
    leaf, ns, qty = history(seed, 60, sort)
    rng = np.random.default_rng(300 + seed)
    row_bin = (leaf // 4).astype(np.int32)  # a parent of four leaves
    n_bins = 16
    age = period_ages(pd.Series(ns.astype("datetime64[ns]")), "week", CYCLE_ORD)
    short = rng.random(len(leaf)) < 0.05
    window = rng.choice([4, 26, 52, 104], n_bins).astype(np.int64)
    span, volume = bin_window_volumes(row_bin, age, qty, short, window, n_bins)
    oldest = np.zeros(n_bins, np.int64)
    np.maximum.at(oldest, row_bin, age)
    expected_span = np.minimum(window, oldest)
    inside = (age >= 1) & (age <= expected_span[row_bin]) & ~short
    expected = np.bincount(row_bin[inside], weights=qty[inside], minlength=n_bins)
    assert np.array_equal(span, expected_span)
    assert np.array_equal(bits(volume), bits(expected))
    wider = bin_window_volumes(row_bin, age, qty, np.zeros_like(short), window, n_bins)[1]
    assert not np.array_equal(bits(volume), bits(wider))  # the shortage rows are told apart


def test_parent_sums_and_counts_by_are_the_ufuncs_at():
    # reference: np.add.at / np.logical_or.at on zeros, which visit the rows in order
    rng = np.random.default_rng(5)
    values = np.round(rng.lognormal(0, 3, (500, 7)), 3)
    values[rng.random(values.shape) < 0.1] = 0.0
    code = rng.integers(0, 40, 500)
    expected = np.zeros((40, 7))
    np.add.at(expected, code, values)
    assert np.array_equal(bits(parent_sums(values, code, 40)), bits(expected))
    flags = rng.random((500, 7)) < 0.02
    any_flag = np.zeros((40, 7), dtype=bool)
    np.logical_or.at(any_flag, code, flags)
    assert np.array_equal(counts_by(flags, code, 40), any_flag) and not any_flag.all() and any_flag.any()
    keep = rng.random(500) < 0.5
    kept = np.zeros((40, 7), dtype=bool)
    np.logical_or.at(kept, code, flags & keep[:, None])
    assert np.array_equal(counts_by(flags, code, 40, keep=keep), kept) and not np.array_equal(kept, any_flag)


def numpy_split(parent_code, n_parents, base, rule, ref_pos, scale, initial_share, active):
    """The split in whole-array numpy, as `split_shares` was written before its compiled pass: the reference."""
    n, t = active.shape
    base = np.asarray(base, dtype=float)
    act = active.astype(float)
    new, is_ref, is_init = np.isin(rule, NEW_CUSTOMER_RULES), rule == "reference", rule == "initial_share"
    p = np.where(new[:, None], 0.0, base if base.ndim == 2 else base[:, None])
    r = np.flatnonzero(is_ref)
    ref, k = ref_pos[r], scale[r]
    asked = np.zeros((n, t))
    np.add.at(asked, ref, k[:, None] * act[r])
    at_ref = asked[ref]
    cut = np.where(at_ref > 1.0, 1.0 / np.where(at_ref > 1.0, at_ref, 1.0), 1.0)
    take = np.zeros((n, t))
    take[r] = k[:, None] * p[ref] * cut * act[r]
    given = np.zeros((n, t))
    np.add.at(given, ref, take[r])
    weight = np.clip(p - given, 0.0, None) * act * (~new)[:, None] + take
    s_init = np.where(is_init[:, None], np.nan_to_num(initial_share)[:, None] * act, 0.0)
    weight_sum, init_sum = np.zeros((n_parents, t)), np.zeros((n_parents, t))
    np.add.at(weight_sum, parent_code, weight)
    np.add.at(init_sum, parent_code, s_init)
    w_sum, i_sum = weight_sum[parent_code], init_sum[parent_code]
    kept = 1.0 - np.minimum(i_sum, 1.0)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        from_weight = np.where(w_sum > 0, weight / w_sum * kept, 0.0)
        part = np.where(i_sum > 0, s_init / i_sum, 0.0)
        from_init = part * np.where(w_sum > 0, np.minimum(i_sum, 1.0), 1.0)
    return np.clip(from_weight + from_init, 0.0, 1.0), (weight_sum <= 0) & (init_sum <= 0)


def split_case(seed: int, n: int = 400, t: int = 26, n_parents: int = 60):
    """References (scales summing above 1 on some), initial shares (NaN, an infinity, a negative, above 1 in
    sum), inactive periods, bases with zeros, -0.0 and a NaN, all-zero parents."""
    rng = np.random.default_rng(seed)
    parent_code = np.sort(rng.integers(0, n_parents, n))
    rules = ["none", "reference", "initial_share", "awaiting_history", "phase_in"]
    rule = rng.choice(rules, n, p=[0.7, 0.1, 0.1, 0.05, 0.05]).astype(object)
    established = ~np.isin(rule, NEW_CUSTOMER_RULES)
    # a reference is an established child of the same parent (as `lifecycle_rules` makes them), else none
    ref_pos = np.full(n, -1)
    for j in np.flatnonzero(rule == "reference"):
        mates = np.flatnonzero((parent_code == parent_code[j]) & established)
        if len(mates):
            ref_pos[j] = rng.choice(mates)
        else:
            rule[j] = "awaiting_history"
    scale = np.where(rule == "reference", rng.choice([0.5, 1.0, 1.5, 0.3], n), np.nan)
    initial = np.where(rule == "initial_share", rng.choice([0.1, 0.6, 0.45, np.nan, 1.2], n), np.nan)
    initial[np.flatnonzero(rule == "initial_share")[:3]] = [np.inf, -0.2, 0.0]
    active = rng.random((n, t)) < 0.85
    one = rng.random(n) * (rng.random(n) < 0.8) / 3.0
    per_period = rng.random((n, t)) * (rng.random((n, t)) < 0.7) / 7.0
    one[:5], per_period[:5, 0] = -0.0, -0.0
    per_period[7, 3] = np.nan
    return parent_code, n_parents, rule, ref_pos, scale, initial, active, (one, per_period)


@pytest.mark.parametrize("seed", range(6))
def test_split_shares_is_the_whole_array_numpy_split_to_the_bit(seed):
    parent_code, n_parents, rule, ref_pos, scale, initial, active, bases = split_case(seed)
    for base in bases:
        share, all_zero = split_shares(parent_code, n_parents, base, rule, ref_pos, scale, initial, active)
        expected, expected_zero = numpy_split(parent_code, n_parents, base, rule, ref_pos, scale, initial, active)
        assert np.array_equal(bits(share), bits(expected)) and np.array_equal(all_zero, expected_zero)
        assert all_zero.any() and not all_zero.all()
    # one period with every child active, as the share table asks for its base shares
    one_period = np.ones((len(rule), 1), dtype=bool)
    share, _ = split_shares(parent_code, n_parents, bases[0], rule, ref_pos, scale, initial, one_period)
    expected, _ = numpy_split(parent_code, n_parents, bases[0], rule, ref_pos, scale, initial, one_period)
    assert np.array_equal(bits(share), bits(expected))


def test_the_split_comparison_can_fail():
    # the same case with the parent sums added in another order, or the initial shares not capped at 1, gives
    # other bits: so the comparison above can see a kernel that does either
    parent_code, n_parents, rule, ref_pos, scale, initial, active, (base, _) = split_case(3)
    expected, _ = numpy_split(parent_code, n_parents, base, rule, ref_pos, scale, initial, active)
    order = np.arange(len(rule))[::-1]
    back = np.empty_like(order)
    back[order] = np.arange(len(order))
    reversed_sums, _ = numpy_split(
        parent_code[order], n_parents, base[order], rule[order], back[ref_pos[order]] * (ref_pos[order] >= 0)
        - (ref_pos[order] < 0), scale[order], initial[order], active[order]
    )
    assert not np.array_equal(bits(reversed_sums[back]), bits(expected))
    uncapped = initial.copy()
    uncapped[rule == "initial_share"] = 0.9
    assert not np.array_equal(
        bits(split_shares(parent_code, n_parents, base, rule, ref_pos, scale, uncapped, active)[0]), bits(expected)
    )


@pytest.mark.parametrize("seed", range(4))
def test_run_periods_count_each_leafs_distinct_periods(seed):
    # reference: the distinct (leaf, age) pairs per leaf, by numpy's unique
    leaf, ns, qty = history(seed, 60)
    rows = share_rows(leaf, ns, qty, 60)
    count = np.zeros(60, np.int64)
    assert _run_periods(rows.first, rows.age, count)
    pairs = np.unique(np.stack([leaf.astype(np.int64), rows.age.astype(np.int64)], axis=1), axis=0)
    assert np.array_equal(count, np.bincount(pairs[:, 0], minlength=60))
    assert (np.diff(rows.first) > count).any()  # some leaf repeats a period: rows alone would miscount
    # a leaf whose rows are not in period order is refused (the caller counts on the general path)
    swapped = rows.age.copy()
    at = int(np.flatnonzero(np.diff(rows.first) > 2)[0])
    i = rows.first[at]
    swapped[i], swapped[i + 2] = swapped[i + 2], swapped[i]
    assert not _run_periods(rows.first, swapped, np.zeros(60, np.int64))


@pytest.mark.parametrize("seed", range(4))
def test_share_steps_are_the_changes_between_a_leafs_periods(seed):
    # reference: numpy's steps from row to row within a leaf's run, |share - share before| > tolerance
    rng = np.random.default_rng(500 + seed)
    sizes = rng.integers(1, 9, 300)
    ids = np.repeat(rng.permutation(400)[:300], sizes).astype(np.int32)
    when = np.concatenate([np.sort(rng.choice(40, k, replace=False)) for k in sizes]).astype(np.int64)
    share = rng.choice([0.25, 0.25 + 1e-10, 0.25 + 1e-8, 0.5, 0.0, -0.0, np.nan], len(ids))
    in_runs, rows = share_steps(ids, when, share, 1e-9, 400)
    with np.errstate(invalid="ignore"):
        expected = np.flatnonzero((ids[1:] == ids[:-1]) & (np.abs(np.diff(share)) > 1e-9)) + 1
    assert in_runs and np.array_equal(rows, expected) and len(rows)
    assert not np.array_equal(share_steps(ids, when, share, 1e-11, 400)[1], expected)  # the tolerance is read
    later = ids.copy()
    later[-1] = ids[0] if ids[-2] != ids[0] else ids[sizes[0]]  # an id's second run
    assert not share_steps(later, when, share, 1e-9, 400)[0]
    back = when.copy()
    at = int(np.flatnonzero(ids[1:] == ids[:-1])[0]) + 1
    back[at] = back[at - 1] - 1  # a period before the row before, inside a run
    assert not share_steps(ids, back, share, 1e-9, 400)[0]


def test_key_sums_are_bincounts_to_the_bit():
    rng = np.random.default_rng(9)
    key = rng.integers(0, 50, 3000) * 2  # odd keys held by no row
    share = rng.random(3000) * rng.choice([1.0, 1e-9, 1e9, 0.0, -0.0], 3000)
    share[[3, 70]] = np.nan
    reason = rng.random(3000) < 0.3
    share_sum, rows, reasons, nonzero = key_sums(key, share, reason, 100)
    assert np.array_equal(bits(share_sum), bits(np.bincount(key, weights=share, minlength=100)))
    assert np.array_equal(rows, np.bincount(key, minlength=100))
    assert np.array_equal(reasons, np.bincount(key, weights=reason, minlength=100))
    assert np.array_equal(nonzero, np.bincount(key, weights=share != 0, minlength=100))
    order = np.argsort(key, kind="stable")[::-1]  # each key's rows added the other way round: other bits
    assert not np.array_equal(bits(share_sum), bits(key_sums(key[order], share[order], reason, 100)[0]))


@pytest.mark.parametrize("seed", range(4))
def test_week_runs_are_the_ages_counts_and_run_periods(seed):
    # reference: `_week_ages` (tested above against numpy), age >= 1 outside the shortage rows, `_run_periods`
    leaf, ns, qty = history(seed, 60)
    short = np.random.default_rng(600 + seed).random(len(leaf)) < 0.1
    first = np.searchsorted(leaf, np.arange(61, dtype=leaf.dtype))
    age, counts, periods = np.empty(len(leaf), np.int32), np.empty(len(leaf), bool), np.zeros(60, np.int64)
    assert _week_runs(ns, CYCLE_ORD, first, short, age, counts, periods) == (True, True)
    expected_age = np.empty(len(leaf), np.int32)
    assert _week_ages(ns, CYCLE_ORD, expected_age)
    expected_periods = np.zeros(60, np.int64)
    assert _run_periods(first, expected_age, expected_periods)
    assert np.array_equal(age, expected_age) and np.array_equal(periods, expected_periods)
    assert np.array_equal(counts, (expected_age >= 1) & ~short) and not counts.all() and counts.any()
    _week_runs(ns, CYCLE_ORD, first, np.zeros(0, bool), age, counts, periods)  # no shortage rows
    assert np.array_equal(counts, expected_age >= 1)
    back = ns.copy()
    two = first[:-1][(np.diff(first) > 2)] + 1  # a run's second row, with a third after it
    at = int(two[reference_ages(ns[two]) != reference_ages(ns[two + 1])][0])
    back[at], back[at + 1] = ns[at + 1], ns[at]  # two of a run's weeks swapped: an age rises inside the run
    assert _week_runs(back, CYCLE_ORD, first, short, age, counts, periods) == (True, False)
    back[3] = np.iinfo(np.int64).min
    assert not _week_runs(back, CYCLE_ORD, first, short, age, counts, periods)[0]
