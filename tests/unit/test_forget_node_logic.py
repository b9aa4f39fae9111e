"""Decommissioning: Admin.ForgetNode through SyncService.forget and Fleet.forget, no sockets.

Expected behaviour (docs/coordinator.md, "Decommissioning a node"): a forgotten node leaves
every table — replica column, hints, accounting, membership file — and is no longer listed as
stale; a connected node is refused with FAILED_PRECONDITION and nothing changes unless force is
set. Whether a key is listed is checked against a Bloom filter built here from the same keys
(a Bloom filter holds every inserted key: Bloom 1970).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import grpc
import pytest

from shardsieve.coordinator.accounting import ProbeOutcome
from shardsieve.coordinator.admin_service import AdminService
from shardsieve.coordinator.fleet import Fleet
from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.sync_service import SyncService, _Failure
from shardsieve.bloom import CountingBloomFilter
from shardsieve.geometry import Geometry
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

    def abort(self, code: grpc.StatusCode, details: str) -> None:
        raise Aborted(code, details)


def ready_for_coordinator(node: NodeSync) -> list[sync_pb2.NodeMessage]:
    """What the node has ready for its stream "c" (as its driver takes it)."""
    ready = node.ready(NOW, {"c": SEND_BUDGET_BYTES})
    node.ack(ready)
    return list(ready.messages.get("c", ()))


def sync_node(svc: SyncService, node_id: str, stream: int, keys: list[str]) -> NodeSync:
    """Open node_id's stream on the protocol object and sync a replica of `keys` (as the servicer would)."""
    f = CountingBloomFilter(G)
    for k in keys:
        f.add(k)
    node = NodeSync(node_id, f"127.0.0.1:{7100 + stream}", f, epoch=1, capacity=400, target_fpr=0.01,
                    key_count=len(keys))
    node.connect("c", NOW)
    (hello,) = ready_for_coordinator(node)
    with svc.lock:
        to_node = svc.sync.open(stream, hello.hello, NOW)
    for _ in range(20):
        for msg in to_node:
            node.receive("c", msg, NOW)
        out = ready_for_coordinator(node)
        if not out:
            break
        to_node = []
        for msg in out:
            with svc.lock:
                to_node += svc.sync.receive(node_id, stream, msg, NOW)
    svc.refresh()
    return node


@pytest.fixture()
def world(tmp_path: Path) -> tuple[Fleet, SyncService, AdminService]:
    fleet = Fleet(Policy(mode="safe", stale_after_s=2.0), state_dir=tmp_path)
    svc = SyncService(fleet, clock=lambda: NOW)
    admin = AdminService(fleet, "coord-test", "", lambda plan, now: None, clock=lambda: NOW, wall=lambda: 1.0,
                         forget_node=svc.forget)
    sync_node(svc, "node-gannet-1", 1, [f"sprat-{i}" for i in range(30)])
    sync_node(svc, "node-gannet-2", 2, [f"eel-{i}" for i in range(30)])
    return fleet, svc, admin


def state(fleet: Fleet, tmp_path: Path) -> dict[str, Any]:
    return {"records": sorted((r.node_id, r.connected, r.synced) for r in fleet.records()),
            "index": sorted(fleet.index.nodes()), "hints": len(fleet.hints),
            "accounting": sorted(fleet.accounting.snapshot()[0]),
            "membership": json.loads((tmp_path / "nodes.json").read_text())["nodes"]}


def test_a_connected_node_is_refused_and_nothing_changes(world, tmp_path: Path) -> None:
    fleet, svc, admin = world
    fleet.add_hint(b"sprat-new", "node-gannet-1", 1, 99, now=NOW)
    fleet.record_read([ProbeOutcome("node-gannet-1", consulted=True, listed_by_filter=True, probed=True, found=True)])
    before = state(fleet, tmp_path)
    assert "node-gannet-1" in before["membership"] and before["hints"] == 1
    with pytest.raises(Aborted) as refused:
        admin.ForgetNode(admin_pb2.ForgetNodeRequest(node_id="node-gannet-1"), FakeContext())
    assert refused.value.code == grpc.StatusCode.FAILED_PRECONDITION
    assert "connected" in refused.value.details and "force" in refused.value.details
    assert state(fleet, tmp_path) == before and svc.sync.is_connected("node-gannet-1")


def test_a_disconnected_node_leaves_every_table_and_stops_being_listed_stale(world, tmp_path: Path) -> None:
    fleet, svc, admin = world
    fleet.add_hint(b"sprat-new", "node-gannet-1", 1, 99, now=NOW)
    fleet.record_read([ProbeOutcome("node-gannet-1", consulted=True, listed_by_filter=True, probed=True, found=True)])
    with svc.lock:
        svc.sync.close("node-gannet-1", 1, NOW)
        stale_view, generation = svc.sync.node("node-gannet-1"), svc._forgets.get("node-gannet-1", 0)
    svc.refresh()
    row = fleet.candidates([b"no-such-key"], NOW)[0]
    assert [(c.node_id, c.stale) for c in row] == [("node-gannet-1", True)]       # listed stale (safe mode)

    reply = admin.ForgetNode(admin_pb2.ForgetNodeRequest(node_id="node-gannet-1"), FakeContext())
    assert (reply.node_id, reply.was_connected, reply.had_replica, reply.hints_dropped, reply.key_count) == \
        ("node-gannet-1", False, True, 1, 30)
    after = state(fleet, tmp_path)
    assert after == {"records": [("node-gannet-2", True, True)], "index": ["node-gannet-2"], "hints": 0,
                     "accounting": ["node-gannet-2"], "membership": {"node-gannet-2": "127.0.0.1:7102"}}
    assert fleet.candidates([b"no-such-key", b"sprat-3"], NOW) == [[], []]
    eel = fleet.candidates([b"eel-3"], NOW)[0]
    assert [c.node_id for c in eel] == ["node-gannet-2"]                           # others untouched
    assert "node-gannet-1" not in svc.sync.node_ids()
    status = admin.FleetStatus(admin_pb2.FleetStatusRequest(), FakeContext())
    assert [n.node_id for n in status.nodes] == ["node-gannet-2"]
    assert [(d.node_id, d.action) for d in fleet.decisions][-1] == ("node-gannet-1", "forget")
    # a view taken before the forget but handed over after it must not bring the node back
    svc._observe(stale_view, generation)
    assert [r.node_id for r in fleet.records()] == ["node-gannet-2"]
    # and a restarted coordinator does not remember it
    assert [r.node_id for r in Fleet(Policy(), state_dir=tmp_path).records()] == ["node-gannet-2"]


def test_force_forgets_a_connected_node_and_ends_its_stream(world) -> None:
    fleet, svc, admin = world
    import queue

    box: queue.Queue = queue.Queue()
    svc._outbox["node-gannet-2"] = box
    reply = admin.ForgetNode(admin_pb2.ForgetNodeRequest(node_id="node-gannet-2", force=True), FakeContext())
    assert reply.was_connected and reply.had_replica
    assert [r.node_id for r in fleet.records()] == ["node-gannet-1"] and "node-gannet-2" not in svc._outbox
    ended = box.get_nowait()
    assert isinstance(ended, _Failure) and ended.code == grpc.StatusCode.ABORTED
    # the node, if alive, reconnects and is synced as a new node
    sync_node(svc, "node-gannet-2", 3, ["eel-1"])
    assert {r.node_id for r in fleet.records() if r.synced} == {"node-gannet-1", "node-gannet-2"}


@pytest.mark.parametrize("node_id, code", [("node-never-seen", grpc.StatusCode.NOT_FOUND),
                                           ("", grpc.StatusCode.INVALID_ARGUMENT)])
def test_unknown_or_empty_ids_change_nothing(world, tmp_path: Path, node_id: str, code: grpc.StatusCode) -> None:
    fleet, _, admin = world
    before = state(fleet, tmp_path)
    with pytest.raises(Aborted) as err:
        admin.ForgetNode(admin_pb2.ForgetNodeRequest(node_id=node_id, force=True), FakeContext())
    assert err.value.code == code and state(fleet, tmp_path) == before


def test_a_remembered_node_that_never_reconnected_can_be_forgotten(tmp_path: Path) -> None:
    (tmp_path / "nodes.json").write_text(json.dumps({"nodes": {"node-skua-9": "10.0.0.9:7100"}}))
    fleet = Fleet(Policy(), state_dir=tmp_path)
    svc = SyncService(fleet, clock=lambda: NOW)
    assert [c.node_id for c in fleet.candidates([b"x"], NOW)[0]] == ["node-skua-9"]   # stale forever otherwise
    result = svc.forget("node-skua-9")
    assert result["address"] == "10.0.0.9:7100" and not result["had_replica"]
    assert fleet.candidates([b"x"], NOW) == [[]]
    assert json.loads((tmp_path / "nodes.json").read_text()) == {"nodes": {}}
    _ = sync_pb2  # (the stream messages above are sync_pb2 types)
