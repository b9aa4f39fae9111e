"""ReadBatch / WriteBatch / RemoveBatch (coordinator/router_batches.py) over a coordinator's
in-process state and fake nodes that count their calls: one node batch call per node, per-key
results, per-key structured errors, limits refused before any node is asked.

Outside check: what a key's result says is compared with the fake nodes' own stores, and the
candidates with the simulated nodes' own BloomFilters (shardsieve/bloom.py).
"""

from __future__ import annotations

import asyncio
from collections import Counter
from typing import Any

import grpc
import pytest

from shardsieve import error_detail as ed
from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.probes import ProbeResult
from shardsieve.coordinator.router_batches import BatchRouter
from shardsieve.coordinator.router_service import Router, RouterError
from shardsieve.coordinator.wiring import wire_state
from shardsieve.testing.replica_fleet import SimNode, attach, push
from shardsieve.v1 import routing_pb2, storage_pb2


class Down(grpc.RpcError):
    def code(self) -> grpc.StatusCode:
        return grpc.StatusCode.UNAVAILABLE

    def details(self) -> str:
        return "connection refused"


class FakeNodes:
    """Node stores behind a Prober's `call`, counting (node, method) calls."""

    def __init__(self, node_ids: list[str]) -> None:
        self.stores: dict[str, dict[bytes, bytes]] = {n: {} for n in node_ids}
        self.calls: Counter[tuple[str, str]] = Counter()
        self.down: set[str] = set()
        self.sequence = 0

    async def call(self, node_id: str, address: str, method: str, request: Any, timeout: float) -> ProbeResult:
        self.calls[(node_id, method)] += 1
        if node_id in self.down:
            return ProbeResult(node_id, error=Down(), seconds=0.0)
        store = self.stores[node_id]
        if method == "BatchGet":
            return ProbeResult(node_id, reply=storage_pb2.BatchGetReply(items=[
                storage_pb2.GetReply(found=k in store, value=store.get(k, b"")) for k in request.keys]), seconds=0.0)
        if method == "BatchPut":
            acks = []
            for item in request.items:
                self.sequence += 1
                acks.append(storage_pb2.WriteAck(created=item.key not in store, epoch=1, sequence=self.sequence))
                store[item.key] = item.value
            return ProbeResult(node_id, reply=storage_pb2.BatchWriteAck(acks=acks), seconds=0.0)
        if method == "BatchDelete":
            return ProbeResult(node_id, reply=storage_pb2.BatchWriteAck(acks=[
                storage_pb2.WriteAck(created=store.pop(k, None) is not None) for k in request.keys]), seconds=0.0)
        raise AssertionError(method)


def make(max_items: int = 1000, max_bytes: int = 1 << 20) -> tuple[BatchRouter, FakeNodes, dict[str, SimNode]]:
    state = wire_state(Policy(stale_after_s=3600.0))
    nodes = {f"node-{i}": SimNode(f"node-{i}") for i in range(1, 5)}
    for node in nodes.values():
        attach(state.shell, node)
    fake = FakeNodes(list(nodes))
    router = Router(state.candidates, state.shell, state.membership, state.hints, state.accounting,
                    state.policy, fake)  # type: ignore[arg-type]
    return BatchRouter(router, max_items=max_items, max_bytes=max_bytes), fake, nodes


def seed(fake: FakeNodes, nodes: dict[str, SimNode], router: BatchRouter, owner: str, keys: list[bytes]) -> None:
    for key in keys:
        fake.stores[owner][key] = b"v:" + key
    nodes[owner].add(keys)
    push(router.router.shell, nodes[owner])


def test_read_batch_makes_one_call_per_candidate_node_and_answers_per_key() -> None:
    batches, fake, nodes = make()
    keys = [f"parcel/{i}".encode() for i in range(200)]
    for i, owner in enumerate(nodes):
        seed(fake, nodes, batches, owner, keys[i * 40:(i + 1) * 40])
    asked = keys + [b"absent/1", b"absent/2"]
    reply = asyncio.run(batches.read_many(asked))
    per_node = Counter(n for (n, m) in fake.calls if m == "BatchGet")
    assert per_node and set(per_node.values()) == {1}            # each node asked once
    assert reply.node_calls == len(per_node)
    for key, r in zip(asked, reply.results):
        holder = next((n for n, s in fake.stores.items() if key in s), None)
        assert r.found == (holder is not None) and not r.HasField("error")
        if holder:
            assert r.node_id == holder and r.value == b"v:" + key
        listed = [n for n, node in nodes.items() if node.bloom.contains(key)]
        assert r.candidates == len(listed)
    assert batches.router.accounting.totals.lookups == len(asked)   # one lookup per key, as Read counts


def test_a_down_node_fails_only_the_keys_it_may_hold_with_the_same_detail_as_read() -> None:
    batches, fake, nodes = make()
    seed(fake, nodes, batches, "node-2", [b"a/1"])
    seed(fake, nodes, batches, "node-3", [b"b/1"])
    fake.down.add("node-2")
    reply = asyncio.run(batches.read_many([b"a/1", b"b/1"]))
    err = reply.results[0].error
    assert err.code == grpc.StatusCode.UNAVAILABLE.value[0]
    assert err.detail.reason == ed.CANDIDATE_UNAVAILABLE and [n.node_id for n in err.detail.nodes] == ["node-2"]
    assert reply.results[1].found and not reply.results[1].HasField("error")


def test_limits_are_refused_naming_the_setting_before_any_node_is_asked() -> None:
    batches, fake, _ = make(max_items=10, max_bytes=100)
    for keys, setting in (([b"k%d" % i for i in range(11)], "max-batch-items"), ([b"x" * 60, b"y" * 60],
                                                                                  "max-batch-bytes")):
        with pytest.raises(RouterError) as exc:
            asyncio.run(batches.read_many(keys))
        assert exc.value.code == grpc.StatusCode.INVALID_ARGUMENT
        assert exc.value.detail is not None and exc.value.detail.setting == setting
    with pytest.raises(RouterError) as exc:
        asyncio.run(batches.write_many([routing_pb2.WriteRequest(key=b"", value=b"v")]))
    assert exc.value.detail.reason == ed.INVALID_INPUT  # type: ignore[union-attr]
    assert not fake.calls


def test_write_batch_groups_puts_per_target_holds_hints_and_refuses_second_copies() -> None:
    batches, fake, nodes = make()
    seed(fake, nodes, batches, "node-1", [b"old/1"])
    items = [routing_pb2.WriteRequest(key=f"new/{i}".encode(), value=b"n") for i in range(30)]
    items.append(routing_pb2.WriteRequest(key=b"old/1", value=b"updated"))             # lands where it lives
    items.append(routing_pb2.WriteRequest(key=b"old/1", value=b"x", node_id="node-3"))  # second copy: refused
    reply = asyncio.run(batches.write_many(items))
    puts = Counter(n for (n, m) in fake.calls if m == "BatchPut")
    assert set(puts.values()) == {1}
    assert reply.results[30].reply.node_id == "node-1" and fake.stores["node-1"][b"old/1"] == b"updated"
    second = reply.results[31].error
    assert second.detail.reason == ed.SECOND_COPY and list(second.detail.holders) == ["node-1"]
    assert second.detail.effect == ed.EFFECT_NONE and b"old/1" not in fake.stores["node-3"]
    # read-your-writes: every new key is listed for its node before any delta arrives
    rows = batches.router.locate([it.key for it in items[:30]], "read")
    for it, r, row in zip(items, reply.results, rows):
        assert r.reply.node_id in {c.node_id for c in row}
        assert fake.stores[r.reply.node_id][it.key] == b"n"


def test_a_move_in_a_batch_deletes_the_old_copies_with_one_call_per_old_holder() -> None:
    batches, fake, nodes = make()
    seed(fake, nodes, batches, "node-1", [b"m/1", b"m/2"])
    items = [routing_pb2.WriteRequest(key=k, value=b"moved", node_id="node-4", move=True) for k in (b"m/1", b"m/2")]
    reply = asyncio.run(batches.write_many(items))
    assert [list(r.reply.moved_from) for r in reply.results] == [["node-1"], ["node-1"]]
    assert fake.calls[("node-1", "BatchDelete")] == 1
    assert b"m/1" not in fake.stores["node-1"] and fake.stores["node-4"][b"m/2"] == b"moved"


def test_remove_batch_reports_who_deleted_each_key() -> None:
    batches, fake, nodes = make()
    seed(fake, nodes, batches, "node-2", [b"r/1"])
    reply = asyncio.run(batches.remove_many([b"r/1", b"r/none"]))
    assert list(reply.results[0].node_ids) == ["node-2"] and not reply.results[1].node_ids
    assert set(Counter(n for (n, m) in fake.calls if m == "BatchDelete").values()) == {1}

