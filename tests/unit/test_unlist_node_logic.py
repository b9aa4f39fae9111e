"""Unlisting a node: Admin.UnlistNode through the coordinator's one unlist path
(coordinator/operations.py), no sockets.

Expected behaviour (docs/coordinator.md, "Removing a node for good"): an unlisted node leaves
every table — replica column, hints, accounting, monitor, membership file — and is no longer
listed as stale; a connected node is refused with FAILED_PRECONDITION and nothing changes unless
force is set, and then its stream ends. Whether a key is listed is checked against a Bloom
filter built here from the same keys (a Bloom filter holds every inserted key: Bloom 1970).
"""

from __future__ import annotations

import asyncio
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import grpc
import pytest

from shardsieve.coordinator.accounting import ProbeOutcome
from shardsieve.coordinator.admin_service import AdminService
from shardsieve.coordinator.operations import Operations
from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.sync_service import SyncService, _Stream
from shardsieve.coordinator.wiring import CoordinatorState, wire_state
from shardsieve.bloom import CountingBloomFilter
from shardsieve.geometry import Geometry
from shardsieve.security import PeerIdentity
from shardsieve.stream_pump import StreamEnd
from shardsieve.sync.errors import NotOpened
from shardsieve.sync.node_side import SEND_BUDGET_BYTES, NodeSync
from shardsieve.v1 import admin_pb2, sync_pb2

G = Geometry(bits=4096, hashes=5, seed=2)
NOW = 50.0


class Aborted(Exception):
    def __init__(self, code: grpc.StatusCode, details: str) -> None:
        super().__init__(details)
        self.code, self.details = code, details


class FakeContext:
    def invocation_metadata(self) -> tuple:
        return ()

    async def abort(self, code: grpc.StatusCode, details: str) -> None:
        raise Aborted(code, details)


def call(admin_call: Any, request: Any) -> Any:
    """An Admin servicer call, run to its end on an event loop of its own."""
    return asyncio.run(admin_call(request, FakeContext()))


def ready_for_coordinator(node: NodeSync) -> list[sync_pb2.NodeMessage]:
    """What the node has ready for its stream "c" (as its driver takes it)."""
    ready = node.ready(NOW, {"c": SEND_BUDGET_BYTES})
    node.ack(ready)
    return list(ready.messages.get("c", ()))


@dataclass
class World:
    state: CoordinatorState
    streams: SyncService
    operations: Operations
    admin: AdminService


def sync_node(state: CoordinatorState, node_id: str, stream: int, keys: list[str]) -> NodeSync:
    """Open node_id's stream through the coordinator's shell and sync a replica of `keys` (as the servicer would)."""
    f = CountingBloomFilter(G)
    for k in keys:
        f.add(k)
    node = NodeSync(node_id, f"127.0.0.1:{7100 + stream}", f, epoch=1, capacity=400, target_fpr=0.01,
                    key_count=len(keys))
    node.connect("c", NOW)
    (hello,) = ready_for_coordinator(node)
    to_node = list(state.shell.open(stream, hello.hello, NOW).replies)
    for _ in range(20):
        for msg in to_node:
            node.receive("c", msg, NOW)
        out = ready_for_coordinator(node)
        if not out:
            break
        to_node = []
        for msg in out:
            to_node += state.shell.receive(node_id, stream, msg, NOW).replies
    return node


@pytest.fixture()
def world(tmp_path: Path) -> World:
    state = wire_state(Policy(mode="safe", stale_after_s=2.0), state_dir=tmp_path)
    streams = SyncService(state.shell, clock=lambda: NOW)
    state.shell.subscribe(streams.on_event)
    ops = Operations(state.shell, state.readings, state.monitor, state.policy, state.hints, state.membership,
                     streams.send, clock=lambda: NOW, wall=lambda: 1.0)
    admin = AdminService("coord-test", state.readings, ops, state.policy, state.shell, settled=streams.settled,
                         clock=lambda: NOW)
    sync_node(state, "node-gannet-1", 1, [f"sprat-{i}" for i in range(30)])
    sync_node(state, "node-gannet-2", 2, [f"eel-{i}" for i in range(30)])
    return World(state, streams, ops, admin)


def held_state(state: CoordinatorState, tmp_path: Path) -> dict[str, Any]:
    with state.shell.lock:
        return {"records": sorted((r.node_id, r.connected, r.has_replica) for r in state.readings.nodes(NOW)),
                "index": sorted(state.replicas.nodes()), "hints": len(state.hints),
                "accounting": sorted(state.accounting.snapshot()[0]),
                "membership": json.loads((tmp_path / "nodes.json").read_text())["nodes"]}


def hint_and_read(state: CoordinatorState) -> None:
    with state.shell.lock:
        state.hints.add(b"sprat-new", "node-gannet-1", 1, 99, applied=state.shell.position("node-gannet-1"), now=NOW)
        state.accounting.record_read([ProbeOutcome("node-gannet-1", consulted=True, listed_by_filter=True,
                                                   probed=True, found=True)])


def test_a_connected_node_is_refused_and_nothing_changes(world: World, tmp_path: Path) -> None:
    hint_and_read(world.state)
    before = held_state(world.state, tmp_path)
    assert "node-gannet-1" in before["membership"] and before["hints"] == 1
    with pytest.raises(Aborted) as refused:
        call(world.admin.UnlistNode, admin_pb2.UnlistNodeRequest(node_id="node-gannet-1"))
    assert refused.value.code == grpc.StatusCode.FAILED_PRECONDITION
    assert "connected" in refused.value.details and "force" in refused.value.details
    assert held_state(world.state, tmp_path) == before
    assert world.operations.decisions() == []


def test_a_disconnected_node_leaves_every_table_and_stops_being_listed_stale(world: World, tmp_path: Path) -> None:
    state = world.state
    hint_and_read(state)
    state.shell.close("node-gannet-1", 1, NOW)
    row = state.candidates.find([b"no-such-key"], NOW).rows()[0]
    assert [(c.node_id, c.stale) for c in row] == [("node-gannet-1", True)]       # listed stale (safe mode)

    reply = call(world.admin.UnlistNode, admin_pb2.UnlistNodeRequest(node_id="node-gannet-1"))
    assert (reply.node_id, reply.was_connected, reply.had_replica, reply.hints_dropped, reply.key_count) == \
        ("node-gannet-1", False, True, 1, 30)
    assert reply.address == "127.0.0.1:7101"
    after = held_state(state, tmp_path)
    assert after == {"records": [("node-gannet-2", True, True)], "index": ["node-gannet-2"], "hints": 0,
                     "accounting": ["node-gannet-2"], "membership": {"node-gannet-2": "127.0.0.1:7102"}}
    assert state.candidates.find([b"no-such-key", b"sprat-3"], NOW).rows() == [[], []]
    eel = state.candidates.find([b"eel-3"], NOW).rows()[0]
    assert [c.node_id for c in eel] == ["node-gannet-2"]                           # others untouched
    with state.shell.lock:
        assert state.shell.node("node-gannet-1") is None
    status = call(world.admin.FleetStatus, admin_pb2.FleetStatusRequest())
    assert [n.node_id for n in status.nodes] == ["node-gannet-2"]
    assert [(d.node_id, d.action) for d in world.operations.decisions()][-1] == ("node-gannet-1", "unlist")
    # a late message or close on the unlisted node's old stream must not bring it back
    with pytest.raises(NotOpened):
        state.shell.receive("node-gannet-1", 1, sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat()), NOW)
    assert state.shell.close("node-gannet-1", 1, NOW).events == ()
    assert state.readings.node_ids() == ["node-gannet-2"]
    # and a restarted coordinator does not remember it
    assert wire_state(Policy(), state_dir=tmp_path).readings.node_ids() == ["node-gannet-2"]


def test_force_unlists_a_connected_node_and_ends_its_stream(world: World) -> None:
    state = world.state
    stream = _Stream(2, PeerIdentity("127.0.0.1"), "127.0.0.1:40002")
    with state.shell.lock:
        world.streams._current["node-gannet-2"] = stream       # node-gannet-2's stream is open
    reply = call(world.admin.UnlistNode, admin_pb2.UnlistNodeRequest(node_id="node-gannet-2", force=True))
    assert reply.was_connected and reply.had_replica
    assert state.readings.node_ids() == ["node-gannet-1"] and "node-gannet-2" not in world.streams._current
    ended = stream.outbox.ended
    assert isinstance(ended, StreamEnd) and ended.code == grpc.StatusCode.ABORTED and "unlisted" in ended.details
    assert "forced while connected" in world.operations.decisions()[-1].detail
    # the node, if alive, reconnects and is synced as a new node
    sync_node(state, "node-gannet-2", 3, ["eel-1"])
    assert {r.node_id for r in state.readings.nodes(NOW) if r.has_replica} == {"node-gannet-1", "node-gannet-2"}


@pytest.mark.parametrize("node_id, code", [("node-never-seen", grpc.StatusCode.NOT_FOUND),
                                           ("", grpc.StatusCode.INVALID_ARGUMENT)])
def test_unknown_or_empty_ids_change_nothing(world: World, tmp_path: Path, node_id: str,
                                            code: grpc.StatusCode) -> None:
    before = held_state(world.state, tmp_path)
    with pytest.raises(Aborted) as err:
        call(world.admin.UnlistNode, admin_pb2.UnlistNodeRequest(node_id=node_id, force=True))
    assert err.value.code == code and held_state(world.state, tmp_path) == before
    if code == grpc.StatusCode.NOT_FOUND:
        assert "node-gannet-1, node-gannet-2" in err.value.details


@pytest.mark.parametrize("node_id", ["node-gannet-\u0031\u0301", "node-g\u0430nnet-1", "..", "node/gannet-1",
                                     "node-gannet-1\n", "NODE-GANNET-1"])
@pytest.mark.parametrize("entry", ["unlist", "detail", "rebuild"])
def test_admin_calls_refuse_ids_outside_the_alphabet_and_change_nothing(world: World, tmp_path: Path, node_id: str,
                                                                        entry: str) -> None:
    # docs/node.md, "Node ids": no node can have such an id (a look-alike of node-gannet-1
    # included), so the request is malformed: INVALID_ARGUMENT naming the rule, not NOT_FOUND
    before = held_state(world.state, tmp_path)
    decisions = len(world.operations.decisions())
    with pytest.raises(Aborted) as err:
        if entry == "unlist":
            call(world.admin.UnlistNode, admin_pb2.UnlistNodeRequest(node_id=node_id, force=True))
        elif entry == "detail":
            call(world.admin.NodeDetail, admin_pb2.NodeDetailRequest(node_id=node_id))
        else:
            call(world.admin.Rebuild, admin_pb2.RebuildCommand(node_ids=["node-gannet-2", node_id]))
    assert err.value.code == grpc.StatusCode.INVALID_ARGUMENT
    assert "a node id is 1 to 64 characters" in err.value.details and "nothing changed" in err.value.details
    assert held_state(world.state, tmp_path) == before and len(world.operations.decisions()) == decisions


def test_a_remembered_node_that_never_reconnected_can_be_unlisted(tmp_path: Path) -> None:
    (tmp_path / "nodes.json").write_text(json.dumps({"nodes": {"node-skua-9": "10.0.0.9:7100"}}))
    state = wire_state(Policy(), state_dir=tmp_path)
    ops = Operations(state.shell, state.readings, state.monitor, state.policy, state.hints, state.membership,
                     send=lambda messages: None, clock=lambda: NOW)
    assert [c.node_id for c in state.candidates.find([b"x"], NOW).rows()[0]] == ["node-skua-9"]   # stale forever otherwise
    gone = ops.unlist("node-skua-9")
    assert gone.address == "10.0.0.9:7100" and not gone.had_replica and not gone.was_connected
    assert state.candidates.find([b"x"], NOW).rows() == [[]]
    assert json.loads((tmp_path / "nodes.json").read_text()) == {"nodes": {}}
