"""False-positive accounting: Wilson interval, predicted FPR, per-node and fleet counters."""

from __future__ import annotations

import math

import pytest

from shardsieve.coordinator.accounting import Accounting, ProbeOutcome
from shardsieve.fanout import avoided_fanout
from shardsieve.intervals import wilson_interval
from shardsieve.sizing import fill_fpr as predicted_fpr
from shardsieve.coordinator.hints import HintTable


def test_wilson_interval_matches_published_example() -> None:
    # Newcombe, "Two-sided confidence intervals for the single proportion", Stat. Med. 1998,
    # Table I: 81 of 263 -> Wilson score interval 0.2553 to 0.3662 (95%). (Table values recalled
    # from memory of the paper; they agree with the closed form in Wilson 1927.)
    low, high = wilson_interval(81, 263)
    assert low == pytest.approx(0.2553, abs=5e-4)
    assert high == pytest.approx(0.3662, abs=5e-4)
    # Same table: 15 of 148 -> 0.0624 to 0.1605.
    low, high = wilson_interval(15, 148)
    assert low == pytest.approx(0.0624, abs=5e-4)
    assert high == pytest.approx(0.1605, abs=5e-4)
    # Same table: 0 of 20 -> 0 to 0.1611.
    low, high = wilson_interval(0, 20)
    assert low == 0.0 and high == pytest.approx(0.1611, abs=5e-4)


def test_wilson_interval_rejects_impossible_counts() -> None:
    with pytest.raises(ValueError, match="successes <= trials"):
        wilson_interval(5, 3)
    assert wilson_interval(0, 0) == (0.0, 1.0)


def test_predicted_fpr_is_fill_to_the_k() -> None:
    # Broder & Mitzenmacher 2004, section 2: the false-positive probability given the fraction
    # of set bits is (fill)^k.
    assert predicted_fpr(0.5, 7) == pytest.approx(0.5 ** 7)
    with pytest.raises(ValueError, match="fill"):
        predicted_fpr(1.5, 3)


def test_read_accounting_counts_probes_waste_and_false_positives() -> None:
    acc = Accounting()
    # A read of a key held by n1; n2's filter said maybe (false positive); n3's filter said no;
    # n4 was listed only because it is stale (not a filter false positive).
    acc.record_read([
        ProbeOutcome("n1", consulted=True, listed_by_filter=True, probed=True, found=True),
        ProbeOutcome("n2", consulted=True, listed_by_filter=True, probed=True, found=False),
        ProbeOutcome("n3", consulted=True, listed_by_filter=False, probed=False),
        ProbeOutcome("n4", consulted=False, listed_by_filter=False, probed=True, found=False),
    ])
    nodes, totals = acc.snapshot()
    assert (totals.lookups, totals.probes, totals.wasted_probes) == (1, 3, 2)
    assert (nodes["n1"].hits, nodes["n1"].lookups_checked) == (1, 0)     # it held the key
    assert (nodes["n2"].wasted_probes, nodes["n2"].false_positives, nodes["n2"].lookups_checked) == (1, 1, 1)
    assert (nodes["n3"].lookups_checked, nodes["n3"].false_positives) == (1, 0)
    assert (nodes["n4"].wasted_probes, nodes["n4"].false_positives, nodes["n4"].lookups_checked) == (1, 0, 0)
    # Avoided fan-out by its definition 1 - probes / (lookups x nodes) (docs/architecture.md#words).
    assert avoided_fanout(probes=totals.probes, lookups=totals.lookups, nodes=4) == pytest.approx(1 - 3 / 4)


def test_unreachable_probe_is_not_evidence() -> None:
    acc = Accounting()
    acc.record_read([ProbeOutcome("n1", consulted=True, listed_by_filter=True, probed=True, reached=False)])
    nodes, totals = acc.snapshot()
    assert nodes["n1"].unreachable == 1 and nodes["n1"].lookups_checked == 0 and totals.wasted_probes == 0


def test_observed_fpr_restarts_with_a_new_epoch() -> None:
    acc = Accounting()
    acc.new_epoch("n1", 1)
    for _ in range(10):
        acc.record_read([ProbeOutcome("n1", consulted=True, listed_by_filter=True, probed=True, found=False)])
    assert acc.node("n1").observed_fpr == 1.0
    acc.new_epoch("n1", 2)
    assert acc.node("n1").lookups_checked == 0 and acc.node("n1").wasted_probes == 10
    assert math.isclose(acc.node("n1").observed_fpr, 0.0)


def test_hints_held_until_the_sequence_is_applied() -> None:
    hints = HintTable()
    assert hints.add(b"k1", "n1", epoch=1, sequence=5)
    assert hints.add(b"k2", "n1", epoch=1, sequence=7)
    assert not hints.add(b"k3", "n1", epoch=1, sequence=3, applied=(1, 4))  # already applied: not held
    assert hints.lookup(b"k1") == ["n1"] and len(hints) == 2
    assert hints.lookup_many([b"k1", b"zz"]) == [["n1"], []]
    assert hints.applied("n1", 1, 5) == 1
    assert hints.lookup(b"k1") == [] and hints.lookup(b"k2") == ["n1"]
    assert hints.applied("n1", 2, 0) == 1         # a later epoch covers everything of epoch 1
    assert len(hints) == 0 and hints.lookup_many([b"k2"]) is None
