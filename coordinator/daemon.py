"""Wiring of a coordinator process: fleet state, gRPC services + health, monitor timer, metrics, logs.

A coordinator holds only soft state: replicas come from the nodes (each answers the restart's
NeedSnapshot with a snapshot). The optional state dir remembers which nodes exist so, after a
restart, they are listed as stale (safe mode) until they resync instead of being unknown.
SIGTERM / SIGINT: health NOT_SERVING, sync streams end, the server drains, the process exits.
"""

from __future__ import annotations

import logging
import threading
import time
from concurrent import futures
from typing import Any

import grpc
from grpc_health.v1 import health, health_pb2, health_pb2_grpc

from shardsieve.coordinator.admin_service import AdminService
from shardsieve.coordinator.fleet import Fleet
from shardsieve.coordinator.metrics import Metrics
from shardsieve.coordinator.probes import Prober
from shardsieve.coordinator.router_service import Router, RouterService, add_router_service
from shardsieve.coordinator.saturation import Decision, RebuildPlan, SaturationMonitor
from shardsieve.coordinator.settings import CoordinatorSettings
from shardsieve.coordinator.sync_service import SyncService
from shardsieve import logs, security
from shardsieve.config import ConfigError
from shardsieve.daemon_runner import run_until_signalled
from shardsieve.v1 import admin_pb2_grpc, sync_pb2_grpc

log = logging.getLogger("shardsieve.coordinator")

HEALTH_SERVICES = ("", "shardsieve.v1.Router", "shardsieve.v1.Admin", "shardsieve.v1.FilterSync")
def setup_logging(settings: CoordinatorSettings) -> None:
    logs.setup_logging("coordinator", settings.id, settings.log_format, settings.log_level)


class CoordinatorDaemon:
    """One running coordinator. start() returns once SERVING; stop() is idempotent."""

    def __init__(self, settings: CoordinatorSettings) -> None:
        self.settings = settings
        self.fleet = Fleet(settings.policy(), state_dir=settings.state_dir, expected=settings.expected_nodes(),
                           monitor=SaturationMonitor(rebuild_timeout_s=settings.rebuild_timeout_s,
                                                      shrink_grace_s=settings.shrink_grace_s),
                           max_hints=settings.max_hints, hint_max_age_s=settings.hint_max_age_s,
                           locate_threads=settings.locate_threads)
        self.metrics = Metrics(self.fleet)
        tls = settings.tls_files()
        self._secrets = secrets = settings.secrets()
        self.prober = Prober(settings.probe_threads, credentials=tls.channel_credentials(),
                             metadata=security.auth_metadata(secrets["node-storage-token"]))
        self.router = Router(self.fleet, self.prober, read_deadline_s=settings.read_deadline_ms / 1000.0,
                             write_deadline_s=settings.write_deadline_ms / 1000.0, metrics=self.metrics,
                             max_key_bytes=settings.max_key_bytes, max_value_bytes=settings.max_value_bytes,
                             max_batch_keys=settings.max_batch_keys)
        node_tokens = secrets["node-token"]
        self.node_auth = "certificate" if settings.tls_client_auth else "token" if node_tokens else "open"
        self.node_authorizer = security.NodeAuthorizer(self.node_auth, node_tokens)
        self.sync = SyncService(self.fleet, metrics=self.metrics, authorizer=self.node_authorizer,
                                limiter=security.StreamLimiter(settings.max_streams_per_peer),
                                limits=settings.sync_limits())
        self.admin = AdminService(self.fleet, settings.id, secrets["token"], self.start_rebuild,
                                  forget_node=self.sync.forget)
        # Installed even with no token configured, so a reload (SIGHUP) can start requiring one.
        self.guard = security.TokenGuard(self._token_rules(secrets))
        self.server = grpc.server(futures.ThreadPoolExecutor(max_workers=settings.grpc_workers,
                                                             thread_name_prefix="grpc"),
                                  interceptors=[self.guard, security.DecodeGuard()],
                                  options=[("grpc.max_receive_message_length", settings.max_message_bytes),
                                           ("grpc.max_send_message_length", 64 << 20)])
        add_router_service(RouterService(self.router), self.server)
        admin_pb2_grpc.add_AdminServicer_to_server(self.admin, self.server)
        sync_pb2_grpc.add_FilterSyncServicer_to_server(self.sync, self.server)
        self.health = health.HealthServicer()
        health_pb2_grpc.add_HealthServicer_to_server(self.health, self.server)
        self._set_health(health_pb2.HealthCheckResponse.NOT_SERVING)
        self.port = security.open_port(self.server, settings.listen, tls, settings.allow_plaintext, log,
                                       "coordinator")
        if self.node_auth == "open":
            log.warning("sync streams are not authenticated: any peer can push any node id's filter; configure "
                        "tls-client-auth (mutual TLS) or node-token-file")
        if self.port == 0:
            raise OSError(f"cannot listen on {settings.listen} (address in use or not local)")
        host = settings.listen.rpartition(":")[0]
        self.address = f"{host}:{self.port}"
        self.metrics_server: Any = None
        self._stop = threading.Event()
        self._stopped = threading.Event()
        self._monitor_thread = threading.Thread(target=self._monitor_loop, name="monitor", daemon=True)

    def _set_health(self, status: int) -> None:
        for name in HEALTH_SERVICES:
            self.health.set(name, status)

    # -- tokens --------------------------------------------------------------------------------------
    @staticmethod
    def _token_rules(secrets: dict[str, Any]) -> dict[str, str]:
        write, read = secrets["write-token"], secrets["read-token"]
        return {"/shardsieve.v1.Admin/": secrets["token"],
                "/shardsieve.v1.Router/Write": write, "/shardsieve.v1.Router/Remove": write,
                "/shardsieve.v1.Router/Locate": read, "/shardsieve.v1.Router/LocateBatch": read,
                "/shardsieve.v1.Router/Read": read}

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
        self.admin.set_token(new["token"])
        self.prober.set_metadata(security.auth_metadata(new["node-storage-token"]))
        self._secrets = new
        return changed

    # -- rebuilds ------------------------------------------------------------------------------------
    def start_rebuild(self, plan: RebuildPlan, now: float) -> None:
        """Ask the node to rebuild over its sync stream and mark the slot taken (admin + monitor)."""
        rec = next((r for r in self.fleet.records() if r.node_id == plan.node_id), None)
        try:
            self.sync.send_rebuild(plan.node_id, plan.capacity, plan.target_fpr, plan.reason)
        except (KeyError, ValueError) as exc:
            self.fleet.monitor.forget(plan.node_id)
            self.fleet.record_decisions([Decision(time.time(), plan.node_id, "skip", f"rebuild not sent: {exc}")])
            return
        if plan.node_id not in self.fleet.monitor.in_flight:
            self.fleet.monitor.started(plan, rec.epoch if rec else 0, now)

    def _monitor_loop(self) -> None:
        interval = self.settings.monitor_interval_s
        while not self._stop.wait(interval):
            try:
                self.sync.refresh()
                self.fleet.expire_hints(time.monotonic())
                views = self.fleet.views(time.monotonic())
                result = self.fleet.monitor.tick(time.time(), views, self.fleet.policy)
                self.fleet.record_decisions(result.decisions)
                for plan in result.rebuilds:
                    self.start_rebuild(plan, time.time())
            except Exception:  # noqa: BLE001 - the monitor must keep running
                log.exception("saturation monitor tick failed")

    # -- lifecycle -----------------------------------------------------------------------------------
    def start(self) -> None:
        self.server.start()
        if self.settings.metrics_port:
            host = self.settings.listen.rpartition(":")[0]
            self.metrics_server = self.metrics.serve(host, self.settings.metrics_port)
            log.info("metrics endpoint", extra={"address": f"{host}:{self.settings.metrics_port}"})
        self._monitor_thread.start()
        self._set_health(health_pb2.HealthCheckResponse.SERVING)
        log.info("serving", extra={"address": self.address, "mode": self.fleet.policy.mode,
                                   "known_nodes": len(self.fleet.nodes), "locate_threads": self.fleet.index.workers,
                                   "admin_token": "configured" if self._secrets["token"] else "none",
                                   "read_token": "configured" if self._secrets["read-token"] else "none",
                                   "write_token": "configured" if self._secrets["write-token"] else "none",
                                   "tls": "mutual" if self.settings.tls_client_auth else
                                   "server" if self.settings.tls_files().enabled else "off",
                                   "node_auth": self.node_auth})

    def stop(self, grace: float = 3.0) -> None:
        if self._stopped.is_set():
            return
        self._stopped.set()
        log.info("shutting down")
        self._set_health(health_pb2.HealthCheckResponse.NOT_SERVING)
        self._stop.set()
        self.sync.stop()
        self.server.stop(grace).wait(grace + 1)
        self.prober.close()
        if self.metrics_server is not None:
            try:
                self.metrics_server.shutdown()
            except Exception:  # noqa: BLE001 - best effort on the way out
                pass
        log.info("stopped")


def run(settings: CoordinatorSettings) -> int:
    """Run until SIGTERM/SIGINT; returns the process exit code."""
    setup_logging(settings)
    return run_until_signalled("coordinator", log, lambda: CoordinatorDaemon(settings),
                               lambda daemon, _stop: daemon.start(),
                               startup_errors=(OSError, RuntimeError, ValueError))
