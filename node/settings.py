"""Settings of the storage node and of the agent: flags > environment > a TOML table > defaults.

`ServingSettings` holds what every process that serves NodeStorage and streams a filter to
coordinators needs (identity, addresses, filter size, sync cadence, limits, logs, TLS and
tokens). `NodeSettings` adds the node's own SQLite store (SHARDSIEVE_NODE_*, [node]);
`AgentSettings` adds the store an agent attaches to (SHARDSIEVE_AGENT_*, [agent];
docs/agents.md). So every shared setting reads, validates and behaves the same for both.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import ClassVar
from urllib.parse import parse_qs, urlsplit

from shardsieve.config import ConfigError, check_address, setting
from shardsieve.limits import node_id_problem

ENV_PREFIX = "SHARDSIEVE_NODE_"
SECTION = "node"
AGENT_ENV_PREFIX = "SHARDSIEVE_AGENT_"
AGENT_SECTION = "agent"


@dataclass(frozen=True)
class ServingSettings:
    """The settings a node and an agent share; `validate` names the first bad setting and why."""

    env_prefix: ClassVar[str] = ENV_PREFIX
    section: ClassVar[str] = SECTION

    id: str = setting("", "Stable node id: 1 to 64 of a-z, 0-9, '.', '_', '-', starting with a letter or digit "
                          "(docs/node.md, \"Node ids\"); required.")
    listen: str = setting("127.0.0.1:7500", "HOST:PORT the NodeStorage gRPC service listens on (port 0: any free port).")
    advertise: str = setting("", "HOST:PORT coordinators use to reach this node; empty: the listen address.")
    coordinator: list[str] = setting([], "Coordinator HOST:PORT to stream filter changes to; repeat for several.")
    capacity: int = setting(100_000, "Keys the filter is sized for (a rebuild may replace it; the rebuilt size is kept).")
    fpr: float = setting(0.01, "Target false-positive rate of the filter, in (0, 1).")
    seed: int = setting(0, "Hash seed of the filter geometry (0..2^32-1).")
    metrics_port: int = setting(0, "Port of the Prometheus metrics endpoint on the listen host; 0: disabled.")
    push_interval_ms: int = setting(50, "Coalesce filter changes and push a delta at least this often (ms).")
    push_threshold: int = setting(4096, "Push sooner once this many bits changed since the last delta.")
    heartbeat_ms: int = setting(1000, "Send a heartbeat with node stats this often (ms).")
    max_key_bytes: int = setting(1024, "Largest key accepted, in bytes.")
    max_value_bytes: int = setting(1_048_576, "Largest value accepted, in bytes.")
    max_batch: int = setting(1000, "Most items accepted in one batch request.")
    scan_batch: int = setting(2000, "Keys per locked step of a rebuild scan (smaller: shorter write pauses).")
    history_limit: int = setting(1024, "Deltas kept per epoch for lagging coordinators; beyond that they get a snapshot.")
    reconnect_min_ms: int = setting(100, "First reconnect delay to a coordinator (ms); doubles per failure, jittered.")
    reconnect_max_ms: int = setting(5000, "Largest reconnect delay to a coordinator (ms).")
    log_level: str = setting("info", "Log level: debug, info, warning, error.")
    log_format: str = setting("json", "Log format: 'json' (one object per line) or 'text'.")
    read_threads: int = setting(4, "Threads serving reads, key scans and stats from the store (gRPC itself runs "
                                   "on one event loop; writes commit on one writer thread).")
    tls_cert: Path | None = setting(None, "PEM certificate of this node (TLS server; client certificate on sync "
                                          "streams, whose common name must equal the node id under mutual TLS).")
    tls_key: Path | None = setting(None, "PEM private key of tls-cert.")
    tls_ca: Path | None = setting(None, "PEM CA that signed the coordinators' (and clients') certificates.")
    tls_client_auth: bool = setting(False, "Mutual TLS on the storage API: callers must show a certificate "
                                           "signed by tls-ca.")
    allow_plaintext: bool = setting(False, "Listen and connect without TLS (trusted loopback setups only; "
                                           "logs a warning).")
    sync_token: str = setting("", "Bearer token presented on sync streams (the coordinator's node-token for this "
                                  "id); empty: none.")
    sync_token_file: Path | None = setting(None, "File holding sync-token (first line).")
    token: str = setting("", "Bearer token required by the storage API; empty: no token.")
    token_file: Path | None = setting(None, "File holding the storage API token (first line).")

    def validate(self) -> None:
        if not self.id:
            raise ConfigError(f"setting 'id' is required (--id, {self.env_prefix}ID or id in [{self.section}])")
        problem = node_id_problem(self.id)
        if problem:
            raise ConfigError(f"setting 'id': {problem}")
        check_address("listen", self.listen)
        if self.advertise:
            check_address("advertise", self.advertise)
        for addr in self.coordinator:
            check_address("coordinator", addr)
        if len(set(self.coordinator)) != len(self.coordinator):
            raise ConfigError("setting 'coordinator': the same address is listed twice")
        if self.capacity < 1:
            raise ConfigError(f"setting 'capacity': must be at least 1, got {self.capacity}")
        if not (0.0 < self.fpr < 1.0) or math.isnan(self.fpr):
            raise ConfigError(f"setting 'fpr': must be strictly between 0 and 1, got {self.fpr}")
        if not 0 <= self.seed <= 0xFFFFFFFF:
            raise ConfigError(f"setting 'seed': must be in 0..4294967295, got {self.seed}")
        if not 0 <= self.metrics_port <= 65535:
            raise ConfigError(f"setting 'metrics-port': must be in 0..65535, got {self.metrics_port}")
        positive = ("push_interval_ms", "push_threshold", "heartbeat_ms", "max_key_bytes", "max_value_bytes",
                    "max_batch", "scan_batch", "history_limit", "reconnect_min_ms", "reconnect_max_ms", "read_threads")
        for name in positive:
            if getattr(self, name) < 1:
                raise ConfigError(f"setting '{name.replace('_', '-')}': must be at least 1, got {getattr(self, name)}")
        if self.reconnect_max_ms < self.reconnect_min_ms:
            raise ConfigError("setting 'reconnect-max-ms': must not be below reconnect-min-ms")
        if self.log_level.lower() not in ("debug", "info", "warning", "error"):
            raise ConfigError(f"setting 'log-level': must be debug, info, warning or error, got {self.log_level!r}")
        if self.log_format not in ("json", "text"):
            raise ConfigError(f"setting 'log-format': must be 'json' or 'text', got {self.log_format!r}")
        self.tls_files().validate()          # TLS files and tokens: shardsieve/security.py
        self.secret("sync_token")
        self.secret("token")

    def tls_files(self):  # type: ignore[no-untyped-def]
        from shardsieve.security import TlsFiles

        return TlsFiles(self.tls_cert, self.tls_key, self.tls_ca, self.tls_client_auth)

    def secret(self, name: str) -> str:
        """'sync_token' / 'token': the value, else its file's first line; never logged."""
        from shardsieve.security import read_token

        return read_token(getattr(self, name), getattr(self, f"{name}_file"), name.replace("_", "-"))

    def secrets(self) -> dict[str, str]:
        """Both token settings as they stand now (token files read again): what a reload applies."""
        return {"token": self.secret("token"), "sync-token": self.secret("sync_token")}

    @property
    def storage_address(self) -> str:
        """The address put in Hello; note a listen port 0 is resolved by the daemon."""
        return self.advertise or self.listen


@dataclass(frozen=True)
class NodeSettings(ServingSettings):
    """Everything a node process needs: the shared settings and its own SQLite store."""

    data: Path = setting(Path("./node-data"), "Directory of the node's SQLite store.")
    sync_level: str = setting("full", "Store durability: 'full' (survives process kill and power loss) or "
                                      "'normal' (survives process kill; power loss may lose the last writes).")
    store: str = setting("sqlite", "Store backend: 'sqlite' (the only durable one; the in-memory store is for unit tests only).")

    def validate(self) -> None:
        super().validate()
        if self.sync_level not in ("full", "normal"):
            raise ConfigError(f"setting 'sync-level': must be 'full' or 'normal', got {self.sync_level!r}")
        if self.store == "memory":
            raise ConfigError("setting 'store': the in-memory store is for unit tests only (it would lose every "
                              "acknowledged write on exit); use 'sqlite'")
        if self.store != "sqlite":
            raise ConfigError(f"setting 'store': must be 'sqlite', got {self.store!r}")


REDIS_SCHEMES = ("redis", "rediss")
POSTGRES_SCHEMES = ("postgresql", "postgres")
LEDGER_KINDS = ("memory", "sqlite")


def store_kind(url: str) -> str:
    """'redis' or 'postgresql' for a well-formed store address; ConfigError naming what is wrong.
    Syntax only: whether the store answers and is set up is the adapter's check at start."""
    parts = urlsplit(url)
    scheme = parts.scheme.lower()
    if scheme in REDIS_SCHEMES:
        try:
            parts.port
        except ValueError:
            raise ConfigError(f"setting 'store': the port in {url!r} is not a number 0..65535") from None
        db = parts.path.strip("/") or "0"
        if not parts.hostname or not db.isdigit():
            raise ConfigError(f"setting 'store': {url!r} is not redis://HOST:PORT/DB (DB a number)")
        return "redis"
    if scheme in POSTGRES_SCHEMES:
        try:
            parts.port
        except ValueError:
            raise ConfigError(f"setting 'store': the port in {url!r} is not a number 0..65535") from None
        query = parse_qs(parts.query)
        if not parts.hostname or not parts.path.strip("/") or not query.get("table") or not query.get("key"):
            raise ConfigError(f"setting 'store': {url!r} is not "
                              f"postgresql://USER@HOST:PORT/DB?table=[SCHEMA.]TABLE&key=COLUMN[&value=COLUMN]")
        return "postgresql"
    raise ConfigError(f"setting 'store': {url!r} is not an address of a store an agent attaches to; use "
                      f"redis://HOST:PORT/DB or postgresql://USER@HOST:PORT/DB?table=TABLE&key=COLUMN")


@dataclass(frozen=True)
class AgentSettings(ServingSettings):
    """Everything an agent process needs: the shared settings and the store it attaches to
    (docs/agents.md, "Running an agent")."""

    env_prefix: ClassVar[str] = AGENT_ENV_PREFIX
    section: ClassVar[str] = AGENT_SECTION

    store: str = setting("", "Address of the store to attach to: redis://[USER@]HOST:PORT/DB (rediss:// for TLS) "
                             "or postgresql://USER@HOST:PORT/DB?table=[SCHEMA.]TABLE&key=COLUMN[&value=COLUMN] "
                             "(value=: the column probes return and routed writes set); required.")
    store_password_file: Path | None = setting(None, "File holding the store's password (first line), for an "
                                                     "address without one (keeps it out of `ps` and the config).")
    ledger: str = setting("", "Where the agent keeps the exact set of keys its filter counts: 'memory' or "
                              "'sqlite' (in state-dir); empty: memory for Redis, sqlite for PostgreSQL (which "
                              "lets a restart resume the replication slot instead of listing the table).")
    state_dir: Path = setting(Path("./agent-state"), "Folder of the agent's own state: its epoch counter and, "
                                                     "with the sqlite ledger, the ledger.")
    configure_notifications: bool = setting(False, "Redis only: turn on the notify-keyspace-events classes the "
                                                   "agent needs (CONFIG SET; not saved in redis.conf) instead of "
                                                   "refusing to start.")
    write_timeout_ms: int = setting(10_000, "How long a write routed through a coordinator waits for the store's "
                                            "change feed to bring it into the filter; past it the write (already "
                                            "in the store) fails UNAVAILABLE and may be retried.")

    def validate(self) -> None:
        super().validate()
        if not self.store:
            raise ConfigError(f"setting 'store' is required (--store, {self.env_prefix}STORE or store in "
                              f"[{self.section}])")
        kind = store_kind(self.store)
        if self.ledger not in ("", *LEDGER_KINDS):
            raise ConfigError(f"setting 'ledger': must be 'memory' or 'sqlite', got {self.ledger!r}")
        if self.configure_notifications and kind != "redis":
            raise ConfigError("setting 'configure-notifications': applies to a Redis store only")
        if self.write_timeout_ms < 1:
            raise ConfigError(f"setting 'write-timeout-ms': must be at least 1, got {self.write_timeout_ms}")
        if self.store_password_file is not None:
            self.store_password()

    @property
    def store_kind(self) -> str:
        return store_kind(self.store)

    @property
    def ledger_kind(self) -> str:
        """The ledger in force: the setting, or the store's default."""
        return self.ledger or ("memory" if self.store_kind == "redis" else "sqlite")

    def store_password(self) -> str:
        """The first line of store-password-file ('' without one); ConfigError when unreadable."""
        if self.store_password_file is None:
            return ""
        try:
            lines = self.store_password_file.read_text().splitlines()
        except (OSError, ValueError) as exc:
            raise ConfigError(f"setting 'store-password-file': cannot read {str(self.store_password_file)!r}: "
                              f"{exc}") from None
        if not lines or not lines[0]:
            raise ConfigError(f"setting 'store-password-file': {str(self.store_password_file)!r} has no password "
                              f"on its first line")
        return lines[0]
