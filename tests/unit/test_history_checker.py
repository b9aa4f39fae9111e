"""The history checker used by cluster tests must catch every broken rule and accept legal histories.

Reference: the rules are the promises of docs/architecture.md#promises stated over a history, with
operations that overlap in time free to take effect in either order (linearizability, Herlihy &
Wing 1990): a read that starts after a write of k was acknowledged, with no delete of k after that
write, must find k; a read that starts after a delete of k was acknowledged, with no write of k
after that delete acknowledged or in flight, must not find k; a read returns only a value some
write produced, and never one an acknowledged overwrite had replaced.
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
    # Rule (docs/architecture.md#4-nothing-acknowledged-is-lost): once an overwrite
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


def test_key_found_after_an_acknowledged_delete_is_a_violation() -> None:
    # Rule: a delete acknowledged before the read began, with no write of the key after it, leaves
    # the key absent; finding it means an acknowledged delete was lost.
    h = History()
    h.write(b"k", b"v1", start=1.0, end=2.0)
    h.delete(b"k", start=3.0, end=4.0)
    h.read(b"k", True, b"v1", start=5.0, end=5.5)
    assert [v.why for v in h.violations()] == ["read found a key an acknowledged delete removed"]
    with pytest.raises(AssertionError, match="acknowledged delete removed.*delete acked at 4.000"):
        h.assert_ok()


def test_a_later_delete_is_judged_on_its_own() -> None:
    # Written again after the first delete, then deleted again: the second delete has no write
    # after it, so finding the key is still a resurrection.
    h = History()
    h.write(b"k", b"v1", start=1.0, end=2.0)
    h.delete(b"k", start=3.0, end=4.0)
    h.write(b"k", b"v2", start=5.0, end=6.0)
    h.delete(b"k", start=7.0, end=8.0)
    h.read(b"k", True, b"v2", start=9.0, end=9.5)
    assert [v.why for v in h.violations()] == ["read found a key an acknowledged delete removed"]


def test_write_concurrent_with_the_delete_or_the_read_explains_a_found_key() -> None:
    h = History()
    h.write(b"a", b"v1", start=1.0, end=2.0)
    h.write(b"a", b"v2", start=3.5, end=4.5)          # overlaps the delete: may have landed after it
    h.delete(b"a", start=3.0, end=4.0)
    h.read(b"a", True, b"v2", start=5.0, end=5.5)
    h.write(b"b", b"v1", start=1.0, end=2.0)
    h.delete(b"b", start=3.0, end=4.0)
    h.write(b"b", b"v2", start=4.5, end=9.0)          # in flight while the read runs
    h.read(b"b", True, b"v2", start=5.0, end=5.5)
    h.write(b"c", b"v1", start=1.0, end=2.0)
    h.delete(b"c", start=3.0, end=6.0)                # acknowledged only after the read began
    h.read(b"c", True, b"v1", start=5.0, end=5.5)
    assert h.violations() == []


def test_write_after_the_delete_explains_a_found_key() -> None:
    h = History()
    h.write(b"k", b"v1", start=1.0, end=2.0)
    h.delete(b"k", start=3.0, end=4.0)
    h.write(b"k", b"v2", start=5.0, end=6.0)
    h.read(b"k", True, b"v2", start=7.0, end=7.5)
    assert h.violations() == []
    # ...but the value from before the delete is gone: the rewrite replaced it
    h.read(b"k", True, b"v1", start=7.0, end=7.5)
    assert [v.why for v in h.violations()] == ["read returned a value an acknowledged overwrite replaced"]


def test_operations_whose_outcome_is_unknown_explain_but_never_require() -> None:
    h = History()
    # A delete that failed may or may not have happened: finding the key later is legal, and so
    # is not finding it.
    h.write(b"d", b"v", start=1.0, end=2.0)
    h.delete(b"d", start=3.0, end=4.0, acknowledged=False)
    h.read(b"d", True, b"v", start=5.0, end=5.5)
    h.read(b"d", False, None, start=6.0, end=6.5)
    # A write that failed after a delete may still have landed: it explains a found key, but
    # never makes an absent reply a violation.
    h.write(b"w", b"v1", start=1.0, end=2.0)
    h.delete(b"w", start=3.0, end=4.0)
    h.write(b"w", b"v2", start=5.0, end=5.2, acknowledged=False)
    h.read(b"w", True, b"v2", start=6.0, end=6.5)
    h.read(b"w", False, None, start=7.0, end=7.5)
    assert h.violations() == []
    assert h.live_keys() == {}                        # last operations unknown or a delete


def test_keys_written_on_a_node_are_the_acknowledged_ones_in_order() -> None:
    h = History()
    h.write(b"a", b"1", start=1.0, end=2.0, node_id="node-2")
    h.write(b"b", b"1", start=1.0, end=2.0, node_id="node-1")
    h.write(b"c", b"1", start=3.0, end=4.0, node_id="node-2", acknowledged=False)
    h.write(b"d", b"1", start=3.0, end=4.0, node_id="node-2")
    assert h.keys_written_on("node-2") == [b"a", b"d"]
