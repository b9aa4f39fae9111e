"""Change sets: the bits that flipped 0->1 and 1->0 between two states of a filter."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from shardsieve import checksum as _checksum

_EMPTY = np.zeros(0, dtype=np.uint64)


def _sorted_unique(values: npt.ArrayLike) -> npt.NDArray[np.uint64]:
    arr = np.asarray(values, dtype=np.uint64)
    if arr.size == 0:
        return _EMPTY.copy()
    return np.unique(arr)


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
        if s.size and c.size and np.intersect1d(s, c, assume_unique=True).size:
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
        set_net = np.union1d(np.setdiff1d(s_self, c_later, assume_unique=True),
                             np.setdiff1d(s_later, c_self, assume_unique=True))
        cleared_net = np.union1d(np.setdiff1d(c_self, s_later, assume_unique=True),
                                 np.setdiff1d(c_later, s_self, assume_unique=True))
        return ChangeSet(set_net.astype(np.uint64), cleared_net.astype(np.uint64))

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, ChangeSet):
            return NotImplemented
        return bool(np.array_equal(self.set_positions, other.set_positions)
                    and np.array_equal(self.cleared_positions, other.cleared_positions))

    __hash__ = None  # type: ignore[assignment]
