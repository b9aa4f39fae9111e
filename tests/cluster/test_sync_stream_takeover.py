"""A second sync stream for a node id whose stream is open, with the same identity (open mode:
the same host), takes it over (docs/sync-protocol.md and docs/coordinator.md, "Stream
takeover"). Both sides say so: the coordinator logs a WARNING naming the node id and both
peers, and ends the old stream ABORTED with a detail naming the new peer; the node whose stream
was taken over logs a WARNING with that detail. The node then reconnects and takes its stream
back the same way.
"""

from __future__ import annotations

import queue
import re
import threading
from pathlib import Path
from typing import Any, Iterator

import grpc
import pytest

from shardsieve.localcluster import LocalCluster
from shardsieve.testing.procs import wait_until
from shardsieve.v1 import sync_pb2, sync_pb2_grpc

pytestmark = pytest.mark.cluster

_CLOSE = object()
TAKEOVER = re.compile(r"WARNING\s+sync stream taken over.*node_id=(\S+) old_peer=(\S+) new_peer=(\S+)")
NODE_SIDE = re.compile(r"WARNING\s+the coordinator ended this sync stream.*detail=(.*)$", re.MULTILINE)


class SecondStream:
    """A FilterSync stream opened by hand: one Hello, then whatever the coordinator answers."""

    def __init__(self, address: str, hello: sync_pb2.Hello) -> None:
        self.channel = grpc.insecure_channel(address)
        self._out: queue.Queue[Any] = queue.Queue()
        self._out.put(sync_pb2.NodeMessage(hello=hello))
        self.replies: queue.Queue[Any] = queue.Queue()
        self.call = sync_pb2_grpc.FilterSyncStub(self.channel).Stream(self._requests(), timeout=60)
        threading.Thread(target=self._read, daemon=True).start()

    def _requests(self) -> Iterator[Any]:
        while (item := self._out.get()) is not _CLOSE:
            yield item

    def _read(self) -> None:
        try:
            for reply in self.call:
                self.replies.put(reply)
        except grpc.RpcError as exc:
            self.replies.put(exc)

    def end(self, timeout: float = 30.0) -> grpc.RpcError:
        """Wait for the RpcError that ends the stream."""
        while True:
            item = self.replies.get(timeout=timeout)
            if isinstance(item, grpc.RpcError):
                return item

    def close(self) -> None:
        self._out.put(_CLOSE)
        self.call.cancel()
        self.channel.close()


@pytest.fixture()
def cluster(tmp_path: Path) -> Iterator[LocalCluster]:
    with LocalCluster(tmp_path, nodes=1, capacity=2000) as c:
        yield c


def test_a_takeover_is_logged_on_both_sides_and_ends_the_old_stream(cluster: LocalCluster) -> None:
    node = cluster.node_handles["node-1"].process
    coordinator = cluster.coordinator
    assert node is not None and coordinator is not None
    mine = next(n for n in cluster.fleet_status().nodes if n.node_id == "node-1")
    hello = sync_pb2.Hello(node_id="node-1", storage_address=mine.address, geometry=mine.geometry, epoch=mine.epoch,
                           sequence=mine.sequence, checksum=mine.checksum, key_count=mine.key_count,
                           capacity=mine.capacity, target_fpr=0.01, push_interval_ms=50, protocol_version=1,
                           history_floor=mine.sequence)
    second = SecondStream(cluster.coordinator_address, hello)
    try:
        takeover = wait_until(lambda: TAKEOVER.search(coordinator.log_text()), 30,
                              message="the coordinator's takeover warning")
        node_id, old_peer, new_peer = takeover.groups()
        assert node_id == "node-1" and old_peer != new_peer
        assert re.fullmatch(r"127\.0\.0\.1:\d+", old_peer) and re.fullmatch(r"127\.0\.0\.1:\d+", new_peer)
        detail = wait_until(lambda: NODE_SIDE.search(node.log_text()), 30,
                            message="the node's warning that its stream was taken over").group(1)
        assert "taken over" in detail and new_peer in detail and "node-1" in detail
        # the node reconnects and takes its stream back: this stream ends ABORTED naming the node's new peer
        ended = second.end()
        assert ended.code() == grpc.StatusCode.ABORTED
        back = wait_until(lambda: [m for m in TAKEOVER.finditer(coordinator.log_text()) if m.group(2) == new_peer],
                          30, message="the node taking its stream back")
        assert back[0].group(3) in (ended.details() or "") and "taken over" in (ended.details() or "")
    finally:
        second.close()
    wait_until(lambda: cluster.all_fresh(), 30, message="node-1 fresh again on its own stream")
