"""The freshness contract of candidate lists (Fleet), with fake node views and no I/O.

Reference for the expected lists: the contract as stated in the issue, point 3 (a)-(c), and
the protobuf wire format (protobuf encoding guide) decoded by the protobuf library itself for
the pre-encoded LocateReply path.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from shardsieve.coordinator.fleet import Fleet
from shardsieve.coordinator.policy import Policy
from shardsieve.bloom import BloomFilter
from shardsieve.geometry import Geometry
from shardsieve.v1 import routing_pb2

GEO = Geometry(bits=1 << 12, hashes=5)


@dataclass
class _Rebuild:
    phase: str = ""
    progress: float = 0.0


@dataclass
class _Counters:
    delta_bytes: int = 0
    deltas_applied: int = 0
    snapshots_installed: int = 1


@dataclass
class _View:
    """The fields of shardsieve.sync.coordinator_side.NodeView the fleet reads."""

    node_id: str
    connected: bool = True
    storage_address: str = ""
    has_replica: bool = True
    epoch: int = 1
    sequence: int = 0
    checksum: int = 0
    geometry: Geometry | None = GEO
    key_count: int = 0
    capacity: int = 1000
    target_fpr: float = 0.01
    push_interval_ms: int = 50
    last_heard_at: float | None = 100.0
    awaiting_snapshot: str | None = None
    stats: object = None
    rebuild: _Rebuild = field(default_factory=_Rebuild)
    counters: _Counters = field(default_factory=_Counters)


def _fleet(mode: str = "safe") -> Fleet:
    fleet = Fleet(Policy(mode=mode, stale_after_s=2.0))
    for i in range(4):
        nid = f"n{i}"
        bf = BloomFilter(GEO)
        bf.add_batch([f"{nid}-key-{j}".encode() for j in range(20)])
        fleet.install(nid, bf)
        fleet.observe(_View(nid, storage_address=f"127.0.0.1:{9000 + i}"))
    return fleet


def _ids(row) -> dict[str, tuple[bool, bool]]:
    return {c.node_id: (c.stale, c.hinted) for c in row}


def test_a_synced_key_lists_its_node_and_fresh_nodes_only_on_match() -> None:
    fleet = _fleet()
    rows = fleet.candidates([b"n2-key-3", b"nobody-has-this"], now=101.0)
    assert "n2" in _ids(rows[0]) and _ids(rows[0])["n2"] == (False, False)
    assert len(rows[1]) <= 1        # at most a rare false positive


def test_c_safe_mode_lists_stale_nodes_everywhere_fast_mode_does_not() -> None:
    fleet = _fleet()
    fleet.observe(_View("n1", storage_address="127.0.0.1:9001", last_heard_at=100.0))
    late = 100.0 + 2.5                     # n1 heard of 2.5 s ago > stale-after 2 s; others refreshed
    for nid in ("n0", "n2", "n3"):
        fleet.observe(_View(nid, storage_address="x", last_heard_at=late - 0.1))
    row = fleet.candidates([b"nobody-has-this"], now=late)[0]
    assert _ids(row).get("n1") == (True, False)
    assert "n1" not in _ids(fleet.candidates([b"nobody-has-this"], now=late, mode="fast")[0])
    # Its own keys stay routable in fast mode, marked stale.
    assert _ids(fleet.candidates([b"n1-key-0"], now=late, mode="fast")[0])["n1"] == (True, False)
    # Stream down, or a replica waiting for a snapshot, is stale too.
    fleet.observe(_View("n2", storage_address="x", connected=False, last_heard_at=late))
    fleet.observe(_View("n3", storage_address="x", awaiting_snapshot="GAP", last_heard_at=late))
    stale = {c.node_id for c in fleet.candidates([b"nobody-has-this"], now=late)[0] if c.stale}
    assert stale == {"n1", "n2", "n3"}


def test_b_hint_lists_the_node_until_its_sequence_is_applied() -> None:
    fleet = _fleet()
    fleet.hints.add(b"fresh-write", "n3", epoch=1, sequence=5, applied=fleet.applied("n3"))
    row = fleet.candidates([b"fresh-write"], now=100.5)[0]
    assert _ids(row)["n3"] == (False, True)
    fleet.observe(_View("n3", storage_address="x", sequence=4, last_heard_at=100.5))
    assert "n3" in _ids(fleet.candidates([b"fresh-write"], now=100.5)[0])
    fleet.observe(_View("n3", storage_address="x", sequence=5, last_heard_at=100.5))
    assert "n3" not in _ids(fleet.candidates([b"fresh-write"], now=100.5)[0])


def test_remembered_nodes_are_stale_until_synced(tmp_path) -> None:
    fleet = _fleet()
    fleet.state_dir = tmp_path
    fleet.observe(_View("n9", storage_address="127.0.0.1:9999", has_replica=False))  # saves membership
    restarted = Fleet(Policy(), state_dir=tmp_path)
    row = restarted.candidates([b"anything"], now=0.0)[0]
    assert _ids(row).get("n9") == (True, False) and row[0].address


def test_wire_encoding_decodes_to_the_same_lists() -> None:
    fleet = _fleet()
    fleet.observe(_View("n1", storage_address="127.0.0.1:9001", last_heard_at=90.0))   # stale at t=101
    fleet.hints.add(b"hinted", "n0", epoch=1, sequence=9)
    keys = [b"n0-key-1", b"n3-key-7", b"hinted", b"nope", b"n1-key-2"]
    for mode in ("safe", "fast"):
        objects = fleet.candidates(keys, now=101.0, mode=mode)
        wire, total = fleet.candidates_wire(keys, now=101.0, mode=mode)
        decoded = [routing_pb2.LocateReply.FromString(w) for w in wire]
        assert total == sum(len(r) for r in objects)
        for obj_row, msg in zip(objects, decoded):
            assert [(c.node_id, c.address, c.stale, c.hinted) for c in obj_row] == \
                [(c.node_id, c.address, c.stale, c.hinted) for c in msg.candidates]


def test_batch_wire_encoding_decodes_to_the_same_lists() -> None:
    fleet = _fleet()
    keys = [b"n0-key-1", b"n3-key-7", b"nope", b"n1-key-2"] + [f"n2-key-{j}".encode() for j in range(20)]
    for now, stale_node in ((100.5, None), (103.0, "n1")):
        if stale_node:      # everyone but n1 refreshed: n1 stale, listed in safe mode
            for nid in ("n0", "n2", "n3"):
                fleet.observe(_View(nid, storage_address=f"a-{nid}", last_heard_at=now))
        expected = fleet.candidates(keys, now=now)
        data, total = fleet.locate_batch_wire(keys, now=now)
        reply = routing_pb2.LocateBatchReply.FromString(data)
        assert total == sum(len(r) for r in expected)
        assert [[(c.node_id, c.address, c.stale, c.hinted) for c in r] for r in expected] == \
            [[(c.node_id, c.address, c.stale, c.hinted) for c in r.candidates] for r in reply.results]


def test_placement_picks_the_fresh_node_with_the_most_free_capacity() -> None:
    # Issue 4 point 4: default placement = most free capacity (capacity - keys). Expected values
    # worked out by hand from the views below.
    fleet = Fleet(Policy(stale_after_s=2.0))
    for nid, keys, capacity in (("n0", 100, 1000), ("n1", 50, 500), ("n2", 900, 2000), ("n3", 0, 400)):
        fleet.observe(_View(nid, storage_address=f"a-{nid}", key_count=keys, capacity=capacity, last_heard_at=100.0))
    # free: n0 900, n1 450, n2 1100, n3 400 -> n2 (the biggest capacity is not what counts; free room is)
    assert fleet.placement(now=100.5) == "n2"
    fleet.observe(_View("n2", storage_address="a-n2", key_count=1500, capacity=2000, last_heard_at=100.0))
    assert fleet.placement(now=100.5) == "n0"            # n2 now has 500 free, n0 900
    assert fleet.placement(now=100.5, exclude={"n0"}) == "n2"
    # A stale node (stream down) is not picked while a fresh one exists.
    fleet.observe(_View("n0", storage_address="a-n0", key_count=100, capacity=1000, connected=False,
                        last_heard_at=100.0))
    assert fleet.placement(now=100.5) == "n2"


def test_locate_threads_reach_the_routing_index() -> None:
    assert Fleet(Policy(), locate_threads=3).index.workers == 3
    assert Fleet(Policy()).index.workers >= 1   # 0 (the default): one per core
