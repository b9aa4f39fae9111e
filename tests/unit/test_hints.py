"""Read-your-writes hints: when they may go (coordinator/hints.py; Router.hold_hint and
Operations.expire_hints around it).

Rule under test (docs/coordinator.md, freshness contract (b); docs/sync-protocol.md, "The
rebuild hand-over"): a hint goes only once the key is certainly routable without it — the
replica reached the acknowledged (epoch, sequence), or the old-epoch position a write made
during a hand-over also landed at — or, as a last resort, after hint-max-age-s.

The end-to-end tests run a real NodeCore (store + counting filter + NodeSync) against a real
CoordinatorSync behind the coordinator's shell (its events reach the hint table), message by
message, and check after every message,
for every key written through the Router, that the node is a candidate. Whether the replica
really holds a key is judged independently of the project's code: the key's k positions are
recomputed from mmh3 by the published Kirsch–Mitzenmacher recipe (Kirsch & Mitzenmacher 2006;
mmh3 is the reference MurmurHash3 library) and a Bloom filter holds a key iff all k are set
(Bloom 1970).
"""

from __future__ import annotations

import asyncio
import logging
from collections import deque
from typing import Any

import mmh3
import pytest

from shardsieve.bloom import BloomFilter
from shardsieve.coordinator.hints import HintTable
from shardsieve.coordinator.metrics import FleetCollector
from shardsieve.coordinator.operations import Operations
from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.probes import ProbeResult
from shardsieve.coordinator.router_service import Router
from shardsieve.coordinator.wiring import CoordinatorState, wire_state
from shardsieve.node.core import Limits, NodeCore
from shardsieve.node.service import _ack
from shardsieve.node.store import MemoryStore
from shardsieve.geometry import Geometry
from shardsieve.testing.replica_feed import NodeFeed
from shardsieve.v1 import filter_pb2, storage_pb2, sync_pb2

NODE = "node-heron-2"
PEER = "coord-1"


# ----------------------------------------------------------------------------- the table alone

def test_a_covered_hint_drops_and_an_uncovered_one_stays() -> None:
    hints = HintTable()
    assert hints.add(b"crate-7", NODE, epoch=3, sequence=10)
    assert hints.add(b"crate-8", NODE, epoch=3, sequence=12)
    assert not hints.add(b"crate-9", NODE, epoch=3, sequence=4, applied=(3, 4))   # already applied
    assert hints.applied(NODE, 3, 9) == 0                 # one short of 10: nothing drops early
    assert hints.lookup(b"crate-7") == [NODE]
    assert hints.applied(NODE, 3, 10) == 1
    assert hints.lookup(b"crate-7") == [] and hints.lookup(b"crate-8") == [NODE]
    assert hints.applied(NODE, 4, 0) == 1                 # a later epoch (verified snapshot) covers too
    assert len(hints) == 0


def test_the_old_epoch_position_covers_only_in_that_exact_epoch() -> None:
    hints = HintTable()
    # written during a hand-over from epoch 5 to 6: new position (6, 3), old position (5, 40)
    assert hints.add(b"tote-1", NODE, epoch=6, sequence=3, old=(5, 40))
    assert hints.applied(NODE, 4, 99) == 0                # an earlier epoch never covers
    assert hints.applied(NODE, 5, 39) == 0                # old epoch, one short
    assert hints.lookup(b"tote-1") == [NODE]
    assert hints.applied(NODE, 5, 40) == 1                # (the abandoned-rebuild path)
    assert len(hints) == 0 and hints.nodes() == []
    # a replica that switched to the new epoch short of the new position: the old one no longer helps
    assert hints.add(b"tote-2", NODE, epoch=6, sequence=5, old=(5, 50))
    assert hints.applied(NODE, 6, 4) == 0
    assert hints.lookup(b"tote-2") == [NODE]
    assert hints.applied(NODE, 6, 5) == 1 and len(hints) == 0


def test_a_later_write_of_the_same_key_replaces_the_earlier_hint() -> None:
    hints = HintTable()
    hints.add(b"bin-2", NODE, epoch=1, sequence=5, now=0.0)
    hints.add(b"bin-2", NODE, epoch=1, sequence=8, now=10.0)
    assert len(hints) == 1
    assert hints.applied(NODE, 1, 5) == 0                 # the first write's delta: the key may be
    assert hints.lookup(b"bin-2") == [NODE]               # deleted and written again after it
    assert hints.expire(now=65.0, max_age_s=60.0) == []   # the first write's age is not the hint's
    (gone,) = hints.expire(now=70.0, max_age_s=60.0)
    assert gone.position == (1, 8) and len(hints) == 0


def test_age_expiry_drops_only_old_hints_and_returns_their_numbers() -> None:
    hints = HintTable()
    hints.add(b"a", NODE, epoch=2, sequence=1, now=100.0)
    hints.add(b"b", "node-ibis-1", epoch=7, sequence=4, old=(6, 11), now=130.0)
    hints.add(b"c", NODE, epoch=2, sequence=2)            # no time: never ages out
    assert hints.expire(now=399.9, max_age_s=300.0) == []
    (a,) = hints.expire(now=400.0, max_age_s=300.0)
    assert (a.key, a.node_id, a.position, a.added_at) == (b"a", NODE, (2, 1), 100.0)
    (b,) = hints.expire(now=10_000.0, max_age_s=300.0)
    assert (b.node_id, b.position, b.old) == ("node-ibis-1", (7, 4), (6, 11))
    assert hints.lookup(b"c") == [NODE] and len(hints) == 1


def test_drop_node_drops_every_hint_of_that_node_only() -> None:
    hints = HintTable()
    for i in range(5):
        hints.add(f"k{i}".encode(), NODE, epoch=1, sequence=i + 1, old=(0, i), now=float(i))
    hints.add(b"k0", "node-ibis-1", epoch=1, sequence=1, now=0.0)
    assert hints.drop_node(NODE) == 5
    assert len(hints) == 1 and hints.lookup(b"k0") == ["node-ibis-1"]
    assert hints.expire(now=1e9, max_age_s=1.0)[0].node_id == "node-ibis-1"


# ----------------------------------------------------------------------------- end to end

def kirsch_mitzenmacher(key: bytes, g: Geometry) -> list[int]:
    """Positions by the published recipe, from mmh3 alone (docs/hash-scheme.md)."""
    digest = mmh3.mmh3_x64_128_digest(key, g.seed)
    h1 = int.from_bytes(digest[:8], "little")
    h2 = int.from_bytes(digest[8:], "little")
    return [(((h1 + i * h2) % 2**64) * g.bits) >> 64 for i in range(g.hashes)]


def replica_holds(state: CoordinatorState, key: bytes) -> bool:
    g = state.replicas.geometry_of(NODE)
    if g is None:
        return False
    column = state.replicas.column(NODE)
    return all(column[p] for p in kirsch_mitzenmacher(key, g))


def operations(state: CoordinatorState, hint_max_age_s: float) -> Operations:
    """The coordinator's operations, with nothing to send (no node stream in these tests)."""
    return Operations(state.shell, state.readings, state.monitor, state.policy, state.hints, state.membership,
                      send=lambda messages: None, hint_max_age_s=hint_max_age_s)


def router(state: CoordinatorState, prober: Any, ops: Operations, clock: Any) -> Router:
    return Router(state.candidates, state.shell, state.membership, state.hints, state.accounting, state.policy,
                  prober, expire_hints=ops.expire_hints, clock=clock)


class CoreProber:
    """Router's prober, answered in-process by a NodeCore through the node's servicer encoding."""

    def __init__(self, core: NodeCore) -> None:
        self.core = core

    async def call(self, node_id: str, address: str, method: str, request: Any, timeout: float) -> ProbeResult:
        assert method == "Put"
        return ProbeResult(node_id, reply=_ack(self.core.put_many([(request.key, request.value)])[0]))


class ListOutbox:
    """The node's outbox for the hand-moved stream: keeps what the node sends until taken."""

    def __init__(self) -> None:
        self.messages: list[sync_pb2.NodeMessage] = []

    def room(self) -> int:
        return 4 << 20

    def send(self, messages: Any) -> None:
        self.messages.extend(messages)

    def take(self) -> list[sync_pb2.NodeMessage]:
        out, self.messages = self.messages, []
        return out


class Link:
    """One node and one coordinator, messages moved by hand; rebuild snapshots may be refused."""

    def __init__(self, keys: int = 20) -> None:
        self.t = 1000.0
        self.core = NodeCore(NODE, MemoryStore(), capacity=200, target_fpr=0.01, limits=Limits(),
                             background_rebuild=False, storage_address="127.0.0.1:7101")
        self.core.load()
        self.core.put_many([(f"oyster-{i}".encode(), b"v") for i in range(keys)])
        self.state = wire_state(Policy(stale_after_s=60.0))
        self.shell = self.state.shell
        self.hints = self.state.hints
        self.operations = operations(self.state, hint_max_age_s=300.0)
        self.router = router(self.state, CoreProber(self.core), self.operations, lambda: self.t)
        self.written: list[bytes] = []
        self.refuse_rebuild = False
        self.on_rebuild_chunk: Any = None
        self.refused: set[int] = set()
        self.seen: set[int] = set()
        self.to_node: deque[sync_pb2.CoordinatorMessage] = deque()
        self.violations: list[str] = []
        self.outbox = ListOutbox()
        self.core.open_stream(PEER, self.outbox, self.t)
        hello, *rest = self.outbox.take()
        self._take(self.shell.open(1, hello.hello, self.t).replies)
        assert not rest
        self.pump()

    def position(self) -> tuple[int, int] | None:
        with self.shell.lock:
            return self.shell.position(NODE)

    def _take(self, replies: tuple[sync_pb2.CoordinatorMessage, ...]) -> None:
        self.to_node.extend(replies)
        self.check()

    def check(self) -> None:
        """Read-your-writes after every message: each key written is listed (filter or hint)."""
        row = self.state.candidates.find(self.written, self.t).rows()
        for key, cands in zip(self.written, row):
            if NODE not in {c.node_id for c in cands}:
                self.violations.append(f"{key!r} not a candidate at replica {self.position()}")
            hinted = NODE in self.hints.lookup(key)
            if not hinted and not replica_holds(self.state, key):
                self.violations.append(f"hint of {key!r} gone but the replica lacks it")

    def write(self, key: bytes) -> storage_pb2.WriteAck:
        self.written.append(key)
        reply = asyncio.run(self.router.write(key, b"fresh", node_id=NODE))
        return storage_pb2.WriteAck(epoch=reply.epoch, sequence=reply.sequence)

    def pump(self, rounds: int = 200) -> None:
        for _ in range(rounds):
            while self.to_node:
                with self.core.sync_step(self.t) as node:
                    node.receive(PEER, self.to_node.popleft(), self.t)
            self.core.cut(self.t)
            out = self.outbox.take()
            if not out:
                return
            for msg in out:
                chunk = msg.snapshot_chunk if msg.WhichOneof("body") == "snapshot_chunk" else None
                rebuild = chunk is not None and chunk.purpose == filter_pb2.SNAPSHOT_PURPOSE_REBUILD
                if rebuild and chunk.snapshot_id not in self.seen:
                    self.seen.add(chunk.snapshot_id)
                    if self.on_rebuild_chunk is not None:   # the node cut this snapshot already
                        self.on_rebuild_chunk(chunk)
                if rebuild and self.refuse_rebuild:
                    if chunk.snapshot_id not in self.refused:   # refused (as a coordinator would on a bad layout)
                        self.refused.add(chunk.snapshot_id)
                        self.to_node.append(sync_pb2.CoordinatorMessage(node_id=NODE, snapshot_rejected=(
                            sync_pb2.SnapshotRejected(snapshot_id=chunk.snapshot_id, detail="refused by the test"))))
                    continue
                self._take(self.shell.receive(NODE, 1, msg, self.t).replies)
            self.t += 0.05
        raise AssertionError("the link did not go quiet")

    def start_rebuild(self) -> int:
        self.core.request_rebuild(capacity=4000, target_fpr=0.01)
        while not self.core.rebuild_step():
            pass
        return self.core.epoch


def test_a_write_during_an_abandoned_rebuild_clears_once_the_fresh_epoch_covers_it() -> None:
    # docs/sync-protocol.md, "The rebuild hand-over" step 6: an abandoned hand-over goes on
    # under a fresh epoch (highest used + 1), whose snapshot is cut after every write the node
    # acknowledged, so it covers the abandoned epoch's positions too.
    link = Link()
    old_epoch = link.core.epoch
    assert link.position() is not None and len(link.hints) == 0
    link.refuse_rebuild = True
    held: list[Any] = []

    def write_past_the_split_point(chunk: filter_pb2.SnapshotChunk) -> None:
        # the node already cut this rebuild snapshot: the old-epoch delta carrying this write is
        # not sent before the snapshot's answer, so no old-epoch position covers it
        key = f"kelp-{chunk.snapshot_id}".encode()
        ack = link.write(key)
        assert ack.epoch == chunk.epoch and link.hints.lookup(key) == [NODE]
        held.extend(h for h in link.hints.held(NODE) if h.key == key)

    link.on_rebuild_chunk = write_past_the_split_point
    new_epoch = link.start_rebuild()
    assert new_epoch > old_epoch
    result = link.core.put_many([(b"probe-key", b"v")])[0]
    assert result.epoch == new_epoch and result.old_position is not None and result.old_position[0] == old_epoch

    link.pump()

    assert len(link.refused) == len(held) == 3                   # 3 attempts, then abandoned
    assert link.core.epoch == new_epoch + 1                      # the fresh epoch
    replica = link.position()
    assert replica is not None and replica[0] == new_epoch + 1   # the replica never held the abandoned epoch
    for hint in held:
        assert hint.position[0] == new_epoch and hint.old is not None and hint.old[0] == old_epoch
        assert replica > hint.position                           # passed by the fresh epoch...
        assert replica_holds(link.state, hint.key)               # ...whose state holds the write
    assert len(link.hints) == 0                                  # no hint is left behind
    assert link.violations == []


def test_after_an_abandon_a_hint_without_the_old_position_clears_too(caplog) -> None:
    link = Link()
    link.refuse_rebuild = True
    new_epoch = link.start_rebuild()
    result = link.core.put_many([(b"kelp-no-old", b"v")])[0]
    link.written.append(b"kelp-no-old")
    # what a coordinator gets from a node that does not report the old position
    link.router.hold_hint(b"kelp-no-old", NODE, result.epoch, result.sequence, now=link.t)
    link.pump()
    assert link.core.epoch == new_epoch + 1 and link.position()[0] == new_epoch + 1   # type: ignore[index]
    assert link.hints.lookup(b"kelp-no-old") == []               # covered without waiting for its age
    assert replica_holds(link.state, b"kelp-no-old")
    with caplog.at_level(logging.WARNING, logger="shardsieve.coordinator.operations"):
        assert link.operations.expire_hints(link.t + 301.0) == []
    assert link.hints.expired_unapplied == 0 and not [r for r in caplog.records if "expired" in r.getMessage()]
    assert link.violations == []


def test_a_hint_whose_write_never_arrives_expires_after_its_age_with_its_numbers(caplog) -> None:
    link = Link()
    result = link.core.put_many([(b"kelp-stalled", b"v")])[0]
    link.written.append(b"kelp-stalled")
    replica = link.position()
    assert replica is not None
    # the node's sync stalls: the delta carrying the write never reaches the coordinator
    link.router.hold_hint(b"kelp-stalled", NODE, result.epoch, result.sequence, now=link.t)
    added = link.t
    assert link.operations.expire_hints(added + 299.0) == []     # nothing drops before the bound
    with caplog.at_level(logging.WARNING, logger="shardsieve.coordinator.operations"):
        (gone,) = link.operations.expire_hints(added + 301.0)
    assert gone.position == (result.epoch, result.sequence) and replica < gone.position
    assert link.hints.lookup(b"kelp-stalled") == [] and link.hints.expired_unapplied == 1
    (record,) = [r for r in caplog.records if "expired" in r.getMessage()]
    assert (record.node_id, record.hint_epoch, record.hint_sequence) == (NODE, result.epoch, result.sequence)
    assert (record.replica_epoch, record.replica_sequence) == replica and record.age_s >= 300.0


def test_a_switched_rebuild_clears_hints_by_the_new_epoch_and_nothing_drops_early() -> None:
    link = Link()
    late: list[bytes] = []

    def write_past_the_split_point(chunk: filter_pb2.SnapshotChunk) -> None:
        late.append(f"kelp-{chunk.snapshot_id}".encode())
        link.write(late[-1])

    link.on_rebuild_chunk = write_past_the_split_point
    new_epoch = link.start_rebuild()
    link.write(b"kelp-before-split")
    link.pump()
    assert link.position()[0] == new_epoch and late    # type: ignore[index]
    link.write(b"kelp-after-switch")
    assert link.hints.lookup(b"kelp-after-switch") == [NODE]
    link.pump()
    assert len(link.hints) == 0 and link.violations == []


def test_an_expired_hint_whose_write_arrived_is_not_reported() -> None:
    hints = HintTable()
    assert hints.add(b"x", NODE, 3, 10, applied=(3, 9), now=0.0)
    # applied (the replica is at (3, 10)) but dropped by age before the table heard of it
    assert hints.expire(10.0, 5.0, position_of=lambda node_id: (3, 10)) == []
    assert hints.expired_unapplied == 0 and len(hints) == 0
    assert hints.add(b"y", NODE, 3, 11, applied=(3, 10), now=20.0)
    (lacking,) = hints.expire(30.0, 5.0, position_of=lambda node_id: (3, 10))
    assert lacking.key == b"y" and hints.expired_unapplied == 1


def _synced_at_epoch_3(hint_max_age_s: float) -> tuple[CoordinatorState, Router, Operations]:
    state = wire_state(Policy())
    ops = operations(state, hint_max_age_s)
    NodeFeed(state.shell, NODE, BloomFilter(Geometry(bits=1024, hashes=3)), address="127.0.0.1:7101",
             epoch=3).connect(0.0)
    return state, router(state, CoreProber(None), ops, lambda: 0.0), ops   # type: ignore[arg-type]


@pytest.mark.parametrize("unknown", ["node-never-seen"])
def test_a_hint_for_a_node_the_coordinator_does_not_know_is_not_held(unknown: str) -> None:
    state, route, _ = _synced_at_epoch_3(5.0)
    assert not route.hold_hint(b"x", unknown, 1, 1, now=0.0) and len(state.hints) == 0
    assert not route.hold_hint(b"x", NODE, 3, 0, now=0.0)    # its replica already holds (3, 0)
    assert route.hold_hint(b"x", NODE, 3, 1, now=0.0) and state.hints.lookup(b"x") == [NODE]


def test_hints_held_and_expired_are_prometheus_metrics() -> None:
    """Parsed back with prometheus_client's own text parser (the exposition format's reference
    implementation, from the package index)."""
    from prometheus_client import CollectorRegistry, generate_latest
    from prometheus_client.parser import text_string_to_metric_families

    state, route, ops = _synced_at_epoch_3(5.0)
    registry = CollectorRegistry()
    registry.register(FleetCollector(state.readings, clock=lambda: 0.0))

    def scrape() -> dict[str, float]:
        text = generate_latest(registry).decode()
        return {s.name: s.value for f in text_string_to_metric_families(text) for s in f.samples}

    assert route.hold_hint(b"kelp-late", NODE, 3, 10, now=0.0) and route.hold_hint(b"kelp-later", NODE, 3, 11, now=4.0)
    before = scrape()
    assert before["shardsieve_coordinator_hints_held"] == 2 and before["shardsieve_coordinator_hints_expired_total"] == 0
    assert len(ops.expire_hints(now=6.0)) == 1      # the first is 6 s old, past the 5 s bound; never applied
    after = scrape()
    assert after["shardsieve_coordinator_hints_held"] == 1 and after["shardsieve_coordinator_hints_expired_total"] == 1
