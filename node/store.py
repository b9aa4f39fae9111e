"""Key-value store backends of a storage node: SQLite in WAL mode (real) and memory (unit tests).

Both sit behind the `Store` protocol. Every batch write is one transaction: it either
commits whole or leaves nothing behind, and it returns only after the commit, so a write
acknowledged from its result is as durable as the configured sync level.

Durability of SqliteStore (the documented contract of the node):
- sync level "full" (default): SQLite `synchronous=FULL` in WAL mode fsyncs the write-ahead
  log on every commit. An acknowledged write survives a process kill (kill -9) AND a power
  loss or OS crash (as far as the disk honours fsync).
- sync level "normal": `synchronous=NORMAL` in WAL mode does not fsync on commit, only at
  checkpoints. An acknowledged write survives a process kill (the WAL is in the OS page
  cache), but a power loss or OS crash may lose the last transactions (never corrupts).
Source: SQLite documentation, "PRAGMA synchronous" and "Write-Ahead Logging" (sqlite.org).

Concurrency: one writer connection, used only by the caller that holds the node's write
lock (SqliteStore does not lock writes itself beyond a guard against misuse); reads use one
connection per thread, which WAL lets run beside the writer.

Stores the node does not own (docs/agents.md). A node that keeps the filter of a store it
does not own is an *agent*. What any store gives the node, split by who writes it:
- `Store`: a key listing in byte order with a cursor (`scan`), point reads and writes, and
  meta storage. The node's own stores (SqliteStore, MemoryStore) are a `Store` whose change
  feed is the node's own write path: NodeCore commits and records in one critical section.
- `ExternalStore`: an adapter to a store that others write (Redis, PostgreSQL). It gives
  point reads (probes), point writes (writes routed through a coordinator), a membership
  check (`exists_many`) and a `ChangeFeed`: one ordered stream of `FeedEvent`s holding its
  listing and the keys others add and remove, with `FeedBroken` when changes may have been
  lost (a fresh listing follows).
- `KeyLedger`: the agent's exact set of the keys its filter counts. It is a `Store` (values
  are empty), so NodeCore runs an agent unchanged: its first filter and every rebuild scan
  the ledger in byte order, and a ledger commit tells whether each key was new or present,
  which is what makes every count and uncount a verified one (docs/agents.md, "Exactness").
"""

from __future__ import annotations

import bisect
import sqlite3
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Protocol, Sequence, Union

SYNC_LEVELS = {"full": "FULL", "normal": "NORMAL"}
DB_FILE = "node.sqlite3"


class StoreError(RuntimeError):
    """The store could not be opened or a write failed (nothing of that write was applied)."""


class StoreUnavailable(StoreError):
    """A store the node does not own did not answer, or did not confirm a change in time.
    Retrying may succeed (gRPC UNAVAILABLE)."""


class StoreRefused(StoreError):
    """A store the node does not own cannot hold this key or value; nothing was written
    (gRPC INVALID_ARGUMENT)."""


class Store(Protocol):
    """What the node needs from a key-value backend. Keys are bytes, ordered bytewise."""

    def get(self, key: bytes) -> bytes | None:
        """The value stored under key, or None."""

    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        """Values (or None) for each key, in order."""

    def put_many(self, items: Sequence[tuple[bytes, bytes]]) -> list[bool]:
        """Write all items in one transaction; per item, True when the key was new.

        A key repeated inside the batch is new at most once (the later write overwrites).
        """

    def delete_many(self, keys: Sequence[bytes]) -> list[bool]:
        """Delete all keys in one transaction; per key, True when it existed."""

    def write_batch(self, ops: Sequence[tuple[str, Sequence]]) -> list[list[bool]]:
        """Apply ("put", items) / ("delete", keys) ops in order in ONE transaction (group commit);
        per op, the put_many / delete_many result. All or nothing."""

    def scan(self, after: bytes | None, limit: int) -> list[bytes]:
        """Up to limit keys in ascending byte order, strictly after `after` (None: from the start)."""

    def count(self) -> int:
        """Number of keys (may be O(n); the node keeps its own running count)."""

    def get_meta(self, name: str) -> str | None:
        """A persisted node setting (epoch counter, rebuilt capacity), or None."""

    def set_meta(self, values: dict[str, str]) -> None:
        """Persist node settings in one durable transaction."""

    def close(self) -> None:
        """Release files; further calls fail."""


class KeyLedger(Store, Protocol):
    """An agent's exact set of counted keys (values are empty), listed in byte order."""

    durable: bool   # True: the keys survive a restart (a resumable feed may continue onto them)

    def clear(self) -> None:
        """Forget every key in one transaction (only before the agent's filter exists)."""


# --------------------------------------------------------------------------- change feeds


@dataclass(frozen=True)
class ListingStarted:
    """A full listing of the store begins. Every change made after the feed's subscription
    point follows as KeysAdded / KeysRemoved, interleaved with the listing's batches."""

    reason: str


@dataclass(frozen=True)
class Listed:
    """A batch of the listing: keys that existed at some moment since ListingStarted (in any
    order; a key may repeat)."""

    keys: tuple[bytes, ...]


@dataclass(frozen=True)
class ListingDone:
    """The listing returned every key that existed from ListingStarted until now."""


@dataclass(frozen=True)
class KeysAdded:
    """Keys that became present, in the store's commit order. `position`: where the feed can
    resume after this change (None: the feed cannot resume; see ChangeFeed.confirm)."""

    keys: tuple[bytes, ...]
    position: int | None = None


@dataclass(frozen=True)
class KeysRemoved:
    """Keys that stopped being present (deleted, expired, evicted, renamed or moved away)."""

    keys: tuple[bytes, ...]
    position: int | None = None


@dataclass(frozen=True)
class StoreEmptied:
    """Every key of the watched table is gone (TRUNCATE), at this point of the order."""

    position: int | None = None


@dataclass(frozen=True)
class FeedBroken:
    """Changes may have been lost from here on (subscription dropped, server restarted,
    store flushed, replication slot lost). A ListingStarted follows once the store answers."""

    reason: str


@dataclass(frozen=True)
class Mark:
    """Every change committed before ChangeFeed.mark() returned `token` was delivered before
    this event. `store_count`: the store's key count at that same instant, when the store can
    tell it atomically with the mark (None otherwise)."""

    token: int
    store_count: int | None = None


FeedEvent = Union[ListingStarted, Listed, ListingDone, KeysAdded, KeysRemoved, StoreEmptied, FeedBroken, Mark]


class ChangeFeed(Protocol):
    """One ordered stream of FeedEvents from a store the node does not own."""

    origin: str   # what this feed's positions belong to (a replication slot); kept in the ledger's meta

    def poll(self, timeout: float) -> list[FeedEvent]:
        """The events available now, waiting up to `timeout` s for the first (may be empty)."""

    def mark(self) -> int:
        """Emit a Mark into the stream after every change committed so far; returns its token."""

    def confirm(self, position: int) -> None:
        """Changes up to `position` are durable in the agent's ledger: the store may forget
        them (a replication slot moves on). A no-op for feeds that cannot resume."""

    def close(self) -> None:
        """Stop watching; later polls return nothing."""


class ExternalStore(Protocol):
    """An adapter to a store others write (docs/agents.md has each adapter's promise)."""

    url: str                 # the store's address without secrets, for logs
    resumable: bool          # True: its feed resumes where the agent left off (no relisting)

    def open_feed(self, resume_from: str | None) -> ChangeFeed:
        """Start watching changes, then list the store in the same stream. With the `origin`
        of an earlier feed whose changes the ledger holds, a resumable store continues after
        that feed's last confirmed position instead (no listing) when it still can."""

    def exists_many(self, keys: Sequence[bytes]) -> list[bool]:
        """Whether each key is present now."""

    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        """The value of each key (None: absent), for probes."""

    def put_many(self, items: Sequence[tuple[bytes, bytes]]) -> None:
        """Write all items in one transaction (the feed reports the new keys)."""

    def delete_many(self, keys: Sequence[bytes]) -> None:
        """Delete all keys in one transaction (the feed reports the removed keys)."""

    def close(self) -> None:
        """Release connections."""


def open_external(url: str, **options: object) -> ExternalStore:
    """The adapter for `url`: redis://HOST:PORT/DB or postgresql://USER@HOST:PORT/DB?table=T&key=C.
    Imports the driver only here, so a node without agents needs neither."""
    scheme = url.split(":", 1)[0].lower()
    if scheme in ("redis", "rediss"):
        from shardsieve.node.adapters.redis_store import RedisStore

        return RedisStore(url, **options)  # type: ignore[arg-type]
    if scheme in ("postgresql", "postgres"):
        from shardsieve.node.adapters.postgres_store import PostgresStore

        return PostgresStore(url, **options)  # type: ignore[arg-type]
    raise StoreError(f"unknown store address {url!r}: use redis://HOST:PORT/DB or "
                     f"postgresql://USER@HOST:PORT/DB?table=TABLE&key=COLUMN")


class MemoryStore:
    """A dict plus a sorted key list. Not durable: for unit tests only."""

    def __init__(self) -> None:
        self._data: dict[bytes, bytes] = {}
        self._keys: list[bytes] = []
        self._meta: dict[str, str] = {}
        self._lock = threading.Lock()

    def get(self, key: bytes) -> bytes | None:
        return self._data.get(key)

    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        return [self._data.get(k) for k in keys]

    def put_many(self, items: Sequence[tuple[bytes, bytes]]) -> list[bool]:
        created: list[bool] = []
        with self._lock:
            for key, value in items:
                key, value = bytes(key), bytes(value)
                new = key not in self._data
                if new:
                    bisect.insort(self._keys, key)
                self._data[key] = value
                created.append(new)
        return created

    def delete_many(self, keys: Sequence[bytes]) -> list[bool]:
        existed: list[bool] = []
        with self._lock:
            for key in keys:
                key = bytes(key)
                if key in self._data:
                    del self._data[key]
                    i = bisect.bisect_left(self._keys, key)
                    del self._keys[i]
                    existed.append(True)
                else:
                    existed.append(False)
        return existed

    def write_batch(self, ops: Sequence[tuple[str, Sequence]]) -> list[list[bool]]:
        return [self.put_many(payload) if kind == "put" else self.delete_many(payload) for kind, payload in ops]

    def scan(self, after: bytes | None, limit: int) -> list[bytes]:
        with self._lock:
            start = 0 if after is None else bisect.bisect_right(self._keys, after)
            return self._keys[start:start + limit]

    def count(self) -> int:
        return len(self._data)

    def get_meta(self, name: str) -> str | None:
        return self._meta.get(name)

    def set_meta(self, values: dict[str, str]) -> None:
        self._meta.update(values)

    def close(self) -> None:
        pass


class SqliteStore:
    """SQLite in WAL mode: table kv(key BLOB PRIMARY KEY, value BLOB) WITHOUT ROWID, plus meta."""

    def __init__(self, data_dir: Path, sync_level: str = "full") -> None:
        if sync_level not in SYNC_LEVELS:
            raise StoreError(f"sync level must be one of {sorted(SYNC_LEVELS)}, got {sync_level!r}")
        self.path = Path(data_dir) / DB_FILE
        self.sync_level = sync_level
        try:
            Path(data_dir).mkdir(parents=True, exist_ok=True)
            self._writer = self._connect()
            self._writer.execute("PRAGMA journal_mode=WAL")
            mode = self._writer.execute("PRAGMA journal_mode").fetchone()[0]
            if str(mode).lower() != "wal":
                raise StoreError(f"{self.path}: could not switch to WAL mode (got {mode})")
            self._writer.execute(
                "CREATE TABLE IF NOT EXISTS kv (key BLOB PRIMARY KEY NOT NULL, value BLOB NOT NULL) WITHOUT ROWID")
            self._writer.execute("CREATE TABLE IF NOT EXISTS meta (name TEXT PRIMARY KEY NOT NULL, value TEXT NOT NULL)")
        except sqlite3.Error as exc:
            raise StoreError(f"cannot open the node store at {self.path}: {exc}") from None
        self._write_guard = threading.Lock()
        self._local = threading.local()
        self._readers: list[sqlite3.Connection] = []
        self._readers_lock = threading.Lock()
        self._closed = False

    def _connect(self) -> sqlite3.Connection:
        conn = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False, timeout=30.0)
        conn.execute(f"PRAGMA synchronous={SYNC_LEVELS[self.sync_level]}")
        return conn

    def _reader(self) -> sqlite3.Connection:
        conn = getattr(self._local, "conn", None)
        if conn is None:
            if self._closed:
                raise StoreError("store is closed")
            conn = self._connect()
            conn.execute("PRAGMA query_only=ON")
            self._local.conn = conn
            with self._readers_lock:
                self._readers.append(conn)
        return conn

    # reads -----------------------------------------------------------------------------------
    def get(self, key: bytes) -> bytes | None:
        row = self._reader().execute("SELECT value FROM kv WHERE key = ?", (key,)).fetchone()
        return None if row is None else bytes(row[0])

    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        found: dict[bytes, bytes] = {}
        conn = self._reader()
        for start in range(0, len(keys), 500):
            part = [bytes(k) for k in keys[start:start + 500]]
            marks = ",".join("?" * len(part))
            for k, v in conn.execute(f"SELECT key, value FROM kv WHERE key IN ({marks})", part):
                found[bytes(k)] = bytes(v)
        return [found.get(bytes(k)) for k in keys]

    def scan(self, after: bytes | None, limit: int) -> list[bytes]:
        conn = self._reader()
        if after is None:
            rows = conn.execute("SELECT key FROM kv ORDER BY key LIMIT ?", (limit,))
        else:
            rows = conn.execute("SELECT key FROM kv WHERE key > ? ORDER BY key LIMIT ?", (after, limit))
        return [bytes(r[0]) for r in rows]

    def count(self) -> int:
        return int(self._reader().execute("SELECT count(*) FROM kv").fetchone()[0])

    def get_meta(self, name: str) -> str | None:
        row = self._reader().execute("SELECT value FROM meta WHERE name = ?", (name,)).fetchone()
        return None if row is None else str(row[0])

    # writes ----------------------------------------------------------------------------------
    def _transaction(self, work: "callable[[sqlite3.Connection], object]"):  # type: ignore[valid-type]
        with self._write_guard:
            conn = self._writer
            try:
                conn.execute("BEGIN IMMEDIATE")
                try:
                    result = work(conn)
                except BaseException:
                    conn.execute("ROLLBACK")
                    raise
                conn.execute("COMMIT")  # returns once durable at the configured sync level
            except sqlite3.Error as exc:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                raise StoreError(f"store write failed, nothing applied: {exc}") from None
            return result

    @staticmethod
    def _put_rows(conn: sqlite3.Connection, items: Sequence[tuple[bytes, bytes]]) -> list[bool]:
        created = []
        for key, value in items:
            existed = conn.execute("SELECT 1 FROM kv WHERE key = ?", (key,)).fetchone() is not None
            conn.execute("INSERT INTO kv(key, value) VALUES (?, ?) "
                         "ON CONFLICT(key) DO UPDATE SET value = excluded.value", (key, value))
            created.append(not existed)
        return created

    @staticmethod
    def _delete_rows(conn: sqlite3.Connection, keys: Sequence[bytes]) -> list[bool]:
        return [conn.execute("DELETE FROM kv WHERE key = ?", (key,)).rowcount > 0 for key in keys]

    def put_many(self, items: Sequence[tuple[bytes, bytes]]) -> list[bool]:
        return self._transaction(lambda conn: self._put_rows(conn, items))

    def delete_many(self, keys: Sequence[bytes]) -> list[bool]:
        return self._transaction(lambda conn: self._delete_rows(conn, keys))

    def write_batch(self, ops: Sequence[tuple[str, Sequence]]) -> list[list[bool]]:
        def work(conn: sqlite3.Connection) -> list[list[bool]]:
            return [self._put_rows(conn, payload) if kind == "put" else self._delete_rows(conn, payload)
                    for kind, payload in ops]
        return self._transaction(work)

    def set_meta(self, values: dict[str, str]) -> None:
        def work(conn: sqlite3.Connection) -> None:
            conn.executemany("INSERT INTO meta(name, value) VALUES (?, ?) "
                             "ON CONFLICT(name) DO UPDATE SET value = excluded.value",
                             [(k, str(v)) for k, v in values.items()])
        self._transaction(work)

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        with self._readers_lock:
            for conn in self._readers:
                try:
                    conn.close()
                except sqlite3.Error:
                    pass
            self._readers.clear()
        with self._write_guard:
            self._writer.close()


def open_store(kind: str, data_dir: Path | None, sync_level: str = "full") -> Store:
    """The store named by `kind` ("sqlite" needs data_dir; "memory" is for tests)."""
    if kind == "memory":
        return MemoryStore()
    if kind == "sqlite":
        if data_dir is None:
            raise StoreError("the sqlite store needs a data directory")
        return SqliteStore(data_dir, sync_level)
    raise StoreError(f"unknown store kind {kind!r} (known: sqlite, memory)")


def iter_all_keys(store: Store, batch: int = 10_000) -> Iterable[list[bytes]]:
    """Every key in order, in batches (a cursor scan; safe beside concurrent writes)."""
    after: bytes | None = None
    while True:
        keys = store.scan(after, batch)
        if not keys:
            return
        yield keys
        after = keys[-1]
