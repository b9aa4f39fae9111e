"""Change sets coalesce exactly like Python's own set algebra (the reference here)."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from shardsieve.changeset import ChangeSet

M = 256
bitsets = st.frozensets(st.integers(0, M - 1), max_size=80)


def _diff(before: frozenset[int], after: frozenset[int]) -> ChangeSet:
    return ChangeSet.of(sorted(after - before), sorted(before - after))


@settings(max_examples=300, deadline=None)
@given(bitsets, bitsets, bitsets)
def test_then_equals_the_direct_difference(s0: frozenset[int], s1: frozenset[int], s2: frozenset[int]) -> None:
    # Reference: the net change from s0 to s2 is (s2 - s0, s0 - s2), whatever happened in between.
    combined = _diff(s0, s1).then(_diff(s1, s2))
    assert combined.set_positions.tolist() == sorted(s2 - s0)
    assert combined.cleared_positions.tolist() == sorted(s0 - s2)


@settings(max_examples=200, deadline=None)
@given(bitsets, bitsets)
def test_checksum_after_matches_a_checksum_computed_from_scratch(s0: frozenset[int], s1: frozenset[int]) -> None:
    # The checksum is order independent: stepping s0 -> s1 equals computing s1's checksum directly.
    start = ChangeSet.of(sorted(s0)).checksum_after(0)
    assert _diff(s0, s1).checksum_after(start) == ChangeSet.of(sorted(s1)).checksum_after(0)


@given(st.lists(st.integers(0, M - 1), min_size=1, max_size=40))
def test_a_position_cannot_be_both_set_and_cleared(positions: list[int]) -> None:
    with pytest.raises(ValueError, match="both set and cleared"):
        ChangeSet.of(positions, positions[:1])


@given(st.lists(st.integers(0, 2**40 - 1), max_size=200))
def test_of_sorts_and_deduplicates_like_sorted_set(positions: list[int]) -> None:
    assert ChangeSet.of(positions).set_positions.tolist() == sorted(set(positions))
