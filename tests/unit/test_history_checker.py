"""The history checker used by cluster tests must catch a lost key and accept legal histories.

Reference: the rule it encodes is the store's promise (ARCHITECTURE.md, promises 1-3): a read that
starts after a write of k was acknowledged, with no delete of k after that write, must find k.
"""

from __future__ import annotations

import pytest

from shardsieve.testing.history import History


def test_absent_after_acknowledged_write_is_a_violation() -> None:
    h = History()
    h.write(b"k", b"v1", start=1.0, end=2.0)
    h.read(b"k", False, None, start=3.0, end=3.5)
    assert len(h.violations()) == 1
    with pytest.raises(AssertionError, match="acknowledged key reported absent"):
        h.assert_ok()


def test_concurrent_write_or_later_delete_explains_absence() -> None:
    h = History()
    h.write(b"a", b"v", start=1.0, end=5.0)          # still in flight when the read ran
    h.read(b"a", False, None, start=2.0, end=3.0)
    h.write(b"b", b"v", start=1.0, end=2.0)
    h.delete(b"b", start=2.5, end=4.0)               # delete overlaps the read
    h.read(b"b", False, None, start=3.0, end=3.5)
    h.read(b"b", True, b"v", start=2.1, end=2.2)
    assert h.violations() == []
    assert h.live_keys() == {b"a": b"v"}


def test_invented_value_is_a_violation() -> None:
    h = History()
    h.write(b"k", b"v1", start=1.0, end=2.0)
    h.read(b"k", True, b"zzz", start=3.0, end=3.1)
    assert [v.why for v in h.violations()] == ["read returned a value no write produced"]


def test_value_replaced_by_an_acknowledged_overwrite_is_a_violation() -> None:
    # Rule (ARCHITECTURE.md promise: no acknowledged value is lost or changed): once an overwrite
    # was acknowledged, a read that starts later must not return the value it replaced.
    h = History()
    h.write(b"k", b"v1", start=1.0, end=2.0)
    h.write(b"k", b"v2", start=3.0, end=4.0)
    h.read(b"k", True, b"v1", start=5.0, end=5.5)
    assert [v.why for v in h.violations()] == ["read returned a value an acknowledged overwrite replaced"]


def test_old_value_is_legal_while_the_overwrite_is_in_flight() -> None:
    h = History()
    h.write(b"k", b"v1", start=1.0, end=2.0)
    h.write(b"k", b"v2", start=3.0, end=6.0)          # not acknowledged before the reads began
    h.read(b"k", True, b"v1", start=4.0, end=4.5)
    h.read(b"k", True, b"v2", start=4.0, end=4.5)
    h.write(b"j", b"a", start=1.0, end=3.0)
    h.write(b"j", b"b", start=2.0, end=4.0)           # concurrent writes: either may win
    h.read(b"j", True, b"a", start=5.0, end=5.1)
    h.read(b"j", True, b"b", start=5.0, end=5.1)
    h.write(b"i", b"x", start=1.0, end=2.0)
    h.write(b"i", b"y", start=3.0, end=4.0)
    h.write(b"i", b"x", start=5.0, end=6.0)           # written back: x is current again
    h.read(b"i", True, b"x", start=7.0, end=7.1)
    assert h.violations() == []
