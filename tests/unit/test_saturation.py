"""Saturation monitor: flags, rebuild sizing, the concurrency limit, shrink, completion; and policy validation."""

from __future__ import annotations

import math

import pytest

from shardsieve.coordinator.policy import Policy, PolicyError
from shardsieve.coordinator.saturation import FilterReading, SaturationMonitor, saturation_reasons
from shardsieve.geometry import geometry_for
from shardsieve.sizing import false_positive_rate

POLICY = Policy(target_fpr=0.01, saturation_ratio=2.0, growth=2.0, min_capacity=100)
WALL = 1_700_000_000.0        # wall-clock Unix seconds stamped on decisions (never a duration)


def _view(node_id: str, keys: int, capacity: int, *, epoch: int = 1, fill: float | None = None,
          checked: int = 0, fps: int = 0) -> FilterReading:
    geo = geometry_for(capacity, POLICY.target_fpr)
    if fill is None:
        # Expected fill after n inserts, 1 - e^(-kn/m) (Broder & Mitzenmacher 2004, section 2).
        fill = -math.expm1(-geo.hashes * keys / geo.bits)
    return FilterReading(node_id, epoch, keys, capacity, fill, geo.hashes, geo.bits, checked, fps)


def test_healthy_node_is_not_flagged() -> None:
    node = _view("n1", 500, 1000)
    # Sanity of the fixture against the sizing formula (Bloom 1970): half full -> far below target.
    assert false_positive_rate(geometry_for(1000, 0.01).bits, node.hashes, 500) < 0.01
    assert saturation_reasons(node, POLICY) == []


def test_flag_reasons_predicted_observed_and_over_capacity() -> None:
    over = _view("n1", 5000, 1000)
    reasons = saturation_reasons(over, POLICY)
    assert any("keys 5000 > capacity 1000" in r for r in reasons)
    assert any("predicted FPR" in r for r in reasons)
    # Observed: 30 false positives in 100 checked lookups; Wilson lower bound ~0.22 > 0.02.
    observed = _view("n2", 100, 1000, checked=100, fps=30)
    assert [r for r in saturation_reasons(observed, POLICY) if "observed" in r]
    # 1 in 20: the lower bound is below 0.02 -> not enough evidence (Wilson 1927 interval).
    weak = _view("n3", 100, 1000, checked=20, fps=1)
    assert not [r for r in saturation_reasons(weak, POLICY) if "observed" in r]


def test_rebuild_at_growth_times_keys_under_concurrency_limit() -> None:
    monitor = SaturationMonitor()
    nodes = [_view("n1", 3000, 1000), _view("n2", 4000, 1000), _view("n3", 100, 1000)]
    result = monitor.tick(10.0, nodes, POLICY, at=WALL)
    flags = {d.node_id for d in result.decisions if d.action == "flag"}
    assert flags == {"n1", "n2"}
    assert len(result.rebuilds) == 1            # max_concurrent_rebuilds = 1
    plan = result.rebuilds[0]
    assert plan.node_id == "n2" and plan.capacity == 8000   # fullest first; 2 x 4000 keys
    assert [d for d in result.decisions if d.action == "skip" and d.node_id == "n1"]
    # The next tick does not repeat the flag or the queued note, and starts nothing new.
    again = monitor.tick(11.0, nodes, POLICY, at=WALL)
    assert again.rebuilds == [] and again.decisions == []
    # n2 moves to epoch 2 with the new capacity: done, and n1's turn comes.
    nodes[1] = _view("n2", 4000, 8000, epoch=2)
    done = monitor.tick(12.0, nodes, POLICY, at=WALL)
    assert [d.action for d in done.decisions if d.node_id == "n2"] == ["done"]
    assert [p.node_id for p in done.rebuilds] == ["n1"] and done.rebuilds[0].capacity == 6000


def test_rebuild_times_out_and_releases_the_slot() -> None:
    monitor = SaturationMonitor(rebuild_timeout_s=30.0)
    nodes = [_view("n1", 3000, 1000)]
    assert monitor.tick(0.0, nodes, POLICY, at=WALL).rebuilds
    result = monitor.tick(31.0, nodes, POLICY, at=WALL)
    assert [d.action for d in result.decisions] == ["skip"] and "not verified within 30s" in result.decisions[0].detail
    assert result.rebuilds == []
    retry = monitor.tick(31.0 + monitor.cooldown_s + 1, nodes, POLICY, at=WALL)   # after the cooldown: tried again
    assert [p.node_id for p in retry.rebuilds] == ["n1"]


def test_durations_run_on_the_monotonic_clock_whatever_the_wall_clock_does() -> None:
    # docs/coordinator.md, "Accounting and saturation": the rebuild timeout and the shrink grace
    # are durations; a wall-clock step (NTP, an operator setting the date) must neither fire
    # nor hold them back. Decisions carry the wall clock for people.
    monitor = SaturationMonitor(rebuild_timeout_s=30.0)
    full = [_view("n1", 3000, 1000)]
    assert monitor.tick(0.0, full, POLICY, at=WALL).rebuilds
    jumped = monitor.tick(10.0, full, POLICY, at=WALL + 86_400.0)    # the wall clock jumps a day ahead
    assert jumped.rebuilds == [] and jumped.decisions == []          # the timeout did not fire
    back = monitor.tick(31.0, full, POLICY, at=WALL - 3_600.0)       # ...then an hour behind the start
    assert [(d.node_id, d.action, d.at) for d in back.decisions] == [("n1", "skip", WALL - 3_600.0)]
    assert "not verified within 30s" in back.decisions[0].detail    # 31 monotonic seconds passed
    shrinking = SaturationMonitor(shrink_grace_s=60.0)
    empty = [_view("n2", 0, 100_000)]
    assert shrinking.tick(0.0, empty, POLICY, at=WALL).rebuilds == []
    assert shrinking.tick(30.0, empty, POLICY, at=WALL + 86_400.0).rebuilds == []   # a day on the wall: still in grace
    grace = shrinking.tick(61.0, empty, POLICY, at=WALL - 7_200.0)
    assert [p.node_id for p in grace.rebuilds] == ["n2"] and grace.rebuilds[0].reason.startswith("shrink")
    assert {d.at for d in grace.decisions} == {WALL - 7_200.0}


def test_shrink_only_when_a_smaller_ladder_step_results() -> None:
    monitor = SaturationMonitor(shrink_grace_s=0.0)
    big = _view("n1", 100, 100_000)
    result = monitor.tick(0.0, [big], POLICY, at=WALL)
    assert [d.action for d in result.decisions] == ["shrink"]
    plan = result.rebuilds[0]
    assert plan.capacity == 200 and plan.geometry is not None and plan.geometry.bits < big.bits
    # At min capacity there is nothing smaller to go to.
    assert SaturationMonitor().tick(0.0, [_view("n2", 1, 100)], POLICY, at=WALL).rebuilds == []


def test_shrink_waits_for_the_grace_period_and_resets_when_keys_return() -> None:
    monitor = SaturationMonitor(shrink_grace_s=60.0)
    empty = _view("n1", 0, 100_000)
    assert monitor.tick(0.0, [empty], POLICY, at=WALL).rebuilds == []        # just started empty: keep its capacity
    assert monitor.tick(59.0, [empty], POLICY, at=WALL).rebuilds == []
    filled = _view("n1", 50_000, 100_000)
    assert monitor.tick(61.0, [filled], POLICY, at=WALL).rebuilds == []       # back above the threshold: clock resets
    assert monitor.tick(62.0, [empty], POLICY, at=WALL).rebuilds == []
    assert [p.node_id for p in monitor.tick(122.5, [empty], POLICY, at=WALL).rebuilds] == ["n1"]


def test_auto_rebuild_off_only_flags_and_plan_marks_queued() -> None:
    policy = Policy(target_fpr=0.01, auto_rebuild=False, min_capacity=100, max_concurrent_rebuilds=1)
    monitor = SaturationMonitor()
    nodes = [_view("n1", 3000, 1000), _view("n2", 2500, 1000)]
    result = monitor.tick(0.0, nodes, policy, at=WALL)
    assert result.rebuilds == [] and {d.action for d in result.decisions} == {"flag"}
    plans = monitor.plan(nodes, policy, flagged=True)
    assert [(p.node_id, p.queued) for p in plans] == [("n1", False), ("n2", True)]
    with pytest.raises(KeyError, match="nope"):
        monitor.plan(nodes, policy, node_ids=["nope"])


def test_policy_update_is_all_or_nothing() -> None:
    policy = Policy()
    new = policy.updated({"target-fpr": "0.001", "max_concurrent_rebuilds": "2", "mode": "fast"})
    assert (new.target_fpr, new.max_concurrent_rebuilds, new.mode) == (0.001, 2, "fast")
    with pytest.raises(PolicyError, match="unknown policy name 'colour'"):
        policy.updated({"target-fpr": "0.001", "colour": "red"})
    with pytest.raises(PolicyError, match="growth"):
        policy.updated({"growth": "0.5"})
    with pytest.raises(PolicyError, match="not a valid float"):
        policy.updated({"target-fpr": "abc"})
    assert policy == Policy()


def test_a_new_epoch_at_the_old_size_is_a_given_up_rebuild_not_a_done_one() -> None:
    # docs/node.md, "Rebuild": a node that gives a rebuild up goes on with its old filter under a
    # fresh epoch; the slot is released, but the decision must not say the rebuild was done
    monitor = SaturationMonitor()
    node = _view("n1", 3000, 1000)
    result = monitor.tick(10.0, [node], POLICY, at=WALL)
    (plan,) = result.rebuilds
    assert plan.geometry.bits > node.bits and "n1" in monitor.in_flight
    gave_up = FilterReading("n1", node.epoch + 2, 3000, 1000, node.fill, node.hashes, node.bits)
    result = monitor.tick(11.0, [gave_up], POLICY, at=WALL)
    ((action, detail),) = [(d.action, d.detail) for d in result.decisions if d.node_id == "n1" and d.action != "flag"]
    assert action == "skip" and "gave the rebuild" in detail and "n1" not in monitor.in_flight
    monitor = SaturationMonitor()
    (plan,) = monitor.tick(10.0, [node], POLICY, at=WALL).rebuilds
    grown = FilterReading("n1", node.epoch + 1, 3000, plan.capacity, 0.3, plan.geometry.hashes, plan.geometry.bits)
    assert [d.action for d in monitor.tick(11.0, [grown], POLICY, at=WALL).decisions] == ["done"]


def test_a_concurrency_limit_of_zero_is_refused_with_the_way_to_pause_rebuilds() -> None:
    with pytest.raises(PolicyError, match="auto-rebuild=false"):
        POLICY.updated({"max-concurrent-rebuilds": "0"})
    assert POLICY.updated({"max-concurrent-rebuilds": "1"}).max_concurrent_rebuilds == 1
