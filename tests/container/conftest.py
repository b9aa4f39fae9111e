"""Fixtures for the container fault tests: the project image, a private Docker network and
shardsieve daemons in containers, driven from this process through published ports.

Why containers and not processes: killing a container, freezing it (docker pause) and cutting
it off its network are the faults operators meet when hosts die or networks split; the same
image runs in compose/ and in production.

Skips: with no Docker engine answering, every test here is skipped with that reason. When the
engine answers but the image is missing, the tests skip too. Under CI=true both are failures
instead: CI must run these tests (.ci/docker-setup.sh starts the engine and builds the image).
The image is not rebuilt here: run
compose/make-offline-image.sh (or .ci/docker-setup.sh) after changing the code.
"""

from __future__ import annotations

import itertools
import os
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator

import grpc
import pytest

os.environ.setdefault("TESTCONTAINERS_RYUK_DISABLED", "true")  # its reaper image cannot be pulled here

from shardsieve.testing.procs import free_port, health_status, wait_until  # noqa: E402
from shardsieve.v1 import admin_pb2, admin_pb2_grpc, routing_pb2_grpc, storage_pb2, storage_pb2_grpc  # noqa: E402

IMAGE = os.environ.get("SHARDSIEVE_IMAGE", "shardsieve:dev")
LABEL = "org.shardsieve.test"
COORDINATOR_PORT = 7400
NODE_PORT = 7500
DATA_DIR = "/var/lib/shardsieve/data"
STATE_DIR = "/var/lib/shardsieve/state"
TLS_DIR = "/etc/shardsieve/tls"

# Timing knobs of the daemons under test: short so faults show (and heal) within seconds.
STALE_AFTER_S = 1.0
HEARTBEAT_MS = 200
RECONNECT_MAX_MS = 500

_names = itertools.count(1)


def _engine_problem() -> str | None:
    """None when a Docker engine answers a ping, else why not (the skip reason)."""
    try:
        import docker
    except ImportError as exc:  # pragma: no cover - testcontainers depends on it
        return f"the docker Python package is missing ({exc})"
    try:
        client = docker.from_env(timeout=5)
        client.ping()
        client.close()
    except Exception as exc:  # noqa: BLE001 - any failure means "no engine here"
        first = str(exc).splitlines()[0][:200] if str(exc) else type(exc).__name__
        return f"no Docker engine answers ({first}); .ci/docker-setup.sh installs and starts one"
    return None


def _in_ci() -> bool:
    return os.environ.get("CI", "").lower() in ("1", "true", "yes")


@pytest.fixture(scope="session")
def docker_client():
    """A docker SDK client, or a visible skip when no engine answers / the image is missing."""
    problem = _engine_problem()
    if problem:
        if _in_ci():
            pytest.fail(problem + " — under CI the container tests must run (.ci/run sets the engine up)")
        pytest.skip(problem)
    import docker

    client = docker.from_env(timeout=60)
    try:
        client.images.get(IMAGE)
    except docker.errors.ImageNotFound:
        reason = (f"image {IMAGE} is not built; run compose/make-offline-image.sh "
                  f"(or .ci/docker-setup.sh) first")
        if _in_ci():
            pytest.fail(reason + " — under CI this is an error, not a skip")
        pytest.skip(reason)
    yield client
    client.close()


# ---- recovery-time report -----------------------------------------------------------------------
class _RecoveryReport:
    """Collects measured recovery times and prints them in pytest's closing summary."""

    def __init__(self) -> None:
        self.lines: list[str] = []

    def pytest_terminal_summary(self, terminalreporter) -> None:  # noqa: ANN001 - pytest hook
        if self.lines:
            terminalreporter.section("shardsieve container recovery times (measured)")
            for line in self.lines:
                terminalreporter.write_line(line)


@pytest.fixture(scope="session")
def recovery_report(pytestconfig) -> _RecoveryReport:  # noqa: ANN001
    report = _RecoveryReport()
    pytestconfig.pluginmanager.register(report, "shardsieve-recovery-report")
    return report


@pytest.fixture
def report_time(recovery_report: _RecoveryReport, request, capsys) -> Callable[[str, float], None]:  # noqa: ANN001
    """report_time(what, seconds, detail=""): print now (uncaptured) and again in the closing summary."""

    def report(what: str, seconds: float, detail: str = "") -> None:
        line = f"{request.node.name}: {what}: {seconds:.2f} s" + (f" ({detail})" if detail else "")
        recovery_report.lines.append(line)
        request.node.user_properties.append((what, round(seconds, 3)))
        with capsys.disabled():
            print(f"\n[recovery] {line}", flush=True)

    return report


# ---- the cluster --------------------------------------------------------------------------------
@dataclass
class Daemon:
    """One daemon container: its docker objects and the host address of its gRPC port."""

    name: str                    # container name (unique per run)
    alias: str                   # name on the private network (what other daemons dial)
    kind: str                    # "node" or "coordinator"
    env: dict[str, str]
    volume: str
    host_port: int
    container: object = None     # testcontainers DockerContainer
    channel: grpc.Channel | None = field(default=None, repr=False)
    credentials: grpc.ChannelCredentials | None = field(default=None, repr=False)  # TLS, when enabled

    @property
    def address(self) -> str:
        return f"127.0.0.1:{self.host_port}"

    @property
    def wrapped(self):  # noqa: ANN201 - docker SDK Container
        return self.container.get_wrapped_container()  # type: ignore[attr-defined]

    def grpc_channel(self) -> grpc.Channel:
        if self.channel is None:
            self.channel = (grpc.insecure_channel(self.address) if self.credentials is None
                            else grpc.secure_channel(self.address, self.credentials))
        return self.channel

    def router(self) -> routing_pb2_grpc.RouterStub:
        return routing_pb2_grpc.RouterStub(self.grpc_channel())

    def admin(self) -> admin_pb2_grpc.AdminStub:
        return admin_pb2_grpc.AdminStub(self.grpc_channel())

    def storage(self) -> storage_pb2_grpc.NodeStorageStub:
        return storage_pb2_grpc.NodeStorageStub(self.grpc_channel())

    def logs(self, lines: int = 60) -> str:
        try:
            raw = self.wrapped.logs(tail=lines)
        except Exception as exc:  # noqa: BLE001 - diagnostics only
            return f"(no logs: {exc})"
        return raw.decode(errors="replace")


class ContainerCluster:
    """Coordinators and nodes on one private network; every call has a deadline."""

    def __init__(self, client, tag: str) -> None:  # noqa: ANN001 - docker SDK client
        from testcontainers.core.network import Network

        self.client = client
        self.tag = tag
        self.network = Network(docker_network_kw={"labels": {LABEL: tag}}).create()
        self.tls = None           # shardsieve.cli.health.ProbeTls of the test's client, when TLS is on
        self.tls_dir: Path | None = None
        self.daemons: dict[str, Daemon] = {}
        self.volumes: set[str] = set()
        # Highest (epoch, sequence) a node acknowledged a write with, per node: a coordinator is in
        # sync with a node only once it applied that far (the node's Stats show only the last delta
        # cut; a write's change may still be pending for one push interval).
        self.acked: dict[str, tuple[int, int]] = {}
        self._acked_lock = threading.Lock()

    # -- starting ------------------------------------------------------------------------------------
    def _run(self, d: Daemon, internal_port: int) -> None:
        from testcontainers.core.container import DockerContainer

        container = (DockerContainer(IMAGE)
                     .with_name(d.name)
                     .with_command(d.kind)
                     .with_envs(**d.env)
                     .with_network(self.network)
                     .with_network_aliases(d.alias)
                     .with_bind_ports(internal_port, d.host_port)
                     .with_volume_mapping(d.volume, DATA_DIR if d.kind == "node" else STATE_DIR, "rw")
                     .with_kwargs(labels={LABEL: self.tag}))
        if self.tls_dir is not None:
            container = container.with_volume_mapping(str(self.tls_dir), TLS_DIR, "ro")
            d.credentials = self.tls.credentials()
        d.container = container.start()

    def enable_tls(self, directory: Path, node_ids: list[str], hosts: list[str]) -> None:
        """Make a development CA and certificates (shardsieve certs) for daemons started from now on:
        they listen with TLS only (no plaintext), and the test talks to them as the operator."""
        from shardsieve.cli.certs import make_dev_pki
        from shardsieve.cli.health import ProbeTls

        files = make_dev_pki(directory, node_ids, hosts=hosts, tokens=False)
        for path in directory.iterdir():   # the daemons run as uid 10001: test keys may be world-readable
            path.chmod(0o644)
        self.tls_dir = directory
        self.tls = ProbeTls(files.ca, files.operator_cert, files.operator_key)

    def _tls_env(self, prefix: str, cert_name: str) -> dict[str, str]:
        if self.tls_dir is None:
            return {f"{prefix}ALLOW_PLAINTEXT": "true"}
        return {f"{prefix}TLS_CERT": f"{TLS_DIR}/{cert_name}.pem", f"{prefix}TLS_KEY": f"{TLS_DIR}/{cert_name}-key.pem",
                f"{prefix}TLS_CA": f"{TLS_DIR}/ca.pem"}

    def start_coordinator(self, alias: str = "coordinator", wait: bool = True, **extra_env: str) -> Daemon:
        n = next(_names)
        env = {
            "SHARDSIEVE_COORDINATOR_ID": alias,
            "SHARDSIEVE_COORDINATOR_LISTEN": f"0.0.0.0:{COORDINATOR_PORT}",
            "SHARDSIEVE_COORDINATOR_STATE_DIR": STATE_DIR,
            "SHARDSIEVE_COORDINATOR_STALE_AFTER_S": str(STALE_AFTER_S),
            "SHARDSIEVE_COORDINATOR_AUTO_REBUILD": "false",   # keep each scenario to the fault it injects
            "SHARDSIEVE_COORDINATOR_READ_DEADLINE_MS": "1500",
            "SHARDSIEVE_COORDINATOR_LOG_FORMAT": "text",
            # Plaintext unless enable_tls() was called: the private test network is the trust boundary.
            **self._tls_env("SHARDSIEVE_COORDINATOR_", "coordinator"),
            **extra_env,
        }
        d = Daemon(f"ss-{self.tag}-{alias}-{n}", alias, "coordinator", env, f"ss-{self.tag}-{alias}-state",
                   free_port())
        self.volumes.add(d.volume)
        self._run(d, COORDINATOR_PORT)
        self.daemons[alias] = d
        if wait:
            self.wait_serving(d)
        return d

    def start_node(self, node_id: str, coordinators: list[str], wait: bool = True, **extra_env: str) -> Daemon:
        n = next(_names)
        env = {
            "SHARDSIEVE_NODE_ID": node_id,
            "SHARDSIEVE_NODE_LISTEN": f"0.0.0.0:{NODE_PORT}",
            "SHARDSIEVE_NODE_ADVERTISE": f"{node_id}:{NODE_PORT}",
            "SHARDSIEVE_NODE_DATA": DATA_DIR,
            "SHARDSIEVE_NODE_COORDINATOR": ",".join(f"{c}:{COORDINATOR_PORT}" for c in coordinators),
            "SHARDSIEVE_NODE_CAPACITY": "20000",
            "SHARDSIEVE_NODE_HEARTBEAT_MS": str(HEARTBEAT_MS),
            "SHARDSIEVE_NODE_RECONNECT_MAX_MS": str(RECONNECT_MAX_MS),
            "SHARDSIEVE_NODE_LOG_FORMAT": "text",
            **self._tls_env("SHARDSIEVE_NODE_", node_id),
            **extra_env,
        }
        d = Daemon(f"ss-{self.tag}-{node_id}-{n}", node_id, "node", env, f"ss-{self.tag}-{node_id}-data", free_port())
        self.volumes.add(d.volume)
        self._run(d, NODE_PORT)
        self.daemons[node_id] = d
        if wait:
            self.wait_serving(d)
        return d

    def wait_serving(self, d: Daemon, timeout: float = 60.0) -> float:
        """Wait until the daemon answers gRPC health SERVING through its published port; seconds waited."""
        t0 = time.monotonic()
        deadline = t0 + timeout
        while not self.serving(d):
            d.wrapped.reload()
            if d.wrapped.status in ("exited", "dead"):
                raise AssertionError(f"{d.name} exited before serving:\n{d.logs()}")
            if time.monotonic() > deadline:
                raise AssertionError(f"{d.name} not SERVING after {timeout:.0f}s:\n{d.logs()}")
            time.sleep(0.1)   # polling interval of this deadline-bound wait
        return time.monotonic() - t0

    def serving(self, d: Daemon) -> bool:
        """The daemon's gRPC health says SERVING (asked over TLS when the cluster uses it)."""
        if self.tls is None:
            return health_status(d.address) == 1
        from shardsieve.cli.health import check

        return check([d.address], 1.0, self.tls)[0]

    # -- faults --------------------------------------------------------------------------------------
    def kill(self, d: Daemon) -> None:
        """SIGKILL the container (a crash: no clean shutdown) and wait until docker sees it stopped."""
        d.wrapped.kill()
        wait_until(lambda: (d.wrapped.reload(), d.wrapped.status)[1] in ("exited", "dead"), 20,
                   message=f"{d.name} to stop")
        if d.channel is not None:
            d.channel.close()
            d.channel = None

    def restart(self, d: Daemon) -> None:
        """Start the same (killed) container again: same volume, network alias and host port."""
        d.wrapped.start()

    def replace_node(self, d: Daemon, wait: bool = False) -> Daemon:
        """Remove a stopped node container and run a NEW one on the same volume, alias and host port."""
        d.wrapped.remove(force=True)
        n = next(_names)
        new = Daemon(f"ss-{self.tag}-{d.alias}-{n}", d.alias, d.kind, dict(d.env), d.volume, d.host_port)
        self._run(new, NODE_PORT)
        self.daemons[d.alias] = new
        if wait:
            self.wait_serving(new)
        return new

    def pause(self, d: Daemon) -> None:
        """Freeze every process of the container (docker pause): it holds its sockets but answers nothing."""
        d.wrapped.pause()

    def unpause(self, d: Daemon) -> None:
        d.wrapped.unpause()

    def disconnect(self, d: Daemon) -> None:
        """Cut the container off the private network (docker network disconnect): a network partition."""
        self.network._unwrap_network.disconnect(d.wrapped.id, force=True)

    def reconnect(self, d: Daemon) -> None:
        """Join the network again under the same alias (its address there may change)."""
        self.network.connect(d.wrapped.id, network_aliases=[d.alias])

    # -- observing -------------------------------------------------------------------------------------
    def fleet(self, coordinator: Daemon, timeout: float = 3.0) -> dict[str, admin_pb2.NodeStatus]:
        reply = coordinator.admin().FleetStatus(admin_pb2.FleetStatusRequest(), timeout=timeout)
        return {n.node_id: n for n in reply.nodes}

    def node_position(self, node: Daemon, timeout: float = 3.0) -> tuple[int, int]:
        """The node's own (epoch, sequence): where its filter stream stands."""
        stats = node.storage().Stats(storage_pb2.NodeStatsRequest(), timeout=timeout).stats
        return int(stats.epoch), int(stats.sequence)

    def note_ack(self, node_id: str, epoch: int, sequence: int) -> None:
        with self._acked_lock:
            self.acked[node_id] = max(self.acked.get(node_id, (0, 0)), (epoch, sequence))

    def synced(self, coordinator: Daemon, nodes: list[Daemon]) -> bool:
        """True when the coordinator is synced with each node: connected, fresh, and applied up to
        both the node's own position (read just before) and every write the node acknowledged."""
        with self._acked_lock:
            acked = dict(self.acked)
        positions = {n.alias: max(self.node_position(n), acked.get(n.alias, (0, 0))) for n in nodes}
        fleet = self.fleet(coordinator)
        for node_id, pos in positions.items():
            st = fleet.get(node_id)
            if st is None or not st.connected or st.stale or st.state != "fresh":
                return False
            if (st.epoch, st.sequence) < pos:
                return False
        return True

    def wait_synced(self, coordinator: Daemon, nodes: list[Daemon], timeout: float = 60.0) -> float:
        """Wait until `synced`; returns the seconds waited (the measured recovery time)."""
        t0 = time.monotonic()

        def describe() -> str:
            try:
                fleet = self.fleet(coordinator)
                states = ", ".join(f"{k}={v.state}/{v.epoch}:{v.sequence}" for k, v in sorted(fleet.items()))
            except grpc.RpcError as exc:
                states = f"FleetStatus failed: {exc.code()}"
            return f"{coordinator.alias} synced with {[n.alias for n in nodes]} ({states})\n{coordinator.logs(30)}"

        wait_until(lambda: self.synced(coordinator, nodes), timeout, interval=0.05, message=describe)
        return time.monotonic() - t0

    def driver(self, coordinator: Daemon, history) -> "Driver":  # noqa: ANN001
        return Driver(coordinator, history, self)

    # -- teardown ------------------------------------------------------------------------------------
    def ip_of(self, d: Daemon) -> str:
        try:
            d.wrapped.reload()
            nets = d.wrapped.attrs["NetworkSettings"]["Networks"]
            return ", ".join(f"{v.get('IPAddress')}" for v in nets.values()) or "no network"
        except Exception as exc:  # noqa: BLE001 - diagnostics only
            return f"unknown ({exc})"

    def dump_logs(self) -> str:
        return "\n".join(f"===== {d.name} ({d.kind}, {self.ip_of(d)}) =====\n{d.logs(80)}"
                         for d in self.daemons.values())

    def close(self) -> None:
        """Remove every container, the network and the volumes this cluster made (labels find strays)."""
        for d in self.daemons.values():
            if d.channel is not None:
                d.channel.close()
        for c in self.client.containers.list(all=True, filters={"label": f"{LABEL}={self.tag}"}):
            try:
                c.remove(force=True)
            except Exception:  # noqa: BLE001 - best effort; the next lines still run
                pass
        try:
            self.network.remove()
        except Exception:  # noqa: BLE001
            pass
        for name in self.volumes:
            try:
                self.client.volumes.get(name).remove(force=True)
            except Exception:  # noqa: BLE001
                pass


@pytest.hookimpl(hookwrapper=True, tryfirst=True)
def pytest_runtest_makereport(item, call):  # noqa: ANN001 - pytest hook
    outcome = yield
    rep = outcome.get_result()
    setattr(item, f"rep_{rep.when}", rep)


@pytest.fixture
def cluster(docker_client, request) -> Iterator[ContainerCluster]:  # noqa: ANN001
    """An empty cluster (network only); the test starts daemons. On failure the logs are attached."""
    tag = f"{os.getpid()}-{next(_names)}"
    c = ContainerCluster(docker_client, tag)
    try:
        yield c
    finally:
        rep = getattr(request.node, "rep_call", None)
        if rep is not None and rep.failed:
            rep.sections.append(("container logs", c.dump_logs()))
        c.close()


# ---- driving the cluster through a coordinator ----------------------------------------------------
class Driver:
    """Writes and reads through one coordinator's Router, recording each outcome in a history.

    `history` is a shardsieve.testing.history.History: every acknowledged write and every read
    reply (found or not found, with start and end times) goes into it, and its `assert_ok`
    decides whether an acknowledged key was ever reported absent or a value was invented.
    Failed calls are not replies: a failed write is not recorded as acknowledged, a failed read
    is returned to the test (which checks it is a clear UNAVAILABLE where one is due).
    """

    def __init__(self, coordinator: Daemon, history, cluster: ContainerCluster, timeout: float = 5.0) -> None:  # noqa: ANN001
        self.coordinator = coordinator
        self.history = history
        self.cluster = cluster
        self.timeout = timeout

    def write(self, key: bytes, value: bytes) -> str | None:
        """Write through the coordinator; the owning node id when acknowledged, None when not."""
        from shardsieve.v1 import routing_pb2

        start = self.history.now()
        try:
            reply = self.coordinator.router().Write(routing_pb2.WriteRequest(key=key, value=value),
                                                    timeout=self.timeout)
        except (grpc.RpcError, ValueError):   # ValueError: `kill` closed the channel under this call
            return None
        self.history.write(key, value, start, node_id=reply.node_id, via="coordinator")
        self.cluster.note_ack(reply.node_id, reply.epoch, reply.sequence)
        return reply.node_id

    def read(self, key: bytes, deadline_ms: int = 0) -> tuple[str, bytes | None, str]:
        """Read through the coordinator (safe mode): ("found", value, node) / ("absent", None, "") /
        ("error", None, "<grpc code name>: <details>")."""
        from shardsieve.v1 import routing_pb2

        start = self.history.now()
        try:
            reply = self.coordinator.router().Read(routing_pb2.ReadRequest(key=key, deadline_ms=deadline_ms),
                                                   timeout=self.timeout)
        except grpc.RpcError as exc:
            return ("error", None, f"{exc.code().name}: {exc.details()}")
        except ValueError as exc:   # `kill` closed the channel under this call: a failed call, not a reply
            return ("error", None, f"channel closed: {exc}")
        self.history.read(key, reply.found, reply.value if reply.found else None, start, node_id=reply.node_id)
        if reply.found:
            return ("found", reply.value, reply.node_id)
        return ("absent", None, "")

    def locate(self, keys: list[bytes]) -> list[list]:  # noqa: ANN201 - list of Candidate protos per key
        from shardsieve.v1 import routing_pb2

        reply = self.coordinator.router().LocateBatch(routing_pb2.LocateBatchRequest(keys=keys), timeout=self.timeout)
        return [list(r.candidates) for r in reply.results]
