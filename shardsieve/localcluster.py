"""A coordinator and N storage nodes as real processes on loopback, in one directory.

For cluster tests, the tour, the load tester and benchmarks::

    from shardsieve.localcluster import LocalCluster

    with LocalCluster(tmp_path, nodes=4, capacity=5000) as cluster:   # starts, waits until synced
        router = cluster.router()                 # shardsieve.v1 Router stub
        router.Write(routing_pb2.WriteRequest(key=b"k", value=b"v"))
        cluster.fleet_status()                    # Admin FleetStatus reply
        cluster.restart_coordinator()             # and wait_fresh() again
    # every process is stopped here, also on Ctrl-C or an exception

Agents (docs/agents.md) join the same way: `agents={"brinewick-cache": ["--store", redis_url]}`
starts `shardsieve agent --id brinewick-cache --store ...` with the cluster's coordinator,
filter size, push interval and heartbeats; it is a node like the others for every helper
(`node_handles`, `storage`, `wait_fresh`, `stop_node`, `start_node`).

Layout of the directory: coordinator/ (its state dir + coordinator.log), <node-id>/ (store, or an
agent's state dir) and <node-id>.log per node. Every wait takes a deadline; nothing sleeps blindly.
"""

from __future__ import annotations

import atexit
import signal
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import grpc

from shardsieve.security import channel_credentials, make_channel
from shardsieve.testing.procs import DaemonProcess, free_port, shardsieve_argv, start_daemon, wait_until
from shardsieve.v1 import admin_pb2, admin_pb2_grpc, routing_pb2_grpc, storage_pb2, storage_pb2_grpc

HOST = "127.0.0.1"


@dataclass
class NodeHandle:
    node_id: str
    port: int
    data_dir: Path
    log_path: Path
    argv: list[str]
    process: DaemonProcess | None = None

    @property
    def address(self) -> str:
        return f"{HOST}:{self.port}"


@dataclass
class LocalCluster:
    """Start/stop a coordinator and `nodes` storage nodes; wait for health and for every node synced.

    capacity / fpr / push_interval_ms / heartbeat_ms apply to every node; extra_node_args and
    extra_coordinator_args are appended to the command lines (e.g. ["--stale-after-s", "1"]).
    """

    directory: Path
    nodes: int = 4
    capacity: int = 10_000
    fpr: float = 0.01
    push_interval_ms: int = 50
    heartbeat_ms: int = 250
    sync_level: str = "normal"
    token: str = ""
    metrics: bool = False
    node_ids: Sequence[str] | None = None
    # agent node id -> its own arguments (at least --store URL); see the module doc
    agents: Mapping[str, Sequence[str]] = field(default_factory=dict)
    extra_node_args: Sequence[str] = ()
    extra_coordinator_args: Sequence[str] = ()
    start_timeout: float = 60.0
    coordinator_port: int = 0
    coordinator_metrics_port: int = 0
    # Mutual TLS everywhere: a directory made by `shardsieve certs` (shardsieve.cli.certs.make_dev_pki)
    # for these node ids. None: plaintext, which the loopback harness allows explicitly.
    tls_dir: Path | None = None
    node_handles: dict[str, NodeHandle] = field(default_factory=dict)
    coordinator: DaemonProcess | None = None
    _channels: dict[str, grpc.Channel] = field(default_factory=dict)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    # -- addresses and clients -------------------------------------------------------------------
    @property
    def coordinator_address(self) -> str:
        return f"{HOST}:{self.coordinator_port}"

    @property
    def node_addresses(self) -> dict[str, str]:
        return {nid: h.address for nid, h in self.node_handles.items()}

    def channel(self, address: str) -> grpc.Channel:
        with self._lock:
            ch = self._channels.get(address)
            if ch is None:
                ch = self._channels[address] = make_channel(address, self.credentials())
            return ch

    def credentials(self) -> grpc.ChannelCredentials | None:
        """Client credentials of the operator certificate when tls_dir is set (else None: plaintext)."""
        if self.tls_dir is None:
            return None
        d = Path(self.tls_dir)
        return channel_credentials(d / "ca.pem", d / "operator.pem", d / "operator-key.pem")

    def _tls_args(self, stem: str) -> list[str]:
        if self.tls_dir is None:
            return []
        d = Path(self.tls_dir)
        return ["--tls-cert", str(d / f"{stem}.pem"), "--tls-key", str(d / f"{stem}-key.pem"),
                "--tls-ca", str(d / "ca.pem"), "--tls-client-auth", "true", "--allow-plaintext", "false"]

    def router(self) -> routing_pb2_grpc.RouterStub:
        return routing_pb2_grpc.RouterStub(self.channel(self.coordinator_address))

    def admin(self) -> admin_pb2_grpc.AdminStub:
        return admin_pb2_grpc.AdminStub(self.channel(self.coordinator_address))

    def auth_metadata(self) -> list[tuple[str, str]]:
        return [("authorization", f"Bearer {self.token}")] if self.token else []

    def storage(self, node_id: str) -> storage_pb2_grpc.NodeStorageStub:
        return storage_pb2_grpc.NodeStorageStub(self.channel(self.node_handles[node_id].address))

    def fleet_status(self, timeout: float = 5.0) -> admin_pb2.FleetStatusReply:
        return self.admin().FleetStatus(admin_pb2.FleetStatusRequest(), timeout=timeout,
                                        metadata=self.auth_metadata())

    def node_stats(self, node_id: str, timeout: float = 5.0) -> Any:
        return self.storage(node_id).Stats(storage_pb2.NodeStatsRequest(), timeout=timeout).stats

    # -- lifecycle -------------------------------------------------------------------------------
    def __post_init__(self) -> None:
        self.directory = Path(self.directory)
        ids = list(self.node_ids) if self.node_ids is not None else [f"node-{i + 1}" for i in range(self.nodes)]
        self.nodes = len(ids)
        if not self.coordinator_port:
            self.coordinator_port = free_port(HOST)
        if self.metrics and not self.coordinator_metrics_port:
            self.coordinator_metrics_port = free_port(HOST)
        for nid in ids:
            port = free_port(HOST)
            argv = shardsieve_argv(
                "node", "--id", nid, "--listen", f"{HOST}:{port}", "--data", str(self.directory / nid),
                "--coordinator", self.coordinator_address, "--capacity", str(self.capacity), "--fpr", str(self.fpr),
                "--push-interval-ms", str(self.push_interval_ms), "--heartbeat-ms", str(self.heartbeat_ms),
                "--sync-level", self.sync_level, "--log-format", "text", *self._tls_args(nid), *self.extra_node_args)
            self.node_handles[nid] = NodeHandle(nid, port, self.directory / nid, self.directory / f"{nid}.log", argv)
        for nid, agent_args in self.agents.items():
            port = free_port(HOST)
            plaintext = ["--allow-plaintext", "true"] if self.tls_dir is None else []
            argv = shardsieve_argv(
                "agent", "--id", nid, "--listen", f"{HOST}:{port}", "--state-dir", str(self.directory / nid),
                "--coordinator", self.coordinator_address, "--capacity", str(self.capacity), "--fpr", str(self.fpr),
                "--push-interval-ms", str(self.push_interval_ms), "--heartbeat-ms", str(self.heartbeat_ms),
                "--log-format", "text", *plaintext, *self._tls_args(nid), *agent_args)
            self.node_handles[nid] = NodeHandle(nid, port, self.directory / nid, self.directory / f"{nid}.log", argv)

    def coordinator_argv(self) -> list[str]:
        argv = shardsieve_argv("coordinator", "--listen", self.coordinator_address,
                               "--state-dir", str(self.directory / "coordinator"), "--log-format", "text",
                               "--target-fpr", str(self.fpr))
        if self.metrics:
            argv += ["--metrics-port", str(self.coordinator_metrics_port)]
        argv += self._tls_args("coordinator")
        argv += list(self.extra_coordinator_args)
        return argv

    def start(self, wait_fresh: bool = True) -> LocalCluster:
        """Start the coordinator, then every node; wait for health and (optionally) for sync."""
        self.directory.mkdir(parents=True, exist_ok=True)
        atexit.register(self.stop)
        try:
            self.start_coordinator()
            for nid in self.node_handles:
                self.start_node(nid, wait_healthy=False)
            for handle in self.node_handles.values():
                assert handle.process is not None
                handle.process.wait_healthy(self.start_timeout)
            if wait_fresh:
                self.wait_fresh(self.start_timeout)
        except BaseException:
            self.stop()
            raise
        return self

    def start_coordinator(self) -> DaemonProcess:
        env = {"SHARDSIEVE_COORDINATOR_TOKEN": self.token} if self.token else None
        def record(proc: DaemonProcess) -> None:
            self.coordinator = proc        # before any Ctrl-C can interrupt: stop() then finds it

        return start_daemon(self.coordinator_argv(), self.directory / "coordinator.log", env=env,
                            health_address=self.coordinator_address, timeout=self.start_timeout,
                            credentials=self.credentials(), on_spawn=record)

    def stop_coordinator(self, kill: bool = False) -> None:
        if self.coordinator is not None:
            self.coordinator.kill() if kill else self.coordinator.stop()

    def restart_coordinator(self, kill: bool = False, wait_fresh: bool = True, timeout: float = 30.0) -> None:
        self.stop_coordinator(kill=kill)
        with self._lock:
            ch = self._channels.pop(self.coordinator_address, None)
        if ch is not None:
            ch.close()
        self.start_coordinator()
        if wait_fresh:
            self.wait_fresh(timeout)

    def start_node(self, node_id: str, wait_healthy: bool = True) -> DaemonProcess:
        handle = self.node_handles[node_id]
        handle.data_dir.mkdir(parents=True, exist_ok=True)
        def record(proc: DaemonProcess) -> None:
            handle.process = proc          # before any Ctrl-C can interrupt: stop() then finds it

        start_daemon(handle.argv, handle.log_path, health_address=handle.address if wait_healthy else None,
                     timeout=self.start_timeout, credentials=self.credentials(), on_spawn=record)
        assert handle.process is not None
        if not wait_healthy:
            handle.process.health_address = handle.address
        return handle.process

    def stop_node(self, node_id: str, kill: bool = False) -> None:
        proc = self.node_handles[node_id].process
        if proc is not None:
            proc.kill() if kill else proc.stop()

    def node_process(self, node_id: str) -> DaemonProcess:
        proc = self.node_handles[node_id].process
        if proc is None:
            raise KeyError(f"node {node_id} was never started")
        return proc

    def freeze_node(self, node_id: str) -> None:
        """SIGSTOP the node (its stream and storage stop answering). Always pair with thaw_node."""
        self.node_process(node_id).signal(signal.SIGSTOP)

    def thaw_node(self, node_id: str) -> None:
        self.node_process(node_id).signal(signal.SIGCONT)

    def stop(self) -> None:
        """Stop every process (nodes first, then the coordinator); safe to call twice."""
        for handle in self.node_handles.values():
            if handle.process is not None and handle.process.alive():
                try:
                    handle.process.signal(signal.SIGCONT)   # a frozen node cannot handle SIGTERM
                except ProcessLookupError:
                    pass
                handle.process.stop()
        if self.coordinator is not None and self.coordinator.alive():
            self.coordinator.stop()
        with self._lock:
            for ch in self._channels.values():
                ch.close()
            self._channels.clear()

    def __enter__(self) -> LocalCluster:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # -- waiting ---------------------------------------------------------------------------------
    def all_fresh(self, node_ids: Sequence[str] | None = None) -> bool:
        status = self.fleet_status()
        want = set(node_ids if node_ids is not None else self.node_handles)
        states = {n.node_id: n for n in status.nodes}
        return all(nid in states and states[nid].connected and not states[nid].stale
                   and states[nid].state == "fresh" for nid in want)

    def wait_fresh(self, timeout: float = 30.0, node_ids: Sequence[str] | None = None) -> None:
        """Wait until every (named) node is connected, synced and fresh at the coordinator."""
        def describe() -> str:
            try:
                st = self.fleet_status()
                return "all nodes synced; now: " + ", ".join(f"{n.node_id}={n.state}" for n in st.nodes)
            except grpc.RpcError as exc:
                return f"all nodes synced (coordinator unreachable: {exc.code().name})"

        wait_until(lambda: self.all_fresh(node_ids), timeout, interval=0.05, message=describe)

    def wait_node_state(self, node_id: str, predicate: Any, timeout: float = 30.0, what: str = "node state") -> Any:
        """Wait until predicate(NodeStatus of node_id) is truthy; returns the NodeStatus."""
        last: list[Any] = [None]

        def check() -> Any:
            for n in self.fleet_status().nodes:
                if n.node_id == node_id:
                    last[0] = n
                    if predicate(n):
                        return n
            return None

        def describe() -> str:
            n = last[0]
            seen = "never listed" if n is None else (
                f"state={n.state} stale={n.stale} epoch={n.epoch} sequence={n.sequence} keys={n.key_count} "
                f"capacity={n.capacity} predicted_fpr={n.predicted_fpr:.4g} rebuild_phase={n.rebuild_phase!r}")
            return f"{what} of {node_id} (last seen: {seen})"
        return wait_until(check, timeout, interval=0.05, message=describe)
