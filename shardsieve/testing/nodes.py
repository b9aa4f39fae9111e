"""Helpers around a running storage node process: start it, talk to it, rebuild its filter from its keys.

    node = start_node(tmp_path, "n1", coordinators=[coord.address])   # waits for SERVING
    stub = node.stub()                                                 # NodeStorageStub
    ref = reference_filter(stub)   # BloomFilter built from ScanKeys at the geometry Stats reports
    node.stop()                    # SIGTERM (node.kill() for kill -9); node.restart() reuses data dir + port
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import grpc

from shardsieve.bloom import BloomFilter
from shardsieve.geometry import Geometry
from shardsieve.hashing import positions
from shardsieve.testing.procs import DaemonProcess, free_port, shardsieve_argv, start_daemon
from shardsieve.v1 import storage_pb2, storage_pb2_grpc


@dataclass
class NodeProcess:
    """A node daemon started by start_node; restart() keeps its id, data directory and port."""

    node_id: str
    address: str
    data_dir: Path
    log_path: Path
    argv: list[str]
    env: dict[str, str] = field(default_factory=dict)
    proc: DaemonProcess | None = None
    _channel: grpc.Channel | None = None

    def start(self, timeout: float = 30.0) -> NodeProcess:
        self.proc = start_daemon(self.argv, self.log_path, env=self.env, health_address=self.address,
                                 timeout=timeout)
        return self

    def stub(self) -> storage_pb2_grpc.NodeStorageStub:
        if self._channel is None:
            self._channel = grpc.insecure_channel(self.address)
        return storage_pb2_grpc.NodeStorageStub(self._channel)

    def stop(self, timeout: float = 10.0) -> int:
        self._close_channel()
        assert self.proc is not None
        return self.proc.stop(timeout)

    def kill(self) -> int:
        """kill -9: no shutdown code runs."""
        self._close_channel()
        assert self.proc is not None
        return self.proc.kill()

    def restart(self, timeout: float = 30.0) -> NodeProcess:
        if self.proc is not None and self.proc.alive():
            self.stop()
        return self.start(timeout)

    def log_tail(self, lines: int = 60) -> str:
        return self.proc.log_tail(lines) if self.proc else ""

    def _close_channel(self) -> None:
        if self._channel is not None:
            self._channel.close()
            self._channel = None


def start_node(base: Path, node_id: str, *, coordinators: Sequence[str] = (), extra: Sequence[str] = (),
               env: dict[str, str] | None = None, port: int | None = None, timeout: float = 30.0) -> NodeProcess:
    """Start `shardsieve node` with data and log under base/<node_id>*, on a free loopback port."""
    port = port or free_port()
    address = f"127.0.0.1:{port}"
    data_dir = base / f"{node_id}-data"
    argv = shardsieve_argv("node", "--id", node_id, "--listen", address, "--data", str(data_dir),
                           "--log-format", "text", *[a for c in coordinators for a in ("--coordinator", c)],
                           *extra)
    node = NodeProcess(node_id, address, data_dir, base / f"{node_id}.log", argv, dict(env or {}))
    return node.start(timeout)


def scan_all_keys(stub: storage_pb2_grpc.NodeStorageStub, page: int = 1000) -> list[bytes]:
    """Every key of the node, in order, through the ScanKeys rpc."""
    keys: list[bytes] = []
    after = b""
    while True:
        reply = stub.ScanKeys(storage_pb2.ScanKeysRequest(limit=page, after=after), timeout=10)
        keys.extend(reply.keys)
        if reply.done or not reply.keys:
            return keys
        after = reply.keys[-1]


def reference_filter(stub: storage_pb2_grpc.NodeStorageStub) -> BloomFilter:
    """A Bloom filter built from scratch over the node's keys at the geometry its Stats report."""
    stats = stub.Stats(storage_pb2.NodeStatsRequest(), timeout=10).stats
    geometry = Geometry.from_proto(stats.geometry)
    bloom = BloomFilter(geometry)
    keys = scan_all_keys(stub)
    if keys:
        bloom.add_positions(positions(keys, geometry))
    return bloom
