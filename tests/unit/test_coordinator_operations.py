"""The coordinator's shell, event subscribers, readings and operations, over the real protocol
object fed with real sync messages; no sockets, no threads.

Expected behaviour: docs/coordinator.md ("Freshness contract", "Accounting and saturation",
"Removing a node for good") and docs/architecture.md#how-events-flow (every event of a call
reaches every subscriber, in order, under the coordinator's lock). Saturation figures are
checked against the Bloom filter's expected fill 1 - e^(-kn/m) (Broder & Mitzenmacher 2004,
section 2), computed here.
"""

from __future__ import annotations

import json
import logging
import math
from pathlib import Path

import pytest

from shardsieve.bloom import BloomFilter
from shardsieve.coordinator.membership import Membership
from shardsieve.coordinator.metrics import Metrics
from shardsieve.coordinator.operations import Operations
from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.saturation import RebuildLimits, SaturationMonitor
from shardsieve.coordinator.accounting import ProbeOutcome
from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.coordinator.wiring import CoordinatorState, wire_state
from shardsieve.geometry import Geometry
from shardsieve.sync.coordinator_side import (
    CoordinatorSync,
    DictReplicaSink,
    ResyncRequested,
    StreamOpened,
)
from shardsieve.testing.replica_feed import NodeFeed
from shardsieve.v1 import sync_pb2

T0 = 1000.0
SMALL = Geometry(bits=1024, hashes=3, seed=1)
POLICY = Policy(target_fpr=0.01, saturation_ratio=2.0, growth=2.0, min_capacity=100, stale_after_s=2.0)


def _keys(prefix: str, n: int) -> list[bytes]:
    return [f"{prefix}-{i}".encode() for i in range(n)]


class Sent:
    """Stands in for the stream transport: what would go out on the nodes' streams."""

    def __init__(self) -> None:
        self.messages: list[sync_pb2.CoordinatorMessage] = []

    def __call__(self, messages) -> None:
        self.messages.extend(messages)


def _coordinator(policy: Policy = POLICY, **kw) -> tuple[CoordinatorState, Operations, Sent, Metrics]:
    state = wire_state(policy, **kw)
    metrics = Metrics()
    state.shell.subscribe(metrics.on_event)
    sent = Sent()
    ops = Operations(state.shell, state.readings, state.monitor, state.policy, state.hints, state.membership, sent,
                     clock=lambda: T0, wall=lambda: 5000.0)
    return state, ops, sent, metrics


def _full_node(state: CoordinatorState, node_id: str = "node-wrack-1", keys: int = 1000) -> NodeFeed:
    """A node whose 1024-bit filter holds `keys` keys at capacity `keys`: far past the target."""
    bloom = BloomFilter(SMALL)
    bloom.add_batch(_keys(node_id, keys))
    feed = NodeFeed(state.shell, node_id, bloom, address="127.0.0.1:7201", capacity=keys, key_count=keys)
    feed.connect(T0)
    return feed


# ----------------------------------------------------------------------------- the shell


def test_every_event_reaches_every_subscriber_in_order_and_a_failing_one_does_not_stop_them(caplog) -> None:
    seen: list[tuple[str, str]] = []

    def broken(event) -> None:
        raise RuntimeError("a subscriber bug")

    shell = CoordinatorShell(CoordinatorSync(DictReplicaSink()), [
        lambda e: seen.append(("first", type(e).__name__)), broken,
        lambda e: seen.append(("last", type(e).__name__))])
    hello = NodeFeed(shell, "node-wrack-2", BloomFilter(SMALL)).hello()
    with caplog.at_level(logging.ERROR, logger="shardsieve.coordinator.shell"):
        result = shell.open("s1", hello, T0)
    assert [type(e) for e in result.events] == [StreamOpened, ResyncRequested]
    assert seen == [("first", "StreamOpened"), ("last", "StreamOpened"),
                    ("first", "ResyncRequested"), ("last", "ResyncRequested")]
    assert len([r for r in caplog.records if r.getMessage() == "event subscriber failed"]) == 2


# ----------------------------------------------------------------------------- subscribers


def test_membership_persists_addresses_and_drops_unlisted_nodes(tmp_path: Path, caplog) -> None:
    path = tmp_path / "nodes.json"
    membership = Membership({"node-expected-1": "10.0.0.1:7100"}, tmp_path)
    assert membership.node_ids() == ["node-expected-1"] and not path.exists()   # nothing changed yet
    membership.on_event(StreamOpened("node-new-2", 1, "10.0.0.2:7100", False, None))
    assert json.loads(path.read_text()) == {"nodes": {"node-expected-1": "10.0.0.1:7100",
                                                      "node-new-2": "10.0.0.2:7100"}}
    membership.on_event(StreamOpened("node-new-2", 2, "", True, 1))      # no address: the known one stays
    membership.on_event(StreamOpened("node-new-2", 3, "10.0.0.9:7100", True, 2))
    assert Membership(state_dir=tmp_path).address("node-new-2") == "10.0.0.9:7100"   # a restart reads it back
    state = wire_state(Policy(), state_dir=tmp_path)
    Operations(state.shell, state.readings, state.monitor, state.policy, state.hints, state.membership,
               Sent()).unlist("node-expected-1")
    assert json.loads(path.read_text()) == {"nodes": {"node-new-2": "10.0.0.9:7100"}}
    path.write_text("{not json")
    with caplog.at_level(logging.WARNING, logger="shardsieve.coordinator.membership"):
        assert Membership(state_dir=tmp_path).node_ids() == []
    assert any("unreadable" in r.getMessage() for r in caplog.records)


def test_a_new_epoch_restarts_the_observed_fpr() -> None:
    state, _, _, metrics = _coordinator()
    feed = NodeFeed(state.shell, "node-wrack-3", BloomFilter(SMALL), address="127.0.0.1:7203")
    feed.connect(T0)
    wasted = ProbeOutcome("node-wrack-3", consulted=True, listed_by_filter=True, probed=True, found=False)
    with state.shell.lock:
        for _ in range(10):
            state.accounting.record_read([wasted])
    assert state.readings.node("node-wrack-3", T0).counters.false_positives == 10
    feed.snapshot(T0)                         # the same state again: not installed, nothing restarts
    assert state.readings.node("node-wrack-3", T0).counters.false_positives == 10
    feed.epoch, feed.sequence = 2, 0          # a rebuilt filter (a new epoch) installed
    feed.snapshot(T0)
    counters = state.readings.node("node-wrack-3", T0).counters
    assert (counters.false_positives, counters.lookups_checked, counters.wasted_probes) == (0, 0, 10)
    assert metrics.registry.get_sample_value("shardsieve_coordinator_snapshots_installed_total") == 2   # first + new epoch


# ----------------------------------------------------------------------------- readings


def test_node_states_in_status() -> None:
    state, ops, _, _ = _coordinator(expected={"node-wrack-9": "127.0.0.1:7209"})
    read = state.readings.node
    assert read("node-wrack-9", T0).state == "disconnected" and read("node-wrack-9", T0).stale
    feed = NodeFeed(state.shell, "node-wrack-4", BloomFilter(SMALL), address="127.0.0.1:7204")
    feed.stream_id = "s4"
    state.shell.open("s4", feed.hello(), T0)             # Hello answered, no snapshot yet
    assert read("node-wrack-4", T0).state == "syncing"
    feed.snapshot(T0)
    assert read("node-wrack-4", T0 + 1).state == "fresh" and not read("node-wrack-4", T0 + 1).stale
    assert read("node-wrack-4", T0 + 2.5).state == "stale"                   # not heard for 2.5 s > 2 s
    feed.heartbeat(T0 + 3, rebuild_phase="scanning", rebuild_progress=0.25)
    node = read("node-wrack-4", T0 + 3)
    assert node.state == "rebuilding" and node.stats.rebuild_progress == 0.25
    feed.heartbeat(T0 + 3)
    feed.skip(T0 + 3)                                    # a gap: waiting for a snapshot
    assert read("node-wrack-4", T0 + 3).state == "syncing" and read("node-wrack-4", T0 + 3).stale
    feed.close(T0 + 3)
    assert read("node-wrack-4", T0 + 3).state == "disconnected"
    assert [n.node_id for n in state.readings.nodes(T0)] == ["node-wrack-4", "node-wrack-9"]


def test_fill_and_predicted_fpr_follow_the_replica() -> None:
    state, _, _, _ = _coordinator()
    feed = _full_node(state, keys=200)
    node = state.readings.node("node-wrack-1", T0)
    assert node.set_bits == feed.bloom.set_count()
    expected_fill = -math.expm1(-SMALL.hashes * 200 / SMALL.bits)     # 1 - e^(-kn/m)
    assert node.fill == pytest.approx(expected_fill, abs=0.05)
    assert node.predicted_fpr == pytest.approx(node.fill ** SMALL.hashes)
    feed.add(_keys("more", 50), T0)
    assert state.readings.node("node-wrack-1", T0).set_bits == feed.bloom.set_count() > node.set_bits


# ----------------------------------------------------------------------------- operations


def test_the_monitor_pass_flags_asks_for_a_rebuild_and_sees_it_done() -> None:
    state, ops, sent, metrics = _coordinator()
    feed = _full_node(state)
    ops.tick()
    actions = [(d.node_id, d.action) for d in ops.decisions()]
    assert actions == [("node-wrack-1", "flag"), ("node-wrack-1", "rebuild")]
    (request,) = sent.messages
    assert request.node_id == "node-wrack-1" and request.rebuild.capacity == 2000   # growth 2 x 1000 keys
    assert state.readings.fleet(T0).rebuilds_in_progress == 1
    assert metrics.registry.get_sample_value("shardsieve_coordinator_rebuild_requests_total", {"action": "rebuild"}) == 1
    assert state.readings.node("node-wrack-1", T0).state == "rebuilding"
    ops.tick()                                            # still in flight: nothing new
    assert len(ops.decisions()) == 2 and len(sent.messages) == 1
    feed.epoch, feed.sequence, feed.capacity = 2, 0, 2000
    feed.bloom = BloomFilter(Geometry(bits=1 << 15, hashes=7, seed=1))
    feed.bloom.add_batch(_keys("node-wrack-1", 1000))
    feed.snapshot(T0)
    ops.tick()
    assert [d.action for d in ops.decisions()][-1] == "done" and state.readings.fleet(T0).rebuilds_in_progress == 0


def test_a_rebuild_for_a_node_without_a_stream_is_skipped_and_frees_its_slot() -> None:
    state, ops, sent, _ = _coordinator()
    feed = _full_node(state)
    (plan,) = ops.plan_rebuilds(["node-wrack-1"], flagged=False, capacity=4000)
    assert not plan.queued and plan.capacity == 4000 and plan.geometry is not None
    feed.close(T0)
    ops.rebuild([plan])
    assert sent.messages == [] and [d.action for d in ops.decisions()] == ["skip"]
    assert "not connected" in ops.decisions()[0].detail and state.readings.fleet(T0).rebuilds_in_progress == 0
    with pytest.raises(KeyError):
        ops.plan_rebuilds(["node-nobody"], flagged=False)
    assert ops.synced_nodes() == ["node-wrack-1"]


def test_an_operator_rebuild_is_sent_recorded_and_holds_a_slot_and_a_queued_one_starts_when_it_frees() -> None:
    # docs/coordinator.md, "Accounting and saturation": a requested rebuild is started or queued for
    # real (the coordinator starts it when a slot frees), never left waiting
    state, ops, sent, _ = _coordinator(Policy(min_capacity=100, max_concurrent_rebuilds=1, auto_rebuild=False))
    first = _full_node(state, "node-wrack-5")
    _full_node(state, "node-wrack-6")
    plans = ops.plan_rebuilds([], flagged=True)
    assert [(p.node_id, p.queued, p.refused) for p in plans] == [("node-wrack-5", False, ""),
                                                                 ("node-wrack-6", True, "")]
    assert all(p.filter_bytes == p.geometry.byte_size for p in plans)
    ops.rebuild(plans)
    assert [m.node_id for m in sent.messages] == ["node-wrack-5"]
    assert [(d.node_id, d.action) for d in ops.decisions()] == [("node-wrack-5", "rebuild"),
                                                                ("node-wrack-6", "queued")]
    assert state.readings.fleet(T0).rebuilds_in_progress == 1
    ops.tick()                                             # no slot yet: it keeps waiting
    assert [m.node_id for m in sent.messages] == ["node-wrack-5"]
    (again,) = ops.plan_rebuilds(["node-wrack-6"], flagged=False)     # asking twice is refused, not doubled
    assert "already rebuilding (or waiting for a slot)" in again.refused
    first.epoch, first.sequence, first.capacity = 2, 0, plans[0].capacity   # node-wrack-5 switched to its
    first.bloom = BloomFilter(plans[0].geometry)                             # rebuilt filter
    first.bloom.add_batch(_keys("node-wrack-5", 1000))
    first.snapshot(T0)
    ops.tick()
    assert [m.node_id for m in sent.messages] == ["node-wrack-5", "node-wrack-6"]
    assert [(d.node_id, d.action) for d in ops.decisions()][-2:] == [("node-wrack-5", "done"),
                                                                     ("node-wrack-6", "rebuild")]


def test_a_rebuild_past_a_coordinator_limit_or_the_memory_cap_is_refused_before_anything_starts() -> None:
    # docs/coordinator.md, "Accounting and saturation": a filter above max-filter-bits would be
    # refused on the node's stream (stranding its rebuild); one that takes the replicas above
    # max-replica-bytes would exhaust the coordinator. Both are refused with the reason, and a
    # disconnected node cannot be asked at all.
    limits = RebuildLimits(max_filter_bits=1 << 14, max_snapshot_chunks=4096, max_replica_bytes=1 << 20)
    state, ops, sent, _ = _coordinator(Policy(min_capacity=100), monitor=SaturationMonitor(limits=limits))
    feed = _full_node(state, "node-wrack-7")
    (big,) = ops.plan_rebuilds(["node-wrack-7"], flagged=False, capacity=200_000)
    assert "setting max-filter-bits" in big.refused and big.filter_bytes == big.geometry.byte_size > (1 << 14) // 8
    (ok,) = ops.plan_rebuilds(["node-wrack-7"], flagged=False, capacity=1000)
    assert ok.refused == "" and ok.geometry.bits <= 1 << 14
    assert ok.replica_bytes_after > state.readings.replica_bytes() - SMALL.byte_size
    (huge,) = ops.plan_rebuilds(["node-wrack-7"], flagged=False, capacity=10**13)
    assert "largest geometry" in huge.refused and huge.geometry is None
    capped = RebuildLimits(max_filter_bits=1 << 30, max_snapshot_chunks=4096, max_replica_bytes=1 << 12)
    state.monitor.limits = capped
    (over,) = ops.plan_rebuilds(["node-wrack-7"], flagged=False, capacity=50_000)
    assert "setting max-replica-bytes" in over.refused
    state.monitor.limits = limits
    feed.close(T0)
    (gone,) = ops.plan_rebuilds(["node-wrack-7"], flagged=False, capacity=1000)
    assert "stale or disconnected" in gone.refused
    assert sent.messages == [] and ops.decisions() == []


def test_the_monitor_pass_measures_durations_on_the_monotonic_clock_and_stamps_the_wall_clock() -> None:
    # docs/coordinator.md, "Accounting and saturation": the rebuild timeout is a duration (the
    # monotonic clock); decisions show people the wall clock (Admin.Decisions at_unix)
    mono, wall = [T0], [1_700_000_000.0]
    state = wire_state(POLICY, monitor=SaturationMonitor(rebuild_timeout_s=60.0))
    ops = Operations(state.shell, state.readings, state.monitor, state.policy, state.hints, state.membership,
                     Sent(), clock=lambda: mono[0], wall=lambda: wall[0])
    _full_node(state)
    ops.tick()
    assert [(d.action, d.at) for d in ops.decisions()] == [("flag", wall[0]), ("rebuild", wall[0])]
    wall[0] += 86_400.0                  # the wall clock jumps a day ahead; 5 monotonic seconds pass
    mono[0] += 5.0
    ops.tick()
    assert [d.action for d in ops.decisions()] == ["flag", "rebuild"]          # no timeout
    assert state.readings.fleet(mono[0]).rebuilds_in_progress == 1
    wall[0] -= 2 * 86_400.0              # ...then a day behind the start; 61 monotonic seconds have passed
    mono[0] = T0 + 61.0
    ops.tick()
    last = ops.decisions()[-1]
    assert (last.action, last.at) == ("skip", wall[0]) and "not verified within 60s" in last.detail


def test_a_pass_over_readings_gathered_in_parts_leaves_out_a_node_unlisted_meanwhile() -> None:
    """The daemon gathers a large fleet's readings in parts (CoordinatorDaemon.monitor_pass); a
    node unlisted between the gathering and the pass is not assessed, the others are."""
    state, ops, sent, _ = _coordinator()
    _full_node(state, "node-wrack-1")
    _full_node(state, "node-wrack-2")
    ids = state.readings.node_ids()
    readings = state.readings.filters(T0, ids[:1]) + state.readings.filters(T0, ids[1:])
    assert [r.node_id for r in readings] == ["node-wrack-1", "node-wrack-2"]
    ops.unlist("node-wrack-1", force=True)
    ops.tick(readings)
    assert {(d.node_id, d.action) for d in ops.decisions() if d.action != "unlist"} == {
        ("node-wrack-2", "flag"), ("node-wrack-2", "rebuild")}
    assert [m.node_id for m in sent.messages if m.WhichOneof("body") == "rebuild"] == ["node-wrack-2"]
