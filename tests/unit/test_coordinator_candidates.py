"""The freshness contract of candidate lists (coordinator/candidates.py) and their wire form
(coordinator/wire.py), over the real protocol object fed with real sync messages; no I/O.

Reference for the expected lists: the contract as stated in docs/coordinator.md, "Freshness
contract" (a)-(c). The pre-encoded LocateReply / LocateBatchReply bytes are checked against
the protobuf library itself: decoded by it, and equal byte for byte to what it serializes for
the same lists (protobuf encoding guide: fields written in field-number order, repeated
entries in list order).
"""

from __future__ import annotations

from shardsieve.bloom import BloomFilter
from shardsieve.coordinator.candidates import CandidateFinder, CandidateLists
from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.router_service import most_free_capacity
from shardsieve.coordinator.wire import ReplyEncoder
from shardsieve.coordinator.wiring import CoordinatorState, wire_state
from shardsieve.geometry import Geometry
from shardsieve.sync.coordinator_side import holds_write
from shardsieve.testing.replica_feed import NodeFeed
from shardsieve.v1 import routing_pb2

GEO = Geometry(bits=1 << 12, hashes=5)
T0 = 100.0


def _fleet(mode: str = "safe") -> tuple[CoordinatorState, dict[str, NodeFeed]]:
    """Four nodes n0..n3, each synced at T0 with a filter of 20 keys of its own."""
    state = wire_state(Policy(mode=mode, stale_after_s=2.0))
    feeds = {}
    for i in range(4):
        nid = f"n{i}"
        bf = BloomFilter(GEO)
        bf.add_batch([f"{nid}-key-{j}".encode() for j in range(20)])
        feeds[nid] = NodeFeed(state.shell, nid, bf, address=f"127.0.0.1:{9000 + i}", key_count=20)
        feeds[nid].connect(T0)
    return state, feeds


def _ids(row) -> dict[str, tuple[bool, bool]]:
    return {c.node_id: (c.stale, c.hinted) for c in row}


def _rows(lists: CandidateLists) -> list[list[tuple[str, str, bool, bool]]]:
    return [[(c.node_id, c.address, c.stale, c.hinted) for c in row] for row in lists.rows()]


def _protobuf_batch(lists: CandidateLists) -> bytes:
    """The same lists serialized by the protobuf library (the reference encoder)."""
    return routing_pb2.LocateBatchReply(results=[routing_pb2.LocateReply(candidates=[
        routing_pb2.Candidate(node_id=n, address=a, stale=s, hinted=h) for n, a, s, h in row])
        for row in _rows(lists)]).SerializeToString()


def test_a_synced_key_lists_its_node_and_fresh_nodes_only_on_match() -> None:
    state, _ = _fleet()
    rows = state.candidates.find([b"n2-key-3", b"nobody-has-this"], now=T0 + 1).rows()
    assert _ids(rows[0])["n2"] == (False, False) and rows[0][0].listed_by_filter
    assert len(rows[1]) <= 1        # at most a rare false positive


def test_c_safe_mode_lists_stale_nodes_everywhere_fast_mode_does_not() -> None:
    state, feeds = _fleet()
    late = T0 + 2.5                        # n1 heard of 2.5 s ago > stale-after 2 s; others refreshed
    for nid in ("n0", "n2", "n3"):
        feeds[nid].heartbeat(late - 0.1)
    find = state.candidates.find
    row = find([b"nobody-has-this"], now=late).rows()[0]
    assert _ids(row).get("n1") == (True, False) and not row[-1].listed_by_filter
    assert "n1" not in _ids(find([b"nobody-has-this"], now=late, mode="fast").rows()[0])
    # Its own keys stay routable in fast mode, marked stale.
    assert _ids(find([b"n1-key-0"], now=late, mode="fast").rows()[0])["n1"] == (True, False)
    # Stream down, or a replica waiting for a snapshot, is stale too.
    feeds["n2"].close(late)
    feeds["n3"].skip(late)                 # a gap: the coordinator asks for a snapshot
    stale = {c.node_id for c in find([b"nobody-has-this"], now=late).rows()[0] if c.stale}
    assert stale == {"n1", "n2", "n3"}
    # each node once per key: n1's own key lists it by its filter, not again as a stale extra
    assert [c.node_id for c in find([b"n1-key-0"], now=late).rows()[0]].count("n1") == 1


def test_b_hint_lists_the_node_until_its_replica_holds_the_write() -> None:
    state, feeds = _fleet()
    with state.shell.lock:
        assert state.hints.add(b"fresh-write", "n3", epoch=1, sequence=5, applied=state.shell.position("n3"))
    assert _ids(state.candidates.find([b"fresh-write"], now=T0 + 0.5).rows()[0])["n3"] == (False, True)
    for i in range(4):                      # the replica reaches (1, 4): one short
        feeds["n3"].add([f"n3-extra-{i}".encode()], T0 + 0.5)
    assert "n3" in _ids(state.candidates.find([b"fresh-write"], now=T0 + 0.5).rows()[0])
    assert not holds_write(state.shell.position("n3"), (1, 5))
    feeds["n3"].add([b"n3-extra-4"], T0 + 0.5)   # (1, 5): the ReplicaAdvanced event drops the hint
    assert holds_write(state.shell.position("n3"), (1, 5)) and len(state.hints) == 0
    assert "n3" not in _ids(state.candidates.find([b"fresh-write"], now=T0 + 0.5).rows()[0])


def test_a_write_applied_during_a_lookup_is_listed_by_hint_or_filter() -> None:
    """The race of read-your-writes: the node's delta carrying a hinted write is applied (and the
    hint dropped) while a lookup runs. Simulated deterministically: the index answers from
    before the delta, the delta lands right after. The key must still be listed
    (docs/architecture.md#2-read-your-writes-through-a-coordinator)."""
    state, feeds = _fleet()
    key = b"landed-mid-lookup"
    with state.shell.lock:
        assert state.hints.add(key, "n3", epoch=1, sequence=1, applied=state.shell.position("n3"))

    class DeltaLandsAfterTheIndexRead:
        def locate(self, keys):
            before = state.replicas.locate(keys)
            feeds["n3"].add([key], T0 + 0.5)       # applied now: the ReplicaAdvanced event drops the hint
            return before

    finder = CandidateFinder(DeltaLandsAfterTheIndexRead(), state.shell, state.membership, state.hints,
                             state.policy)   # type: ignore[arg-type]
    row = finder.find([key], now=T0 + 0.5).rows()[0]
    assert len(state.hints) == 0 and "n3" in _ids(row)
    assert "n3" in _ids(state.candidates.find([key], now=T0 + 0.5).rows()[0])   # by its filter from now on


def test_remembered_nodes_are_stale_until_synced(tmp_path) -> None:
    state = wire_state(Policy(), state_dir=tmp_path)
    NodeFeed(state.shell, "n9", BloomFilter(GEO), address="127.0.0.1:9999").connect(T0)   # saves membership
    restarted = wire_state(Policy(), state_dir=tmp_path)
    row = restarted.candidates.find([b"anything"], now=0.0).rows()[0]
    assert _ids(row).get("n9") == (True, False) and row[0].address == "127.0.0.1:9999"


def test_wire_encoding_decodes_to_the_same_lists() -> None:
    state, feeds = _fleet()
    for nid in ("n0", "n2", "n3"):
        feeds[nid].heartbeat(T0 + 0.5)      # n1 last heard at T0: stale at T0 + 2.2
    with state.shell.lock:
        state.hints.add(b"hinted", "n0", epoch=1, sequence=9)
        state.hints.add(b"n1-key-2", "n1", epoch=1, sequence=9)   # hinted and matched: listed once, by filter
    encoder = ReplyEncoder()
    keys = [b"n0-key-1", b"n3-key-7", b"hinted", b"nope", b"n1-key-2"]
    for mode in ("safe", "fast"):
        lists = state.candidates.find(keys, now=T0 + 2.2, mode=mode)
        rows = _rows(lists)
        assert lists.total == sum(len(r) for r in rows)
        assert ("n0", "127.0.0.1:9000", False, True) in rows[2]
        assert [c[0] for c in rows[4]].count("n1") == 1 and ("n1", "127.0.0.1:9001", True, False) in rows[4]
        assert (("n1", "127.0.0.1:9001", True, False) in rows[3]) == (mode == "safe")
        for i, row in enumerate(rows):
            decoded = routing_pb2.LocateReply.FromString(encoder.locate_reply(state.candidates.find(
                [keys[i]], now=T0 + 2.2, mode=mode)))
            assert [(c.node_id, c.address, c.stale, c.hinted) for c in decoded.candidates] == row
        assert encoder.locate_batch_reply(lists) == _protobuf_batch(lists)


def test_batch_wire_encoding_is_what_protobuf_writes() -> None:
    state, feeds = _fleet()
    encoder = ReplyEncoder()
    keys = [b"n0-key-1", b"n3-key-7", b"nope", b"n1-key-2"] + [f"n2-key-{j}".encode() for j in range(20)]
    for now, stale_node in ((T0 + 0.5, None), (T0 + 3.0, "n1")):
        if stale_node:      # everyone but n1 refreshed: n1 stale, listed in safe mode
            for nid in ("n0", "n2", "n3"):
                feeds[nid].heartbeat(now)
        lists = state.candidates.find(keys, now=now)
        assert lists.plain == (stale_node is None)      # the fast path, then the general one
        data = encoder.locate_batch_reply(lists)
        assert data == _protobuf_batch(lists)
        reply = routing_pb2.LocateBatchReply.FromString(data)
        assert lists.total == sum(len(r.candidates) for r in reply.results)
        assert all(any(c.node_id == "n2" for c in r.candidates) for r in reply.results[4:])
    # several filter matches for one key, and no match at all, on the fast path
    state2, _ = _fleet()
    both = BloomFilter(GEO)
    both.add_batch([b"n0-key-1", b"shared"])
    NodeFeed(state2.shell, "n4", both, address="127.0.0.1:9004").connect(T0)
    lists = state2.candidates.find([b"n0-key-1", b"none-at-all", b"shared"], now=T0 + 0.5)
    assert lists.plain and {c.node_id for c in lists.row(0)} >= {"n0", "n4"}
    assert encoder.locate_batch_reply(lists) == _protobuf_batch(lists)
    assert ReplyEncoder().locate_batch_reply(state2.candidates.find([], now=T0)) == b""


def test_placement_picks_the_fresh_node_with_the_most_free_capacity() -> None:
    # docs/coordinator.md: a new key goes to the fresh node with the most free capacity
    # (capacity - keys). Expected values worked out by hand from the nodes below.
    state = wire_state(Policy(stale_after_s=2.0))
    feeds = {}
    for nid, keys, capacity in (("n0", 100, 1000), ("n1", 50, 500), ("n2", 900, 2000), ("n3", 0, 400)):
        feeds[nid] = NodeFeed(state.shell, nid, BloomFilter(GEO), address=f"a-{nid}", key_count=keys,
                              capacity=capacity)
        feeds[nid].connect(T0)

    def place(exclude: frozenset[str] = frozenset()) -> str | None:
        with state.shell.lock:
            nodes = [(n, state.shell.node(n)) for n in state.membership.node_ids()]
            return most_free_capacity(nodes, state.policy.current, T0 + 0.5, exclude)

    # free: n0 900, n1 450, n2 1100, n3 400 -> n2 (the biggest capacity is not what counts; free room is)
    assert place() == "n2"
    feeds["n2"].key_count = 1499
    feeds["n2"].add([b"one-more"], T0)     # the delta reports 1500 keys
    assert place() == "n0"                 # n2 now has 500 free, n0 900
    assert place(frozenset({"n0"})) == "n2"
    # A stale node (stream down) is not picked while a fresh one exists.
    feeds["n0"].close(T0)
    assert place() == "n2"
    # Without a fresh node, a connected one still takes the write; without a connected one, none.
    assert most_free_capacity([(n, state.shell.node(n)) for n in ("n1", "n3")], state.policy.current,
                              T0 + 60.0) == "n1"
    for feed in feeds.values():
        feed.close(T0)
    assert place() is None


def test_locate_threads_reach_the_routing_index() -> None:
    assert wire_state(Policy(), locate_threads=3).replicas.workers == 3
    assert wire_state(Policy()).replicas.workers >= 1   # 0 (the default): one per core
