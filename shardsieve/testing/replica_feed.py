"""Plays one node towards a coordinator's protocol object, with the real sync messages.

For tests and benchmarks of the coordinator without a node process: `NodeFeed` holds a
BloomFilter and sends what a node would (Hello, snapshot chunks, deltas, heartbeats) to
anything with CoordinatorSync's open / receive / close (the protocol object itself, or the
coordinator's shell, which also dispatches the events). Replies are returned, not consumed.

    feed = NodeFeed(shell, "node-kelp-1", bloom, address="127.0.0.1:7101")
    feed.connect(now)                  # Hello + snapshot: a verified replica, synced
    feed.add([b"crate-9"], now)        # one delta adding the key
    feed.heartbeat(now)                # heard from again
    feed.close(now)                    # stream down (stale)

`StreamedFeed` plays the same messages over a real FilterSync stream (grpc.aio, in the shared
stream pump of shardsieve/stream_pump.py), so one process can be many nodes towards a real
coordinator process:

    feed = StreamedFeed(channel, "node-kelp-1", bloom, address="127.0.0.1:7101")   # on the loop
    feed.connect()                     # Hello + snapshot on a new stream
    await feed.acked.wait()            # the coordinator installed the snapshot
    feed.heartbeat()
    end = await feed.close()           # how the stream ended

A StreamedFeed answers a NeedSnapshot with a snapshot, as a node does, and counts its Acks
(`acks`, `acked_position`) rather than keeping them, so thousands of feeds can run for long
(shardsieve bench fleet). A feed whose stream ended (refused at admission, say) can `connect()`
again; its filter, epoch and sequence carry over.
"""

from __future__ import annotations

import asyncio
import itertools
import time
from collections.abc import Hashable
from typing import Any, Protocol, Sequence

import grpc

from shardsieve.bloom import BloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.codec import encode_delta
from shardsieve.hashing import positions
from shardsieve.snapshot import EncodedSnapshot, encode_snapshot
from shardsieve.stream_pump import Outbox, StreamEnd, pump
from shardsieve.sync.coordinator_side import NOTHING, SyncResult
from shardsieve.v1 import filter_pb2, sync_pb2, sync_pb2_grpc

_STREAMS = itertools.count(1_000_000)   # stream ids of their own, apart from the caller's


class SyncTarget(Protocol):
    def open(self, stream_id: Hashable, hello: sync_pb2.Hello, now: float) -> SyncResult: ...

    def receive(self, node_id: str, stream_id: Hashable, msg: sync_pb2.NodeMessage, now: float) -> SyncResult: ...

    def close(self, node_id: str, stream_id: Hashable, now: float) -> SyncResult: ...


class NodeFeed:
    """One node's side of a stream: its filter, epoch and sequence, and the messages they make."""

    def __init__(self, target: SyncTarget, node_id: str, bloom: BloomFilter, *, address: str = "",
                 capacity: int = 1000, key_count: int = 0, epoch: int = 1) -> None:
        self.target = target
        self.node_id = node_id
        self.bloom = bloom
        self.address = address
        self.capacity = capacity
        self.key_count = key_count
        self.epoch = epoch
        self.sequence = 0
        self.stream_id: Hashable | None = None
        self._snapshot_ids = itertools.count(1)
        # the latest snapshot encoding, of which filter object at which checksum
        self._encoded: tuple[BloomFilter, int, EncodedSnapshot] | None = None

    def encoded(self) -> EncodedSnapshot:
        """The filter's snapshot encoding, kept while the filter stays the same (the same object
        at the same checksum), so a benchmark can encode a fleet's snapshots before it times
        their sending."""
        kept = self._encoded
        if kept is not None and kept[0] is self.bloom and kept[1] == self.bloom.checksum:
            return kept[2]
        encoded = encode_snapshot(self.bloom)
        self._encoded = (self.bloom, self.bloom.checksum, encoded)
        return encoded

    def hello(self) -> sync_pb2.Hello:
        return sync_pb2.Hello(node_id=self.node_id, storage_address=self.address,
                              geometry=self.bloom.geometry.to_proto(), epoch=self.epoch, sequence=self.sequence,
                              checksum=self.bloom.checksum, key_count=self.key_count, capacity=self.capacity,
                              target_fpr=0.01, push_interval_ms=50, protocol_version=1,
                              history_floor=self.sequence)

    def connect(self, now: float) -> list[sync_pb2.CoordinatorMessage]:
        """Open a new stream and send a snapshot: the replica then equals this filter."""
        self.stream_id = next(_STREAMS)
        replies = list(self.target.open(self.stream_id, self.hello(), now).replies)
        return replies + self.snapshot(now)

    def snapshot(self, now: float) -> list[sync_pb2.CoordinatorMessage]:
        enc = self.encoded()
        snapshot_id = next(self._snapshot_ids)
        replies: list[sync_pb2.CoordinatorMessage] = []
        for i, data in enumerate(enc.chunks):
            replies += self.send(sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
                snapshot_id=snapshot_id, epoch=self.epoch, sequence=self.sequence,
                geometry=self.bloom.geometry.to_proto(), encoding=enc.encoding,
                purpose=filter_pb2.SNAPSHOT_PURPOSE_RESYNC, chunk_index=i, chunk_count=enc.chunk_count,
                total_bytes=enc.total_bytes, data=data, checksum=self.bloom.checksum, key_count=self.key_count,
                capacity=self.capacity)), now)
        return replies

    def delta(self, changes: ChangeSet) -> sync_pb2.NodeMessage:
        """The next delta (applied to this filter; not sent)."""
        self.bloom.apply(changes)
        self.sequence += 1
        return sync_pb2.NodeMessage(delta=filter_pb2.Delta(
            epoch=self.epoch, sequence=self.sequence, payload=encode_delta(changes, self.bloom.geometry.bits),
            checksum=self.bloom.checksum, key_count=self.key_count))

    def add(self, keys: Sequence[bytes], now: float) -> list[sync_pb2.CoordinatorMessage]:
        """Add keys to the filter and send the delta that carries them."""
        pos = {int(p) for p in positions(list(keys), self.bloom.geometry).ravel()}
        self.key_count += len(keys)
        changes = ChangeSet.of(sorted(p for p in pos if not self.bloom.bits[p]), [])
        return self.send(self.delta(changes), now)

    def skip(self, now: float) -> list[sync_pb2.CoordinatorMessage]:
        """Lose one delta and send the one after it: a gap (the coordinator asks for a snapshot)."""
        self.delta(ChangeSet.of([], []))
        return self.send(self.delta(ChangeSet.of([], [])), now)

    def heartbeat(self, now: float, **stats: object) -> list[sync_pb2.CoordinatorMessage]:
        return self.send(sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat(stats=sync_pb2.NodeStats(
            key_count=self.key_count, capacity=self.capacity, epoch=self.epoch, sequence=self.sequence,
            **stats))), now)  # type: ignore[arg-type]

    def send(self, msg: sync_pb2.NodeMessage, now: float) -> list[sync_pb2.CoordinatorMessage]:
        assert self.stream_id is not None, "connect() first"
        return list(self.target.receive(self.node_id, self.stream_id, msg, now).replies)

    def close(self, now: float) -> None:
        if self.stream_id is not None:
            self.target.close(self.node_id, self.stream_id, now)
            self.stream_id = None


class _Outgoing:
    """A SyncTarget that keeps what a NodeFeed sends, for a real stream to carry (it answers nothing)."""

    def __init__(self) -> None:
        self.messages: list[sync_pb2.NodeMessage] = []

    def open(self, stream_id: Hashable, hello: sync_pb2.Hello, now: float) -> SyncResult:
        self.messages.append(sync_pb2.NodeMessage(hello=hello))
        return NOTHING

    def receive(self, node_id: str, stream_id: Hashable, msg: sync_pb2.NodeMessage, now: float) -> SyncResult:
        self.messages.append(msg)
        return NOTHING

    def close(self, node_id: str, stream_id: Hashable, now: float) -> SyncResult:
        return NOTHING

    def take(self) -> list[sync_pb2.NodeMessage]:
        out, self.messages = self.messages, []
        return out


class StreamedFeed:
    """A NodeFeed whose messages travel on a real FilterSync stream; make and use it on one event loop."""

    def __init__(self, channel: grpc.aio.Channel, node_id: str, bloom: BloomFilter, *, address: str = "",
                 capacity: int = 1000, key_count: int = 0, epoch: int = 1,
                 metadata: tuple[tuple[str, str], ...] = ()) -> None:
        self._outgoing = _Outgoing()
        self.feed = NodeFeed(self._outgoing, node_id, bloom, address=address, capacity=capacity,
                             key_count=key_count, epoch=epoch)
        self.node_id = node_id
        self._stub = sync_pb2_grpc.FilterSyncStub(channel)
        self.metadata = metadata
        self.replies: list[sync_pb2.CoordinatorMessage] = []   # every reply but the Acks (counted below)
        self.acks = 0                          # Acks received, on every stream of this feed
        self.acked_position: tuple[int, int] = (0, 0)   # (epoch, sequence) of the latest Ack
        self.need_snapshots = 0                # NeedSnapshots received (each answered with a snapshot)
        self.acked = asyncio.Event()           # set by the first Ack on the current stream
        self.ended: StreamEnd | None = None    # how the latest stream ended (None: open or never opened)
        self._call: Any = None
        self._outbox: Outbox[sync_pb2.NodeMessage] | None = None
        self._pump: asyncio.Future[StreamEnd] | None = None

    @property
    def open(self) -> bool:
        """A stream is running (connected, not ended)."""
        return self._pump is not None and not self._pump.done()

    def connect(self) -> None:
        """Open a stream and queue the Hello and a snapshot of the filter."""
        self._call = self._stub.Stream(metadata=self.metadata)
        self._outbox = Outbox(1 << 12)
        self.acked = asyncio.Event()
        self.ended = None
        self.feed.connect(time.monotonic())
        self._outbox.send(self._outgoing.take())
        pumping = asyncio.ensure_future(pump(read=self._call.read, write=self._call.write, handle=self._on_reply,
                                             outbox=self._outbox, name=f"feed-{self.node_id}"))
        self._pump = pumping

        def ended(done: asyncio.Future[StreamEnd]) -> None:
            if self._pump is pumping:
                self.ended = StreamEnd(grpc.StatusCode.CANCELLED, "cancelled") if done.cancelled() else done.result()
        pumping.add_done_callback(ended)

    def _on_reply(self, msg: sync_pb2.CoordinatorMessage) -> None:
        body = msg.WhichOneof("body")
        if body == "ack":
            self.acks += 1
            self.acked_position = (msg.ack.epoch, msg.ack.sequence)
            self.acked.set()
            return
        self.replies.append(msg)
        if body == "need_snapshot":           # as a node does: a snapshot of the filter now
            self.need_snapshots += 1
            self.feed.snapshot(time.monotonic())
            self._flush()

    def _flush(self) -> None:
        assert self._outbox is not None, "connect() first"
        self._outbox.send(self._outgoing.take())

    def heartbeat(self) -> None:
        self.feed.heartbeat(time.monotonic())
        self._flush()

    def add(self, keys: Sequence[bytes]) -> None:
        """Add keys to the filter and queue the delta that carries them."""
        self.feed.add(keys, time.monotonic())
        self._flush()

    async def close(self) -> StreamEnd:
        """End the stream from this side; returns how it ended (its first end wins)."""
        assert self._outbox is not None and self._pump is not None, "connect() first"
        self._outbox.end(StreamEnd(grpc.StatusCode.OK, "the simulated node stopped"), now=True)
        end = await self._pump
        self._call.cancel()
        return end
