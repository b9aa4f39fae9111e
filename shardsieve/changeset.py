"""Change sets: the bits that flipped 0->1 and 1->0 between two states of a filter."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from shardsieve import checksum as _checksum

_EMPTY = np.zeros(0, dtype=np.uint64)
# numpy's set routines (unique, union1d, setdiff1d) are avoided here: on numpy 2.4 they take
# about a second per million positions, against milliseconds for sort + binary search.


def _sorted_unique(values: npt.ArrayLike) -> npt.NDArray[np.uint64]:
    """Sort and drop repeats. Sort + neighbour compare: np.unique is ~100x slower on numpy 2.4."""
    arr = np.sort(np.asarray(values, dtype=np.uint64).ravel())
    if arr.size < 2:
        return arr
    keep = np.empty(arr.size, dtype=bool)
    keep[0] = True
    np.not_equal(arr[1:], arr[:-1], out=keep[1:])
    return arr[keep]


def _member_of(values: npt.NDArray[np.uint64], sorted_pool: npt.NDArray[np.uint64]) -> npt.NDArray[np.bool_]:
    """values[i] in sorted_pool, by binary search (the pool must be sorted)."""
    if sorted_pool.size == 0 or values.size == 0:
        return np.zeros(values.size, dtype=bool)
    idx = np.searchsorted(sorted_pool, values)
    np.minimum(idx, sorted_pool.size - 1, out=idx)
    return sorted_pool[idx] == values


def _minus(a: npt.NDArray[np.uint64], b: npt.NDArray[np.uint64]) -> npt.NDArray[np.uint64]:
    """Sorted a without the elements of sorted b."""
    return a[~_member_of(a, b)]


def overlaps(a: npt.NDArray[np.uint64], b: npt.NDArray[np.uint64]) -> bool:
    """Whether two sorted position arrays share an element."""
    return bool(a.size and b.size and _member_of(a, b).any())


def sorted_unique(values: npt.ArrayLike) -> npt.NDArray[np.uint64]:
    """Positions sorted with repeats dropped, as uint64."""
    return _sorted_unique(values)


def _union(a: npt.NDArray[np.uint64], b: npt.NDArray[np.uint64]) -> npt.NDArray[np.uint64]:
    return _sorted_unique(np.concatenate([a, b]))


@dataclass(frozen=True)
class ChangeSet:
    """Sorted, disjoint arrays of positions set (0->1) and cleared (1->0).

    A position appears in at most one of the two arrays: a bit that was set and then
    cleared again inside the same window is no change at all.
    """

    set_positions: npt.NDArray[np.uint64] = field(default_factory=lambda: _EMPTY.copy())
    cleared_positions: npt.NDArray[np.uint64] = field(default_factory=lambda: _EMPTY.copy())

    @classmethod
    def of(cls, set_positions: npt.ArrayLike = (), cleared_positions: npt.ArrayLike = ()) -> ChangeSet:
        """Build from any iterables; sorts, deduplicates and checks disjointness."""
        s = _sorted_unique(set_positions)
        c = _sorted_unique(cleared_positions)
        if s.size and c.size and _member_of(s, c).any():
            raise ValueError("a position cannot be both set and cleared in one change set")
        return cls(s, c)

    @property
    def is_empty(self) -> bool:
        return self.set_positions.size == 0 and self.cleared_positions.size == 0

    def __len__(self) -> int:
        return int(self.set_positions.size + self.cleared_positions.size)

    def checksum_after(self, checksum_before: int) -> int:
        """The filter checksum once this change set is applied to a filter with checksum_before."""
        return _checksum.updated(checksum_before, self.set_positions, self.cleared_positions)

    def then(self, later: ChangeSet) -> ChangeSet:
        """Coalesce: the net change of applying self and then later.

        Requires the two to be consecutive changes of one filter (a bit set by self can
        only be cleared by later, and vice versa), which every producer guarantees.
        """
        s_self, c_self = self.set_positions, self.cleared_positions
        s_later, c_later = later.set_positions, later.cleared_positions
        # set then cleared -> no change; cleared then set -> no change
        set_net = _union(_minus(s_self, c_later), _minus(s_later, c_self))
        cleared_net = _union(_minus(c_self, s_later), _minus(c_later, s_self))
        return ChangeSet(set_net, cleared_net)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, ChangeSet):
            return NotImplemented
        return bool(np.array_equal(self.set_positions, other.set_positions)
                    and np.array_equal(self.cleared_positions, other.cleared_positions))

    __hash__ = None  # type: ignore[assignment]
