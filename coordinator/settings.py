"""Settings of the coordinator: flags > SHARDSIEVE_COORDINATOR_* environment > [coordinator] table > defaults."""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from shardsieve.coordinator.policy import MODES, Policy, PolicyError
from shardsieve.config import ConfigError, check_address, setting

ENV_PREFIX = "SHARDSIEVE_COORDINATOR_"
SECTION = "coordinator"


@dataclass(frozen=True)
class CoordinatorSettings:
    """Everything a coordinator process needs; `validate` names the first bad setting and why."""

    id: str = setting("coordinator", "Name of this coordinator in status replies and logs.")
    listen: str = setting("127.0.0.1:7400", "HOST:PORT of the Router, Admin, FilterSync and health services.")
    metrics_port: int = setting(0, "Port of the Prometheus metrics endpoint on the listen host; 0: disabled.")
    state_dir: Path | None = setting(None, "Directory where the coordinator remembers which nodes it has seen "
                                           "(so after a restart they count as stale until they resync); empty: none.")
    expect_node: list[str] = setting([], "NODE_ID=HOST:PORT of a node known before it connects (listed stale "
                                         "until synced); repeat for several.")
    token: str = setting("", "Bearer token required by the Admin API; empty: no token.", env="SHARDSIEVE_COORDINATOR_TOKEN")
    token_file: Path | None = setting(None, "File holding the Admin API bearer token (first line).")
    write_token: str = setting("", "Bearer token required by Write/Remove; empty: open writes.")
    write_token_file: Path | None = setting(None, "File holding the write bearer token (first line).")
    read_token: str = setting("", "Bearer token required by Locate/LocateBatch/Read; empty: open reads.")
    read_token_file: Path | None = setting(None, "File holding the read bearer token (first line).")
    tls_cert: Path | None = setting(None, "PEM certificate of this coordinator (TLS server; client certificate "
                                          "towards nodes).")
    tls_key: Path | None = setting(None, "PEM private key of tls-cert.")
    tls_ca: Path | None = setting(None, "PEM CA that signed the nodes' and clients' certificates.")
    tls_client_auth: bool = setting(False, "Mutual TLS: every client must show a certificate signed by tls-ca; a "
                                           "node's certificate common name must equal its node id.")
    allow_plaintext: bool = setting(False, "Listen without TLS (trusted loopback setups only; logs a warning).")
    node_token: list[str] = setting([], "NODE_ID=TOKEN a node must present on its sync stream (without mutual "
                                        "TLS); repeat for several.")
    node_token_file: Path | None = setting(None, "File of 'NODE_ID TOKEN' lines: the nodes' sync tokens.")
    node_storage_token: str = setting("", "Bearer token sent to the nodes' storage API (when they require one).")
    node_storage_token_file: Path | None = setting(None, "File holding node-storage-token (first line).")
    max_message_bytes: int = setting(64 << 20, "Largest gRPC message received (bytes).")
    max_streams_per_peer: int = setting(64, "Sync streams open at once from one peer host.")
    max_sync_streams: int = setting(4096, "Sync streams open at once in all (one per node is the normal load); "
                                          "past it a new stream is refused RESOURCE_EXHAUSTED.")
    max_pending_streams: int = setting(256, "Sync streams open at once that have not completed their Hello (and "
                                            "authentication); past it a new stream is refused RESOURCE_EXHAUSTED.")
    hello_timeout_ms: int = setting(5000, "A sync stream that has not completed its Hello (and authentication) "
                                          "this long after opening is closed (ms).")
    max_filter_bits: int = setting(1 << 34, "Largest node filter (bits) accepted on a sync stream.")
    max_snapshot_chunks: int = setting(4096, "Most chunks one snapshot may declare.")
    max_replica_bytes: int = setting(0, "Cap on the memory of all node filter replicas (bytes): a rebuild that "
                                        "would take the replicas above it is refused before it starts; 0: half "
                                        "of this machine's physical memory.")
    max_delta_bytes: int = setting(16 << 20, "Largest delta payload accepted (bytes).")
    max_key_bytes: int = setting(64 * 1024, "Largest key accepted by the Router (bytes).")
    max_value_bytes: int = setting(16 << 20, "Largest value accepted by Write (bytes).")
    max_batch_keys: int = setting(100_000, "Most keys in one LocateBatch.")
    max_batch_items: int = setting(1000, "Most keys in one ReadBatch, WriteBatch or RemoveBatch (each node gets one "
                                   "batch call of them: keep it at most the nodes' max-batch).")
    max_batch_bytes: int = setting(16 << 20, "Most bytes of keys and values in one ReadBatch, WriteBatch or "
                                   "RemoveBatch.")
    max_replica_subscribers: int = setting(64, "Clients subscribed to the replica feed (WatchReplicas) at once.")
    mode: str = setting("safe", "Lookup mode: 'safe' lists stale nodes in every candidate list, 'fast' leaves them out.")
    stale_after_s: float = setting(2.0, "A node whose last applied change or heartbeat is older than this is stale (s).")
    target_fpr: float = setting(0.01, "Fleet target false-positive rate, for saturation checks and rebuilds.")
    saturation_ratio: float = setting(2.0, "Flag a node when its FPR exceeds this ratio x target.")
    growth: float = setting(2.0, "Rebuild a saturated node at growth x its keys.")
    shrink_below: float = setting(0.25, "Shrink a filter whose keys fell below this fraction of capacity (0: never).")
    max_concurrent_rebuilds: int = setting(1, "Rebuilds running at once, fleet-wide.")
    auto_rebuild: bool = setting(True, "Start rebuilds of flagged nodes without an operator.")
    min_capacity: int = setting(1000, "Smallest capacity a rebuild asks for.")
    monitor_interval_s: float = setting(1.0, "How often the saturation monitor runs (s).")
    shrink_grace_s: float = setting(300.0, "A node must stay below the shrink threshold this long before it is "
                                    "shrunk (s), so a node that starts empty keeps its configured capacity.")
    rebuild_timeout_s: float = setting(120.0, "Give up waiting for a requested rebuild after this long (s).")
    read_deadline_ms: int = setting(2000, "Default deadline of a Read's probes (ms).")
    write_deadline_ms: int = setting(5000, "Deadline of a write or delete sent to a node (ms).")
    locate_threads: int = setting(0, "Threads one large LocateBatch (16,384 keys or more) is split across; "
                                     "0: one per core, at most 4.")
    max_hints: int = setting(1_000_000, "Most read-your-writes hints held before writes are refused.")
    hint_max_age_s: float = setting(300.0, "Last resort: drop a read-your-writes hint this long after the write "
                                    "even if the node's change never arrived (logged with its numbers; safe mode "
                                    "still lists the node while it is stale) (s).")
    log_level: str = setting("info", "Log level: debug, info, warning, error.")
    log_format: str = setting("json", "Log format: 'json' (one object per line) or 'text'.")

    def validate(self) -> None:
        check_address("listen", self.listen)
        if not self.id or len(self.id) > 128:
            raise ConfigError("setting 'id': must be 1..128 characters")
        if not 0 <= self.metrics_port <= 65535:
            raise ConfigError(f"setting 'metrics-port': must be in 0..65535, got {self.metrics_port}")
        for item in self.expect_node:
            node_id, sep, addr = item.partition("=")
            if not sep or not node_id:
                raise ConfigError(f"setting 'expect-node': {item!r} must look like NODE_ID=HOST:PORT")
            check_address("expect-node", addr)
        if self.mode not in MODES:
            raise ConfigError(f"setting 'mode': must be one of {', '.join(MODES)}, got {self.mode!r}")
        if not (self.shrink_grace_s >= 0 and math.isfinite(self.shrink_grace_s)):
            raise ConfigError(f"setting 'shrink-grace-s': must be 0 or more, got {self.shrink_grace_s}")
        for name in ("monitor_interval_s", "rebuild_timeout_s", "hint_max_age_s"):
            value = getattr(self, name)
            if not (value > 0 and math.isfinite(value)):
                raise ConfigError(f"setting '{name.replace('_', '-')}': must be above 0, got {value}")
        for name in ("read_deadline_ms", "write_deadline_ms", "max_hints"):
            if getattr(self, name) < 1:
                raise ConfigError(f"setting '{name.replace('_', '-')}': must be at least 1, got {getattr(self, name)}")
        if self.max_replica_bytes < 0:
            raise ConfigError(f"setting 'max-replica-bytes': must be 0 (half of the physical memory) or more, got "
                              f"{self.max_replica_bytes}")
        if self.locate_threads < 0:
            raise ConfigError(f"setting 'locate-threads': must be 0 (one per core) or more, got {self.locate_threads}")
        if self.log_level not in ("debug", "info", "warning", "error"):
            raise ConfigError(f"setting 'log-level': must be debug, info, warning or error, got {self.log_level!r}")
        if self.log_format not in ("json", "text"):
            raise ConfigError(f"setting 'log-format': must be 'json' or 'text', got {self.log_format!r}")
        if self.token_file is not None and not self.token_file.is_file():
            raise ConfigError(f"setting 'token-file': {self.token_file} is not a readable file")
        try:
            self.policy().validate()
        except PolicyError as exc:
            raise ConfigError(f"setting {exc}") from None
        self._validate_security()

    def _validate_security(self) -> None:
        """TLS files readable, tokens well-formed, limits positive (see shardsieve/security.py)."""
        from shardsieve.security import parse_node_tokens, read_token

        self.tls_files().validate()
        read_token(self.token, self.token_file, "token")
        read_token(self.read_token, self.read_token_file, "read-token")
        read_token(self.write_token, self.write_token_file, "write-token")
        read_token(self.node_storage_token, self.node_storage_token_file, "node-storage-token")
        parse_node_tokens(self.node_token, self.node_token_file)
        for name in ("max_message_bytes", "max_streams_per_peer", "max_sync_streams", "max_pending_streams",
                     "hello_timeout_ms", "max_key_bytes", "max_value_bytes", "max_batch_keys", "max_batch_items",
                     "max_batch_bytes", "max_replica_subscribers"):
            if getattr(self, name) < 1:
                raise ConfigError(f"setting '{name.replace('_', '-')}': must be at least 1, got {getattr(self, name)}")
        try:
            self.sync_limits().validate()
        except ValueError as exc:
            raise ConfigError(f"setting {exc}") from None

    def tls_files(self):  # type: ignore[no-untyped-def]
        from shardsieve.security import TlsFiles

        return TlsFiles(self.tls_cert, self.tls_key, self.tls_ca, self.tls_client_auth)

    def sync_limits(self):  # type: ignore[no-untyped-def]
        from shardsieve.limits import SyncLimits

        return SyncLimits(max_filter_bits=self.max_filter_bits, max_snapshot_chunks=self.max_snapshot_chunks,
                          max_delta_bytes=self.max_delta_bytes)

    def replica_memory_cap(self) -> int:
        """max-replica-bytes, or half of this machine's physical memory when it is 0."""
        if self.max_replica_bytes:
            return self.max_replica_bytes
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") // 2

    def rebuild_limits(self):  # type: ignore[no-untyped-def]
        """What a rebuilt filter must fit: the sync limits and the replica memory cap."""
        from shardsieve.coordinator.saturation import RebuildLimits

        return RebuildLimits(max_filter_bits=self.max_filter_bits, max_snapshot_chunks=self.max_snapshot_chunks,
                             max_replica_bytes=self.replica_memory_cap())

    def node_tokens(self) -> dict[str, str]:
        from shardsieve.security import parse_node_tokens

        return parse_node_tokens(self.node_token, self.node_token_file)

    def secret(self, name: str) -> str:
        """'token' / 'read_token' / 'write_token' / 'node_storage_token': the value, else its file's first
        line; never logged."""
        from shardsieve.security import read_token

        return read_token(getattr(self, name), getattr(self, f"{name}_file"), name.replace("_", "-"))

    def policy(self) -> Policy:
        return Policy(target_fpr=self.target_fpr, saturation_ratio=self.saturation_ratio, growth=self.growth,
                      shrink_below=self.shrink_below, max_concurrent_rebuilds=self.max_concurrent_rebuilds,
                      auto_rebuild=self.auto_rebuild, stale_after_s=self.stale_after_s, mode=self.mode,
                      min_capacity=self.min_capacity)

    def admin_token(self) -> str:
        """The admin token (flag/env/file value, else the token file's first line); never logged."""
        return self.secret("token")

    def secrets(self) -> dict[str, Any]:
        """Every token setting as it stands now (token files read again): what a reload applies.
        ConfigError names a bad or unreadable one, never a value."""
        return {"token": self.admin_token(), "read-token": self.secret("read_token"),
                "write-token": self.secret("write_token"), "node-storage-token": self.secret("node_storage_token"),
                "node-token": self.node_tokens()}

    def expected_nodes(self) -> dict[str, str]:
        return dict(item.split("=", 1) for item in self.expect_node)
