"""Unit-test helpers: nodes that speak the sync protocol's messages to an in-process coordinator
state (coordinator/wiring.py), with no process and no socket.

`SimNode` keeps a real BloomFilter and emits what a node sends on its stream: a Hello, a
snapshot's chunks (shardsieve/snapshot.py), deltas (shardsieve/codec.py) with the node's
checksum after each. `attach` opens a stream for it on a coordinator's shell and installs its
snapshot; `push` sends its pending change as one delta.
"""

from __future__ import annotations

import itertools
import time
from typing import Iterable

import numpy as np

from shardsieve.bloom import BloomFilter
from shardsieve.changeset import ChangeSet
from shardsieve.codec import encode_delta
from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.geometry import Geometry, geometry_for
from shardsieve.hashing import key_positions
from shardsieve.snapshot import encode_snapshot
from shardsieve.sync.coordinator_side import PROTOCOL_VERSION
from shardsieve.v1 import filter_pb2, sync_pb2

_streams = itertools.count(1)


class SimNode:
    """A node's filter and sync position, producing the messages a node sends."""

    def __init__(self, node_id: str, *, capacity: int = 2000, fpr: float = 0.01, epoch: int = 1,
                 address: str = "") -> None:
        self.node_id = node_id
        self.address = address or f"127.0.0.1:{9000 + sum(map(ord, node_id))}"
        self.capacity = capacity
        self.geometry: Geometry = geometry_for(capacity, fpr)
        self.bloom = BloomFilter(self.geometry)
        self.epoch = epoch
        self.sequence = 0
        self.keys: set[bytes] = set()
        self.stream: int | None = None
        self._pending: set[int] = set()

    def add(self, keys: Iterable[bytes]) -> None:
        """Keys written on the node; their bits go out with the next `push`."""
        for key in keys:
            self.keys.add(key)
            self._pending.update(int(p) for p in key_positions(key, self.geometry))

    def hello(self) -> sync_pb2.Hello:
        return sync_pb2.Hello(node_id=self.node_id, storage_address=self.address, geometry=self.geometry.to_proto(),
                              epoch=self.epoch, sequence=self.sequence, checksum=self.bloom.checksum,
                              key_count=len(self.keys), capacity=self.capacity, protocol_version=PROTOCOL_VERSION,
                              history_floor=self.sequence)

    def snapshot(self, snapshot_id: int = 1, purpose: int = filter_pb2.SNAPSHOT_PURPOSE_RESYNC) -> list[sync_pb2.NodeMessage]:
        enc = encode_snapshot(self.bloom)
        return [sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(
            snapshot_id=snapshot_id, epoch=self.epoch, sequence=self.sequence, geometry=self.geometry.to_proto(),
            encoding=enc.encoding, purpose=purpose, chunk_index=i, chunk_count=enc.chunk_count,
            total_bytes=enc.total_bytes, data=data, checksum=self.bloom.checksum, key_count=len(self.keys),
            capacity=self.capacity)) for i, data in enumerate(enc.chunks)]

    def delta(self) -> sync_pb2.NodeMessage | None:
        """The pending bits as the next delta (None when nothing changed), applied to the filter."""
        pending = np.array(sorted(self._pending), dtype=np.uint64)
        raw = np.frombuffer(self.bloom.to_bytes(), dtype=np.uint8)
        already = (raw[(pending >> 3).astype(np.intp)] >> (pending & 7).astype(np.uint8)) & 1 if pending.size \
            else np.zeros(0, dtype=np.uint8)
        on = pending[already == 0]
        self._pending.clear()
        if not on.size:
            return None
        changes = ChangeSet.of(set_positions=on)
        self.bloom.apply(changes)
        self.sequence += 1
        return sync_pb2.NodeMessage(delta=filter_pb2.Delta(
            epoch=self.epoch, sequence=self.sequence, payload=encode_delta(changes, self.geometry.bits),
            checksum=self.bloom.checksum, key_count=len(self.keys)))

    def rebuild(self, capacity: int) -> None:
        """A new epoch with a filter sized for `capacity`, holding every key."""
        self.capacity = capacity
        self.geometry = geometry_for(capacity, 0.01)
        self.bloom = BloomFilter(self.geometry)
        for key in self.keys:
            self.bloom.add(key)
        self._pending.clear()
        self.epoch += 1
        self.sequence = 0


def attach(shell: CoordinatorShell, node: SimNode, now: float | None = None) -> None:
    """Open a (new) stream for node and install its snapshot in the coordinator's replicas."""
    now = time.monotonic() if now is None else now
    if node.stream is not None:
        shell.close(node.node_id, node.stream, now)
    node.stream = next(_streams)
    shell.open(node.stream, node.hello(), now)
    for msg in node.snapshot():
        shell.receive(node.node_id, node.stream, msg, now)


def push(shell: CoordinatorShell, node: SimNode, now: float | None = None) -> bool:
    """Send node's pending change as a delta; False when there was none."""
    msg = node.delta()
    if msg is None:
        return False
    assert node.stream is not None
    shell.receive(node.node_id, node.stream, msg, time.monotonic() if now is None else now)
    return True
