"""Real Redis and PostgreSQL servers on loopback for the agent tests (and the later integration).

Each server runs from the Debian packages' binaries (redis-server, postgresql-NN; found by
`redis_binary()` and `postgres_bin_dir()`) on a free 127.0.0.1 port with its own
temporary data directory, and is stopped (and its directory removed) by `stop()`.

PostgreSQL refuses to run as root (its docs, "Creating a Database Cluster": the server
must not be run by root). When this process is root (as in CI) the cluster is created
and run as the unprivileged account `nobody` (present on every Debian system), through
`subprocess.Popen(user=..., group=...)`; its data directory is made outside pytest's
private temp folder (which other users cannot enter) and handed to that account.
Otherwise the servers run as the current user.

Missing binaries: `require_binary` fails under CI=true (CI must run these tests) and
skips otherwise, naming what is missing and the Debian package that provides it.

    from shardsieve.testing.servers import start_postgres, start_redis
    redis = start_redis(tmp_path)          # redis.url == "redis://127.0.0.1:PORT/0"
    pg = start_postgres()                  # pg.dsn(user="postgres", dbname="kelp")
    ...
    redis.stop(); pg.stop()
"""

from __future__ import annotations

import os
import pwd
import shutil
import signal
import socket
import subprocess
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

from shardsieve.testing.procs import free_port, wait_until

REDIS_SERVER = "/usr/bin/redis-server"
DEBIAN_POSTGRES_ROOT = "/usr/lib/postgresql"
UNPRIVILEGED_USER = "nobody"


class ServerError(RuntimeError):
    """A test server did not start or stop in time; the message carries its log's tail."""


def require_binary(path: str | None, what: str, package: str) -> str:
    """The path of a server binary, or fail (CI=true) / skip (elsewhere) saying what is missing."""
    import pytest

    if path is not None and os.access(path, os.X_OK):
        return path
    message = f"{what} not found ({path or 'not on PATH'}); install the Debian package {package}"
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(f"CI must run the agent tests: {message}")
    pytest.skip(message)
    raise AssertionError("unreachable")  # pytest.skip raises


def _tail(path: Path, lines: int = 30) -> str:
    try:
        return "\n".join(path.read_text(errors="replace").splitlines()[-lines:])
    except OSError:
        return "(no log)"


def _port_answers(port: int) -> bool:
    with socket.socket() as sock:
        sock.settimeout(0.2)
        return sock.connect_ex(("127.0.0.1", port)) == 0


# --------------------------------------------------------------------------- Redis


@dataclass
class RedisServer:
    """One redis-server process; restart() keeps the port (a new run_id, an empty dataset)."""

    binary: str
    port: int
    data_dir: Path
    settings: Mapping[str, str]
    process: subprocess.Popen | None = None
    log_path: Path = field(init=False)

    def __post_init__(self) -> None:
        self.log_path = self.data_dir / "redis.log"

    def url(self, db: int = 0) -> str:
        return f"redis://127.0.0.1:{self.port}/{db}"

    def client(self, db: int = 0):  # type: ignore[no-untyped-def]
        """A redis-py client for the test's own reads and writes (RESP2, like the adapter)."""
        import redis

        return redis.Redis(host="127.0.0.1", port=self.port, db=db, protocol=2, socket_timeout=10)

    def start(self) -> None:
        argv = [self.binary, "--port", str(self.port), "--bind", "127.0.0.1", "--dir", str(self.data_dir),
                "--save", "", "--appendonly", "no", "--logfile", str(self.log_path)]
        for name, value in self.settings.items():
            argv += [f"--{name}", value]
        self.process = subprocess.Popen(argv, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                        stderr=subprocess.STDOUT, start_new_session=True)
        try:
            wait_until(lambda: self._pong(), 20.0, message=lambda: f"redis-server on port {self.port} answering PING")
        except TimeoutError as exc:
            self.stop()
            raise ServerError(f"{exc}\n{_tail(self.log_path)}") from None

    def _pong(self) -> bool:
        if self.process is not None and self.process.poll() is not None:
            raise ServerError(f"redis-server exited with {self.process.returncode}:\n{_tail(self.log_path)}")
        if not _port_answers(self.port):
            return False
        try:
            return bool(self.client().ping())
        except Exception:  # noqa: BLE001 - still starting
            return False

    def stop(self) -> None:
        proc, self.process = self.process, None
        if proc is None or proc.poll() is not None:
            return
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(10)

    def restart(self) -> None:
        """Stop and start again on the same port: Redis gets a new run_id and (no persistence) no keys."""
        self.stop()
        self.start()


def redis_binary() -> str | None:
    """redis-server from the Debian package's path, else from PATH (None: not installed)."""
    return REDIS_SERVER if os.access(REDIS_SERVER, os.X_OK) else shutil.which("redis-server")


def start_redis(tmp_dir: Path, settings: Mapping[str, str] | None = None, *, binary: str | None = None) -> RedisServer:
    """A redis-server on a free loopback port with notifications set as `settings` says.
    Without `binary` it is looked up and a test skips (or fails under CI) when it is missing."""
    binary = binary or require_binary(redis_binary(), "redis-server", "redis-server")
    data_dir = Path(tmp_dir) / f"redis-{free_port()}"
    data_dir.mkdir(parents=True)
    server = RedisServer(binary, free_port(), data_dir, dict(settings or {}))
    server.start()
    return server


# --------------------------------------------------------------------------- PostgreSQL


def postgres_bin_dir(debian_root: str = DEBIAN_POSTGRES_ROOT) -> str | None:
    """The folder of the PostgreSQL server binaries; None: not installed.

    Debian's packages (postgresql-NN) put the server in /usr/lib/postgresql/NN/bin and only
    wrappers on PATH (Debian PostgreSQL policy, postgresql-common's README: several major
    versions side by side), so those folders come first, the newest version first; then PATH."""
    versions = []
    for name in os.listdir(debian_root) if os.path.isdir(debian_root) else ():
        folder = os.path.join(debian_root, name, "bin")
        if os.access(os.path.join(folder, "postgres"), os.X_OK):
            key = tuple(int(p) if p.isdigit() else -1 for p in name.split("."))
            versions.append((key, folder))
    if versions:
        return max(versions)[1]
    found = shutil.which("postgres")
    return os.path.dirname(os.path.realpath(found)) if found else None


@dataclass
class PostgresServer:
    """One PostgreSQL cluster (initdb'd for the test, trust authentication on loopback only)."""

    bin_dir: str
    port: int
    data_dir: Path
    run_as: pwd.struct_passwd | None   # None: run as the current user
    process: subprocess.Popen | None = None

    @property
    def log_path(self) -> Path:
        return self.data_dir / "server.log"

    def dsn(self, dbname: str = "postgres", user: str = "postgres") -> str:
        return f"host=127.0.0.1 port={self.port} dbname={dbname} user={user}"

    def url(self, dbname: str, user: str, **query: str) -> str:
        tail = "&".join(f"{k}={v}" for k, v in query.items())
        return f"postgresql://{user}@127.0.0.1:{self.port}/{dbname}" + (f"?{tail}" if tail else "")

    def _run(self, argv: Sequence[str], **kwargs) -> subprocess.CompletedProcess:  # type: ignore[no-untyped-def]
        ids = {} if self.run_as is None else {"user": self.run_as.pw_uid, "group": self.run_as.pw_gid,
                                               "extra_groups": []}
        return subprocess.run(list(argv), cwd="/", capture_output=True, text=True, check=False, **ids, **kwargs)

    def init(self) -> None:
        result = self._run([os.path.join(self.bin_dir, "initdb"), "-D", str(self.data_dir / "pgdata"), "-U",
                            "postgres", "--auth=trust", "-E", "UTF8", "--locale=C.UTF-8", "--no-sync"],
                           timeout=120)
        if result.returncode != 0:
            raise ServerError(f"initdb failed ({result.returncode}):\n{result.stdout}\n{result.stderr}")

    def start(self, settings: Mapping[str, str] | None = None) -> None:
        config = {"listen_addresses": "127.0.0.1", "port": str(self.port), "unix_socket_directories": "",
                  "wal_level": "logical", "max_replication_slots": "10", "max_wal_senders": "10",
                  "fsync": "off", "synchronous_commit": "off", "full_page_writes": "off",
                  "shared_buffers": "32MB", "max_connections": "40", **dict(settings or {})}
        argv = [os.path.join(self.bin_dir, "postgres"), "-D", str(self.data_dir / "pgdata")]
        for name, value in config.items():
            argv += ["-c", f"{name}={value}"]
        ids = {} if self.run_as is None else {"user": self.run_as.pw_uid, "group": self.run_as.pw_gid,
                                               "extra_groups": []}
        log = open(self.log_path, "ab")  # noqa: SIM115 - handed to the child, closed below
        try:
            self.process = subprocess.Popen(argv, cwd="/", stdin=subprocess.DEVNULL, stdout=log,
                                            stderr=subprocess.STDOUT, start_new_session=True, **ids)
        finally:
            log.close()
        try:
            wait_until(self._ready, 60.0, interval=0.05, message=lambda: f"postgres on port {self.port} ready")
        except TimeoutError as exc:
            self.stop()
            raise ServerError(f"{exc}\n{_tail(self.log_path)}") from None

    def _ready(self) -> bool:
        if self.process is not None and self.process.poll() is not None:
            raise ServerError(f"postgres exited with {self.process.returncode}:\n{_tail(self.log_path)}")
        if not _port_answers(self.port):
            return False
        import psycopg2

        try:
            psycopg2.connect(self.dsn(), connect_timeout=2).close()
            return True
        except psycopg2.OperationalError:
            return False

    def execute(self, sql: str, params: Sequence[object] = (), dbname: str = "postgres",
                user: str = "postgres") -> list[tuple]:
        """Run one statement in autocommit and return its rows (empty for no result)."""
        import psycopg2

        conn = psycopg2.connect(self.dsn(dbname, user))
        try:
            conn.autocommit = True
            with conn.cursor() as cur:
                cur.execute(sql, tuple(params) if params else None)
                return list(cur.fetchall()) if cur.description is not None else []
        finally:
            conn.close()

    def stop(self, fast: bool = True) -> None:
        """SIGINT (fast shutdown: sessions are ended, a clean checkpoint) and wait."""
        proc, self.process = self.process, None
        if proc is None or proc.poll() is not None:
            return
        proc.send_signal(signal.SIGINT if fast else signal.SIGTERM)
        try:
            proc.wait(60)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(10)

    def remove(self) -> None:
        self.stop()
        shutil.rmtree(self.data_dir, ignore_errors=True)


def start_postgres(settings: Mapping[str, str] | None = None, *, bin_dir: str | None = None) -> PostgresServer:
    """A fresh PostgreSQL cluster with wal_level=logical on a free loopback port. Without
    `bin_dir` the binaries are looked up and a test skips (or fails under CI) when missing.

    Call `remove()` when done (its data directory is outside pytest's temp folder)."""
    if bin_dir is None:
        bin_dir = postgres_bin_dir()
        require_binary(os.path.join(bin_dir, "postgres") if bin_dir else None, "PostgreSQL server binaries",
                       "postgresql-15")
    assert bin_dir is not None
    run_as = pwd.getpwnam(UNPRIVILEGED_USER) if os.geteuid() == 0 else None
    data_dir = Path(tempfile.mkdtemp(prefix="shardsieve-pg-"))
    if run_as is not None:
        os.chown(data_dir, run_as.pw_uid, run_as.pw_gid)
    server = PostgresServer(bin_dir, free_port(), data_dir, run_as)
    try:
        server.init()
        server.start(settings)
    except BaseException:
        server.remove()
        raise
    return server


def harvest_database(pg: PostgresServer, name: str, role: str) -> str:
    """Create database `name` with the cooperative's `harvest (tag text PRIMARY KEY, note text)`
    table, owned by `role` (which may create publications there, as an agent needs)."""
    pg.execute(f"CREATE DATABASE {name}")
    pg.execute(f"GRANT CREATE ON DATABASE {name} TO {role}")
    pg.execute("CREATE TABLE harvest (tag text PRIMARY KEY, note text)", dbname=name)
    pg.execute(f"ALTER TABLE harvest OWNER TO {role}", dbname=name)
    return name


def wait_for_port_closed(port: int, timeout: float = 10.0) -> None:
    """Wait until nothing answers on the loopback port (a stopped server released it)."""
    wait_until(lambda: not _port_answers(port), timeout, message=f"port {port} released")
