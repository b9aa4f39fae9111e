"""Wiring of a node process: store, core, gRPC server + health, sync drivers, metrics, logs, shutdown.

One asyncio event loop serves gRPC (grpc.aio), runs the push timer, the heartbeats and one
stream per coordinator (docs/node.md, "Threads and the event loop"). What may block runs in
threads: store commits on the writer thread (node/writer.py), reads on the read threads,
NodeSync steps on the sync thread (they take the node lock, which a commit holds during its
fsync), the filter load and the rebuild scan on their own threads.

Start order (why): the gRPC server starts first with health NOT_SERVING so probes get an
answer at once; the filter is then rebuilt from the store (progress logged), the new epoch
persisted, health flips to SERVING, and only then do sync drivers open their streams.
SIGTERM / SIGINT: health NOT_SERVING, sync streams end, the server drains in-flight calls
(a grace period), the writer commits what is queued, the store closes. Nothing acknowledged is
pending at that point: acks are sent only after the store commit returned.
"""

from __future__ import annotations

import asyncio
import logging
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import grpc
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_health.v1.health import aio as health_aio

from shardsieve.node.core import Limits, LoadCancelled, NodeCore
from shardsieve.node.pusher import Pusher
from shardsieve.node.service import NodeStorageService
from shardsieve.node.settings import NodeSettings, ServingSettings
from shardsieve.node.store import StoreError, open_store
from shardsieve.node.sync_driver import SyncDriver
from shardsieve.node.writer import GroupWriter
from shardsieve import logs, security
from shardsieve.daemon_runner import run_until_signalled
from shardsieve.v1 import storage_pb2_grpc

log = logging.getLogger("shardsieve.node")

HEALTH_SERVICES = ("", "shardsieve.v1.NodeStorage")


def setup_logging(settings: ServingSettings) -> None:
    logs.setup_logging("node", settings.id, settings.log_format, settings.log_level)


class NodeDaemon:
    """One running node; build it on the event loop that runs it. start() returns once SERVING;
    stop() is idempotent.

    The agent (node/agent_daemon.py) is this daemon with four parts replaced: how the core is
    opened (`_open_core`), the storage servicer (`_storage_service`), how the filter is loaded
    (`_load`) and how the store is closed (`_close_store`)."""

    def __init__(self, settings: ServingSettings) -> None:
        self.settings = settings
        # The listen address first: a taken port fails the start before anything else is opened.
        self._secrets = settings.secrets()
        # Installed even with no token configured, so a reload (SIGHUP) can start requiring one.
        self.guard = security.TokenGuard({"/shardsieve.v1.NodeStorage/": self._secrets["token"]})
        self.server = grpc.aio.server(interceptors=[self.guard, security.DecodeGuard()],
                                      options=[("grpc.max_receive_message_length", 64 << 20),
                                               ("grpc.max_send_message_length", 64 << 20),
                                               security.EXCLUSIVE_PORT_OPTION])
        self.port = security.open_port(self.server, settings.listen, settings.tls_files(), settings.allow_plaintext,
                                       log, "node storage")
        host = settings.listen.rpartition(":")[0]
        self.address = f"{host}:{self.port}"
        self.limits = Limits(settings.max_key_bytes, settings.max_value_bytes, settings.max_batch)
        self.core = self._open_core()
        self.core.storage_address = settings.advertise or self.address
        self.writer: GroupWriter | None = GroupWriter(self.core) if self.writes_own_store else None
        self.readers = ThreadPoolExecutor(max_workers=settings.read_threads, thread_name_prefix="node-read")
        # NodeSync steps, one at a time and in order (stream open/close, messages, cuts, ticks)
        self.sync_thread = ThreadPoolExecutor(max_workers=1, thread_name_prefix="node-sync")
        self.health = health_aio.HealthServicer()
        storage_pb2_grpc.add_NodeStorageServicer_to_server(self._storage_service(), self.server)
        health_pb2_grpc.add_HealthServicer_to_server(self.health, self.server)
        self.pusher = Pusher(self.core, settings.push_interval_ms / 1000.0, self.sync_thread)
        self.drivers: list[SyncDriver] = []
        self.metrics_server: Any = None
        self._stopped = False

    # ------------------------------------------------------------------ the parts an agent replaces
    writes_own_store = True   # False: no group writer (an agent's writes arrive through its store's feed)

    def _open_core(self) -> NodeCore:
        settings = self.settings
        assert isinstance(settings, NodeSettings)
        self.store = open_store(settings.store, settings.data, settings.sync_level)
        return NodeCore(settings.id, self.store, capacity=settings.capacity, target_fpr=settings.fpr,
                        seed=settings.seed, history_limit=settings.history_limit,
                        push_threshold=settings.push_threshold, push_interval=settings.push_interval_ms / 1000.0,
                        limits=self.limits, scan_batch=settings.scan_batch)

    def _storage_service(self) -> NodeStorageService:
        return NodeStorageService(self.core, self.writer, self.readers)

    async def _load(self, cancel: threading.Event | None) -> None:
        """Scan the store into the filter (off the loop); LoadCancelled when `cancel` is set."""
        def progress(keys: int, seconds: float) -> None:
            log.info("loading filter from store", extra={"keys_scanned": keys, "seconds": round(seconds, 2)})

        await asyncio.get_running_loop().run_in_executor(None, self.core.load, progress, cancel)

    def _describe_store(self) -> dict[str, object]:
        settings = self.settings
        assert isinstance(settings, NodeSettings)
        return {"data": str(settings.data), "sync_level": settings.sync_level, "store": settings.store}

    async def _stop_feed(self) -> None:
        """An agent stops applying its store's changes here (before the core stops)."""

    async def _close_store(self) -> None:
        self.store.close()

    def _feed_figures(self) -> dict[str, float] | None:
        """An agent's feed figures for the metrics endpoint (None: a node has no feed)."""
        return None

    def _driver_hold(self) -> str:
        """Why new sync streams must wait ('' : they may open)."""
        return ""

    # ------------------------------------------------------------------ lifecycle
    async def _set_health(self, status: int) -> None:
        for name in HEALTH_SERVICES:
            await self.health.set(name, status)

    async def start(self, cancel: threading.Event | None = None) -> None:
        """Serve health at once, load the filter (abandoned with LoadCancelled if cancel is set),
        then SERVING and sync streams."""
        await self._set_health(health_pb2.HealthCheckResponse.NOT_SERVING)
        await self.server.start()
        if self.writer is not None:
            self.writer.start()
        log.info("listening", extra={"address": self.address, **self._describe_store()})
        if self.settings.metrics_port:
            from shardsieve.node.metrics import start_metrics

            host = self.settings.listen.rpartition(":")[0]
            self.metrics_server = start_metrics(self.core, host, self.settings.metrics_port,
                                                lambda: self.drivers, self._feed_figures)
            log.info("metrics endpoint", extra={"address": f"{host}:{self.settings.metrics_port}"})
        await self._load(cancel)
        await self._set_health(health_pb2.HealthCheckResponse.SERVING)
        log.info("serving", extra={"address": self.address, "epoch": self.core.epoch,
                                   "keys": self.core.key_count, "geometry": str(self.core.geometry)})
        self.pusher.start()
        for addr in self.settings.coordinator:
            driver = SyncDriver(self.core, addr, push_interval=self.settings.push_interval_ms / 1000.0,
                                heartbeat_interval=self.settings.heartbeat_ms / 1000.0,
                                backoff_min=self.settings.reconnect_min_ms / 1000.0,
                                backoff_max=self.settings.reconnect_max_ms / 1000.0,
                                credentials=self.settings.tls_files().channel_credentials(),
                                metadata=security.auth_metadata(self._secrets["sync-token"]),
                                executor=self.sync_thread)
            driver.start(held=self._driver_hold())
            self.drivers.append(driver)

    def reload_secrets(self) -> list[str]:
        """Read the token files again and apply them (SIGHUP): returns the names of the settings
        whose token changed. A bad or unreadable file raises ConfigError and the tokens in force
        stay. The storage token applies to the next call; the sync token to the next (re)connect
        of each sync stream (an open stream was authenticated when it opened)."""
        new = self.settings.secrets()
        changed = sorted(name for name in new if new[name] != self._secrets[name])
        self.guard.update({"/shardsieve.v1.NodeStorage/": new["token"]})
        for driver in self.drivers:
            driver.metadata = security.auth_metadata(new["sync-token"])
        self._secrets = new
        return changed

    async def stop(self, grace: float = 5.0) -> None:
        if self._stopped:
            return
        self._stopped = True
        log.info("shutting down")
        await self._set_health(health_pb2.HealthCheckResponse.NOT_SERVING)
        await self.pusher.stop()
        await asyncio.gather(*(driver.stop() for driver in self.drivers))
        await self.server.stop(grace)
        loop = asyncio.get_running_loop()
        await self._stop_feed()
        await loop.run_in_executor(None, self.core.stop)         # a rebuild scan ends
        if self.writer is not None:
            await loop.run_in_executor(None, self.writer.stop)   # what is queued commits
        self.readers.shutdown(wait=True)
        self.sync_thread.shutdown(wait=True)
        if self.metrics_server is not None:
            try:
                self.metrics_server.shutdown()
            except Exception:  # noqa: BLE001 - best effort on the way out
                pass
        await self._close_store()
        log.info("stopped")


def run(settings: NodeSettings) -> int:
    """Run until SIGTERM/SIGINT; returns the process exit code."""
    setup_logging(settings)

    async def start(daemon: NodeDaemon, cancel: threading.Event) -> None:
        await daemon.start(cancel)

    return run_until_signalled("node", log, lambda: NodeDaemon(settings), start,
                               startup_errors=(StoreError, OSError, RuntimeError, ValueError),
                               quiet_stops=(LoadCancelled,))
