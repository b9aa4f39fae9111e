"""A snapshot installed off the call (CoordinatorSyncConfig.install_off_call): the decode and the
sink install run elsewhere (`run_install`, here in another thread), the state commit after
(`finish_install`). It must end exactly where the in-call install ends — same replies, same
events, same replica and position — for a good snapshot, a corrupt one, and a node unlisted
in between (docs/coordinator.md, "Event loop and threads";
docs/architecture.md#1-no-false-negatives-once-synced: the sink only ever holds a verified
state of the node). The replica is compared with the node's own Bloom filter bit for bit.
"""

from __future__ import annotations

import threading

from shardsieve.bloom import BloomFilter
from shardsieve.geometry import Geometry
from shardsieve.hashing import positions
from shardsieve.snapshot import encode_snapshot
from shardsieve.sync.coordinator_side import (
    NOTHING,
    CoordinatorSync,
    CoordinatorSyncConfig,
    DictReplicaSink,
    SnapshotRejected,
    SyncResult,
)
from shardsieve.v1 import filter_pb2, sync_pb2

NODE = "node-heron-2"
G = Geometry(bits=8192, hashes=5, seed=3)


def node_filter(n: int = 200) -> BloomFilter:
    bloom = BloomFilter(G)
    bloom.add_positions(positions([f"heron-crate-{i}".encode() for i in range(n)], G))
    return bloom


def hello(bloom: BloomFilter) -> sync_pb2.Hello:
    return sync_pb2.Hello(node_id=NODE, storage_address="10.0.0.2:7100", geometry=G.to_proto(), epoch=1,
                          sequence=4, checksum=bloom.checksum, key_count=200, capacity=900, target_fpr=0.01,
                          push_interval_ms=50, protocol_version=1, history_floor=4)


def chunks(bloom: BloomFilter, corrupt: bool = False) -> list[sync_pb2.NodeMessage]:
    enc = encode_snapshot(bloom, max_chunk_bytes=64)
    checksum = bloom.checksum ^ (0xFF if corrupt else 0)
    return [sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
        snapshot_id=1, epoch=1, sequence=4, geometry=G.to_proto(), encoding=enc.encoding,
        purpose=filter_pb2.SNAPSHOT_PURPOSE_RESYNC, chunk_index=i, chunk_count=enc.chunk_count,
        total_bytes=enc.total_bytes, data=data, checksum=checksum, key_count=200, capacity=900))
        for i, data in enumerate(enc.chunks)]


def fed(off_call: bool, messages: list[sync_pb2.NodeMessage],
        bloom: BloomFilter) -> tuple[CoordinatorSync, DictReplicaSink, SyncResult]:
    """A coordinator end that got the Hello and every chunk; the last chunk's result."""
    sink = DictReplicaSink()
    sync = CoordinatorSync(sink, CoordinatorSyncConfig(install_off_call=off_call))
    sync.open(1, hello(bloom), 0.0)
    *firsts, last = messages
    for msg in firsts:
        assert sync.receive(NODE, 1, msg, 1.0) == NOTHING
    return sync, sink, sync.receive(NODE, 1, last, 1.0)


def run_elsewhere(sync: CoordinatorSync, job: object) -> str:
    """run_install in another thread (as the coordinator's worker threads do); its thread name."""
    names: list[str] = []

    def work() -> None:
        names.append(threading.current_thread().name)
        sync.run_install(job)  # type: ignore[arg-type]
    thread = threading.Thread(target=work, name="install-worker")
    thread.start()
    thread.join(10)
    return names[0]


def test_an_off_call_install_ends_where_the_in_call_install_ends() -> None:
    bloom = node_filter()
    messages = chunks(bloom)
    assert len(messages) > 1
    in_call, in_sink, in_result = fed(False, messages, bloom)
    off_call, off_sink, handed = fed(True, messages, bloom)
    # the completing call changed nothing yet: no reply, no event, no replica
    assert handed.install is not None and handed.replies == () and handed.events == ()
    assert not off_call.node(NODE).has_replica and NODE not in off_sink.replicas
    assert run_elsewhere(off_call, handed.install) == "install-worker"
    assert off_sink.replicas[NODE] == bloom                        # in the sink, not yet committed
    assert not off_call.node(NODE).has_replica
    committed = off_call.finish_install(handed.install, 1.0)
    assert (committed.replies, committed.events) == (in_result.replies, in_result.events)
    assert committed.install is None and in_result.install is None
    assert off_sink.replicas[NODE] == in_sink.replicas[NODE] == bloom
    off, on = off_call.node(NODE), in_call.node(NODE)
    assert (off.position, off.checksum, off.synced, off.counters) == (on.position, on.checksum, on.synced, on.counters)
    assert off.position == (1, 4) and off.synced


def test_a_corrupt_snapshot_is_rejected_at_the_commit_and_the_sink_keeps_nothing() -> None:
    bloom = node_filter()
    messages = chunks(bloom, corrupt=True)
    _, in_sink, in_result = fed(False, messages, bloom)
    off_call, off_sink, handed = fed(True, messages, bloom)
    assert handed.install is not None
    run_elsewhere(off_call, handed.install)
    committed = off_call.finish_install(handed.install, 1.0)
    assert (committed.replies, committed.events) == (in_result.replies, in_result.events)
    assert [type(e) for e in committed.events] == [SnapshotRejected]
    assert NODE not in off_sink.replicas and NODE not in in_sink.replicas
    assert not off_call.node(NODE).has_replica


def test_a_node_unlisted_before_the_commit_leaves_no_replica_behind() -> None:
    bloom = node_filter()
    off_call, off_sink, handed = fed(True, chunks(bloom), bloom)
    assert handed.install is not None
    run_elsewhere(off_call, handed.install)
    off_call.unlist(NODE)
    assert off_call.finish_install(handed.install, 1.0) == NOTHING
    assert NODE not in off_sink.replicas and off_call.node(NODE) is None
