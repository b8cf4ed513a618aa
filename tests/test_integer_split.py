"""Integer split by the largest remainder (Hamilton) method: hand-worked cases, published examples,
the `apportionment` package as outside reference, and properties."""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest
from apportionment import methods as reference
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from pipelines.engines.integer_split import largest_remainder, round_to_pack


def split(units, weights, order=None):
    """One group: `units` over `weights`."""
    w = np.asarray(weights, dtype=float)
    return largest_remainder(np.array([units]), w, np.zeros(len(w), dtype=np.int64), order).tolist()


# ------------------------------------------------------------------ hand-worked


def test_leftover_unit_goes_to_the_largest_remainder():
    # quotas 7 x (0.5, 0.3, 0.2) = 3.5, 2.1, 1.4 -> floors 3, 2, 1 (6), 1 left -> largest remainder 0.5
    assert split(7, [0.5, 0.3, 0.2]) == [4, 2, 1]


def test_weights_need_not_sum_to_one():
    # weights 2, 6, 12 (sum 20): quotas 10 x 0.1, 0.3, 0.6 = 1, 3, 6 exactly; nothing left over
    assert split(10, [2, 6, 12]) == [1, 3, 6]


def test_equal_remainders_and_quotas_go_by_key_order():
    # 10 / 3 = 3.333 each: floors 3, 3, 3, 1 left; remainders and quotas all tie -> first in key order
    assert split(10, [1, 1, 1]) == [4, 3, 3]
    # the same with the key order reversed: the last item comes first
    assert split(10, [1, 1, 1], order=np.array([2, 1, 0])) == [3, 3, 4]


def test_equal_remainders_go_to_the_larger_quota():
    # weights 1.5, 3.5 of 5 units: quotas 1.5, 3.5 -> floors 1, 3, 1 left; remainders 0.5 tie ->
    # the larger exact quota 3.5 wins, although it comes second in key order
    assert split(5, [1.5, 3.5]) == [1, 4]


def test_float_noise_does_not_break_a_tie():
    # 0.1 + 0.2 != 0.3 in binary: weights 0.1 + 0.2 and 0.3 are equal quotas of 1 unit (0.5 each),
    # so the tie goes by key order, not by the last bits of the float
    assert split(1, [0.1 + 0.2, 0.3]) == [1, 0]
    assert split(1, [0.3, 0.1 + 0.2]) == [1, 0]


def test_many_groups_at_once_each_sums_to_its_units():
    # group 0: 3 units over 1, 1 -> 1.5, 1.5 -> 1, 1 + 1 left by key order -> 2, 1
    # group 1: 2 units over 1, 2, 7 (sum 10) -> quotas 0.2, 0.4, 1.4 -> floors 0, 0, 1, 1 left;
    #   remainders 0.2, 0.4, 0.4: the two 0.4 tie, the larger quota 1.4 wins -> 0, 0, 2
    # group 2: 0 units -> all 0
    group = np.array([0, 0, 1, 1, 1, 2])
    parts = largest_remainder(np.array([3, 2, 0]), np.array([1, 1, 1, 2, 7, 5.0]), group)
    assert parts.tolist() == [2, 1, 0, 0, 2, 0]


def test_items_of_weight_zero_get_nothing_and_a_group_without_weight_is_refused():
    assert split(4, [0, 1, 0, 3]) == [0, 1, 0, 3]
    with pytest.raises(ValueError, match="no positive weight"):
        split(3, [0, 0])
    with pytest.raises(ValueError, match="non-negative"):
        split(-3, [1, 1])


def test_round_to_pack_is_the_nearest_multiple_with_half_a_pack_up():
    # 23 / 5 = 4.6 -> 5 packs = 25; 22.5 / 5 = 4.5 -> half up -> 25; 22.4 -> 4.48 -> 20
    # -12.5 / 5 = -2.5 -> half up (towards +inf) -> -2 packs = -10; -13 / 5 = -2.6 -> -15
    assert round_to_pack(np.array([23, 22.5, 22.4, -12.5, -13, 0]), 5).tolist() == [25, 25, 20, -10, -15, 0]
    assert round_to_pack(np.array([2.5, 3.49]), 1).tolist() == [3, 3]


# ------------------------------------------------------------------ published examples


def test_balinski_young_1975_examples():
    # Balinski, M. L. & Young, H. P. (1975), "The quota method of apportionment", American
    # Mathematical Monthly 82(7), 701-730, as cited in the `apportionment` package's tests
    # (martinlackner/apportionment, tests/test_methods.py: largest_remainder results).
    # Example 1: 100 seats, votes 5117, 4400, 162, 161, 160 (sum 10000): quotas 51.17, 44.00,
    # 1.62, 1.61, 1.60 -> floors 51, 44, 1, 1, 1 (98); 2 left to the remainders .62 and .61.
    assert split(100, [5117, 4400, 162, 161, 160]) == [51, 44, 2, 2, 1]
    # Example 2: 26 seats, votes 9061, 7179, 5259, 3319, 1182 (sum 26000): quotas 9.061, 7.179,
    # 5.259, 3.319, 1.182 -> floors 25; 1 left to the remainder .319.
    assert split(26, [9061, 7179, 5259, 3319, 1182]) == [9, 7, 5, 4, 1]


def test_weak_proportionality_example_of_the_apportionment_package():
    # martinlackner/apportionment, tests/test_methods.py test_weak_proportionality: votes 14, 28, 7,
    # 35 (sum 84), 12 seats -> quotas exactly 2, 4, 1, 5 for every method
    assert split(12, [14, 28, 7, 35]) == [2, 4, 1, 5]


# ------------------------------------------------------------------ outside reference


def _remainders_distinct(votes: list[int], seats: int) -> bool:
    """True when no two exact remainders (as fractions) are equal: Hamilton's result has no tie."""
    total = sum(votes)
    rem = [Fraction(v * seats, total) - (v * seats) // total for v in votes]
    return len(set(rem)) == len(rem)


@settings(max_examples=300, deadline=None)
@given(votes=st.lists(st.integers(1, 100_000), min_size=2, max_size=12), seats=st.integers(1, 500))
def test_matches_the_apportionment_package_where_no_ties_occur(votes, seats):
    # Outside reference: PyPI package `apportionment` 1.0 (M. Lackner), methods.compute("largest_remainder", ...)
    assume(_remainders_distinct(votes, seats))
    expected = reference.compute("largest_remainder", votes, seats)
    assert split(seats, votes) == expected


# ------------------------------------------------------------------ properties


@settings(max_examples=200, deadline=None)
@given(
    data=st.lists(
        st.tuples(st.integers(0, 200), st.lists(st.floats(0.0, 1e4, allow_nan=False), min_size=1, max_size=8)),
        min_size=1,
        max_size=6,
    )
)
def test_parts_sum_to_units_and_lie_within_one_of_the_quota(data):
    data = [(u, w) for u, w in data if sum(w) > 0]
    assume(data)
    units = np.array([u for u, _ in data])
    weight = np.concatenate([np.asarray(w) for _, w in data])
    group = np.concatenate([np.full(len(w), g) for g, (_, w) in enumerate(data)])
    parts = largest_remainder(units, weight, group)
    assert (parts >= 0).all()
    np.testing.assert_array_equal(np.bincount(group, weights=parts, minlength=len(units)), units)
    total = np.bincount(group, weights=weight)[group]
    quota = units[group] * weight / total
    # quota property of Hamilton's method: every part is its quota rounded down or up
    assert (parts >= np.floor(quota) - 1e-9).all() and (parts <= np.ceil(quota) + 1e-9).all()
