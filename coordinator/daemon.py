"""Wiring of a coordinator process: state owners and their subscribers, gRPC services + health,
monitor timer, metrics, logs.

CoordinatorSync owns every node's state; the shell runs it under one lock and hands its events
to membership, hints, accounting, the saturation monitor, metrics and the stream transport
(docs/architecture.md#how-events-flow). A coordinator holds only soft state: replicas come from
the nodes (each answers the restart's NeedSnapshot with a snapshot). The optional state dir
remembers which nodes exist so, after a restart, they are listed as stale (safe mode) until
they resync instead of being unknown.

One asyncio event loop serves every gRPC call (grpc.aio), every sync stream (a stream costs no
thread), the probes to nodes and the monitor timer; a few worker threads (`WORK_THREADS`) take
what is heavy: snapshot decodes and index installs, very large deltas, large LocateBatch
matches (docs/coordinator.md, "Event loop and threads").
SIGTERM / SIGINT: health NOT_SERVING, sync streams end, the server drains, the process exits.
"""

from __future__ import annotations

import asyncio
import logging
import os
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from typing import Any, Callable

import grpc
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_health.v1.health import aio as health_aio

from shardsieve.coordinator.admin_service import AdminService
from shardsieve.coordinator.gc_pauses import SurvivorFreezer
from shardsieve.coordinator.metrics import Metrics
from shardsieve.coordinator.operations import Operations
from shardsieve.coordinator.probes import Prober
from shardsieve.coordinator.replica_feed import ReplicaPublisher, ReplicaTap
from shardsieve.coordinator.replica_watch import ReplicaWatch
from shardsieve.coordinator.router_batches import BatchRouter
from shardsieve.coordinator.router_service import Router, RouterService, add_router_service
from shardsieve.coordinator.saturation import FilterReading, SaturationMonitor
from shardsieve.coordinator.settings import CoordinatorSettings
from shardsieve.coordinator.sync_service import SyncService
from shardsieve.coordinator.wiring import wire_state
from shardsieve import logs, security
from shardsieve.config import ConfigError
from shardsieve.daemon_runner import run_until_signalled
from shardsieve.sync.coordinator_side import CoordinatorSyncConfig
from shardsieve.v1 import admin_pb2_grpc, sync_pb2_grpc

log = logging.getLogger("shardsieve.coordinator")

HEALTH_SERVICES = ("", "shardsieve.v1.Router", "shardsieve.v1.Admin", "shardsieve.v1.FilterSync")
# worker threads for the heavy work taken off the event loop (the index's own locate threads come on top)
WORK_THREADS = max(2, min(4, os.cpu_count() or 1))
# nodes read per part of a monitor pass: about a millisecond of the loop on the 2-core
# development machine (`shardsieve bench fleet` at 1,000 nodes)
MONITOR_READ_CHUNK = 128


def setup_logging(settings: CoordinatorSettings) -> None:
    logs.setup_logging("coordinator", settings.id, settings.log_format, settings.log_level)


class CoordinatorDaemon:
    """One running coordinator; build it on the event loop that runs it. start() returns once
    SERVING; stop() is idempotent."""

    def __init__(self, settings: CoordinatorSettings, *, clock: Callable[[], float] = time.monotonic,
                 wall: Callable[[], float] = time.time) -> None:
        """clock: monotonic seconds, for every duration (freshness, hint ages, rebuild timeout,
        shrink grace); wall: Unix seconds, only for timestamps shown to people (decisions)."""
        self.settings = settings
        self._clock = clock
        # The listen address first: a taken port fails the start before anything else is set up.
        self.server = grpc.aio.server(options=[("grpc.max_receive_message_length", settings.max_message_bytes),
                                               ("grpc.max_send_message_length", 64 << 20),
                                               security.EXCLUSIVE_PORT_OPTION],
                                      interceptors=self._interceptors())
        tls = settings.tls_files()
        self.port = security.open_port(self.server, settings.listen, tls, settings.allow_plaintext, log,
                                       "coordinator")
        host = settings.listen.rpartition(":")[0]
        self.address = f"{host}:{self.port}"
        limits = settings.sync_limits()
        # the owners of state and their readers (coordinator/wiring.py); the replica feed taps
        # the replicas (coordinator/replica_feed.py)
        self.feed = ReplicaPublisher(lambda node_id: self.state.shell.node(node_id),
                                     max_subscribers=settings.max_replica_subscribers)
        self.state = state = wire_state(
            settings.policy(), expected=settings.expected_nodes(), state_dir=settings.state_dir,
            max_hints=settings.max_hints, locate_threads=settings.locate_threads,
            monitor=SaturationMonitor(rebuild_timeout_s=settings.rebuild_timeout_s,
                                      shrink_grace_s=settings.shrink_grace_s, limits=settings.rebuild_limits()),
            sync_config=CoordinatorSyncConfig(max_snapshot_bytes=limits.max_snapshot_bytes, install_off_call=True),
            sink_tap=lambda sink: ReplicaTap(sink, self.feed))
        shell = state.shell
        self.work = ThreadPoolExecutor(max_workers=WORK_THREADS, thread_name_prefix="coordinator-work")
        shell.executor = self.work
        self.metrics = Metrics(state.readings)
        node_tokens = self._secrets["node-token"]
        self.node_auth = "certificate" if settings.tls_client_auth else "token" if node_tokens else "open"
        self.node_authorizer = security.NodeAuthorizer(self.node_auth, node_tokens)
        self.sync = SyncService(shell, clock=clock, authorizer=self.node_authorizer,
                                admission=security.StreamAdmission(max_streams=settings.max_sync_streams,
                                                                   max_pending=settings.max_pending_streams,
                                                                   max_per_peer=settings.max_streams_per_peer),
                                limits=limits, hello_timeout_s=settings.hello_timeout_ms / 1000.0)
        self.metrics.watch_streams(self.sync.admission)
        shell.subscribe(self.metrics.on_event)
        shell.subscribe(self.sync.on_event)
        self.operations = Operations(shell, state.readings, state.monitor, state.policy, state.hints,
                                     state.membership, self.sync.send, hint_max_age_s=settings.hint_max_age_s,
                                     clock=clock, wall=wall)
        self.prober = Prober(credentials=tls.channel_credentials(),
                             metadata=security.auth_metadata(self._secrets["node-storage-token"]))
        self.router = Router(state.candidates, shell, state.membership, state.hints, state.accounting,
                             state.policy, self.prober, expire_hints=self.operations.expire_hints, clock=clock,
                             read_deadline_s=settings.read_deadline_ms / 1000.0,
                             write_deadline_s=settings.write_deadline_ms / 1000.0, metrics=self.metrics,
                             max_key_bytes=settings.max_key_bytes, max_value_bytes=settings.max_value_bytes,
                             max_batch_keys=settings.max_batch_keys)
        self.admin = AdminService(settings.id, state.readings, self.operations, state.policy, shell,
                                  settled=self.sync.settled, clock=clock)
        self.watch = ReplicaWatch(self.feed, shell, state.membership, state.policy, state.replicas.packed,
                                  executor=self.work, clock=clock)
        shell.subscribe(self.feed.on_event)
        add_router_service(RouterService(self.router, batches=BatchRouter(
            self.router, max_items=settings.max_batch_items, max_bytes=settings.max_batch_bytes),
            watch=self.watch), self.server)
        admin_pb2_grpc.add_AdminServicer_to_server(self.admin, self.server)
        sync_pb2_grpc.add_FilterSyncServicer_to_server(self.sync, self.server)
        self.health = health_aio.HealthServicer()
        health_pb2_grpc.add_HealthServicer_to_server(self.health, self.server)
        if self.node_auth == "open":
            log.warning("sync streams are not authenticated: any peer can push any node id's filter; configure "
                        "tls-client-auth (mutual TLS) or node-token-file")
        self.metrics_server: Any = None
        self.freezer: SurvivorFreezer | None = None     # the process's garbage collector policy (run())
        self._monitor: asyncio.Task[None] | None = None
        self._stopped = False

    def _interceptors(self) -> list[grpc.aio.ServerInterceptor]:
        # Installed even with no token configured, so a reload (SIGHUP) can start requiring one.
        self._secrets = self.settings.secrets()
        self.guard = security.TokenGuard(self._token_rules(self._secrets))
        return [self.guard, security.DecodeGuard()]

    async def _set_health(self, status: int) -> None:
        for name in HEALTH_SERVICES:
            await self.health.set(name, status)

    # -- tokens --------------------------------------------------------------------------------------
    @staticmethod
    def _token_rules(secrets: dict[str, Any]) -> dict[str, str]:
        write, read = secrets["write-token"], secrets["read-token"]
        return {"/shardsieve.v1.Admin/": secrets["token"],
                "/shardsieve.v1.Router/Write": write, "/shardsieve.v1.Router/Remove": write,
                "/shardsieve.v1.Router/WriteBatch": write, "/shardsieve.v1.Router/RemoveBatch": write,
                "/shardsieve.v1.Router/Locate": read, "/shardsieve.v1.Router/LocateBatch": read,
                "/shardsieve.v1.Router/Read": read, "/shardsieve.v1.Router/ReadBatch": read,
                "/shardsieve.v1.Router/WatchReplicas": read}

    def reload_secrets(self) -> list[str]:
        """Read the token files again and apply them (SIGHUP): returns the names of the settings
        whose token changed. All or nothing: a bad or unreadable file raises ConfigError and the
        tokens in force stay. Tokens given as values (flag, environment, config table) cannot
        change; the node authentication mode is fixed at start."""
        new = self.settings.secrets()
        if self.node_auth == "token" and not new["node-token"]:
            raise ConfigError("setting 'node-token-file': no node tokens left; this coordinator authenticates "
                              "nodes by token (restart it to change that)")
        changed = sorted(name for name in new if new[name] != self._secrets[name])
        if self.node_auth == "token":
            self.node_authorizer.set_tokens(new["node-token"])
        elif new["node-token"] and "node-token" in changed:
            log.warning("node tokens are configured now but take effect only after a restart",
                        extra={"node_auth": self.node_auth})
        self.guard.update(self._token_rules(new))
        self.prober.set_metadata(security.auth_metadata(new["node-storage-token"]))
        self._secrets = new
        return changed

    # -- the monitor timer --------------------------------------------------------------------------
    async def _monitor_loop(self) -> None:
        interval = self.settings.monitor_interval_s
        while True:
            await asyncio.sleep(interval)
            try:
                await self.monitor_pass()
            except Exception:  # noqa: BLE001 - the monitor must keep running
                log.exception("saturation monitor tick failed")
            if self.freezer is not None and self.freezer.thaw_due():
                self.freezer.thaw()

    async def monitor_pass(self) -> None:
        """One monitor pass. The filter readings are gathered MONITOR_READ_CHUNK nodes at a time,
        the event loop running between the parts, so a pass over a large fleet never holds the
        loop (or the lock) for long: lookups wait for one part at most (docs/coordinator.md,
        "Sizing settings for large fleets")."""
        readings = self.state.readings
        node_ids = readings.node_ids()
        now = self._clock()
        gathered: list[FilterReading] = []
        for start in range(0, len(node_ids), MONITOR_READ_CHUNK):
            gathered += await self.state.shell.call(readings.filters, now, node_ids[start:start + MONITOR_READ_CHUNK])
            await asyncio.sleep(0)
        await self.state.shell.call(self.operations.tick, gathered)

    # -- lifecycle -----------------------------------------------------------------------------------
    async def start(self) -> None:
        await self._set_health(health_pb2.HealthCheckResponse.NOT_SERVING)
        await self.server.start()
        if self.settings.metrics_port:
            host = self.settings.listen.rpartition(":")[0]
            self.metrics_server = self.metrics.serve(host, self.settings.metrics_port)
            log.info("metrics endpoint", extra={"address": f"{host}:{self.settings.metrics_port}"})
        self._monitor = asyncio.create_task(self._monitor_loop(), name="monitor")
        await self._set_health(health_pb2.HealthCheckResponse.SERVING)
        log.info("serving", extra={"address": self.address, "mode": self.state.policy.current.mode,
                                   "known_nodes": len(self.state.readings.node_ids()),
                                   "locate_threads": self.state.replicas.workers,
                                   "admin_token": "configured" if self._secrets["token"] else "none",
                                   "read_token": "configured" if self._secrets["read-token"] else "none",
                                   "write_token": "configured" if self._secrets["write-token"] else "none",
                                   "tls": "mutual" if self.settings.tls_client_auth else
                                   "server" if self.settings.tls_files().enabled else "off",
                                   "node_auth": self.node_auth, "max_sync_streams": self.settings.max_sync_streams,
                                   "max_pending_streams": self.settings.max_pending_streams,
                                   "hello_timeout_ms": self.settings.hello_timeout_ms})

    async def stop(self, grace: float = 3.0) -> None:
        if self._stopped:
            return
        self._stopped = True
        log.info("shutting down")
        await self._set_health(health_pb2.HealthCheckResponse.NOT_SERVING)
        if self._monitor is not None:
            self._monitor.cancel()
        await self.sync.stop()
        await self.server.stop(grace)
        await self.prober.close()
        self.work.shutdown(wait=False, cancel_futures=True)
        if self.metrics_server is not None:
            try:
                self.metrics_server.shutdown()
            except Exception:  # noqa: BLE001 - best effort on the way out
                pass
        log.info("stopped")


def run(settings: CoordinatorSettings) -> int:
    """Run until SIGTERM/SIGINT; returns the process exit code."""
    setup_logging(settings)

    async def start(daemon: CoordinatorDaemon, _cancel: threading.Event) -> None:
        await daemon.start()
        # short collector pauses (coordinator/gc_pauses.py): a process-wide choice, made here
        daemon.freezer = SurvivorFreezer()
        daemon.freezer.install()

    return run_until_signalled("coordinator", log, lambda: CoordinatorDaemon(settings), start,
                               startup_errors=(OSError, RuntimeError, ValueError))
