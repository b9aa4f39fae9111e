"""The agent's ledger: the exact set of keys its counting filter counts.

Why it exists (docs/agents.md, "Exactness"): a counting filter may over-count, but
uncounting a key it never counted can clear bits other keys need (a false negative). An
agent learns about keys from a listing and from change events that race with it and with
each other, so an event alone cannot say whether its key is counted. The ledger can: every
count and uncount is a ledger commit whose per-key flag says "was new" / "was present",
and NodeCore counts exactly the flagged keys. Invariant: ledger == counted keys, so an
uncount is only ever applied to a counted key.

Two kinds, one protocol (`KeyLedger`, a `Store` whose values are empty):
- MemoryKeyLedger: a sorted list in memory (sortedcontainers.SortedList: O(log n) insert,
  delete and membership, byte-order scans). For feeds that cannot resume (Redis), where
  every start lists the store anyway. Its meta goes to a local MetaFile.
- SqliteKeyLedger: the node's SQLite store holding keys only, fsynced on commit. For feeds
  that resume (PostgreSQL): after a restart the ledger is as the slot left it, so changes
  made while the agent was down replay onto it without a listing.

AgentStore puts a ledger beside an ExternalStore: NodeCore sees one `Store` whose listing,
writes and meta are the ledger's and whose point reads (probes) go to the external store.
"""

from __future__ import annotations

import sqlite3
import threading
from pathlib import Path
from typing import Sequence

from sortedcontainers import SortedList

from shardsieve.node.adapters.meta import MetaFile
from shardsieve.node.store import ExternalStore, KeyLedger, SqliteStore, StoreError, StoreUnavailable

LEDGER_DIR = "ledger"
META_FILE = "agent-state.json"


class MemoryKeyLedger:
    """Keys in a SortedList; meta in a MetaFile (or in memory when no path is given: tests)."""

    durable = False   # the keys are gone after a restart: every start lists the store

    def __init__(self, meta_path: Path | None = None) -> None:
        self._keys = SortedList()
        self._lock = threading.Lock()
        self._meta = MetaFile(meta_path) if meta_path is not None else None
        self._memory_meta: dict[str, str] = {}

    # reads -----------------------------------------------------------------------------------
    def get(self, key: bytes) -> bytes | None:
        with self._lock:
            return b"" if bytes(key) in self._keys else None

    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        with self._lock:
            return [b"" if bytes(k) in self._keys else None for k in keys]

    def scan(self, after: bytes | None, limit: int) -> list[bytes]:
        with self._lock:
            start = 0 if after is None else self._keys.bisect_right(after)
            return list(self._keys.islice(start, start + limit))

    def count(self) -> int:
        with self._lock:
            return len(self._keys)

    def __contains__(self, key: bytes) -> bool:
        with self._lock:
            return key in self._keys

    # writes: per key, whether the ledger changed (the verified transition) --------------------
    def _put(self, keys: Sequence[bytes]) -> list[bool]:
        created = []
        for key in keys:
            key = bytes(key)
            new = key not in self._keys
            if new:
                self._keys.add(key)
            created.append(new)
        return created

    def _delete(self, keys: Sequence[bytes]) -> list[bool]:
        existed = []
        for key in keys:
            key = bytes(key)
            present = key in self._keys
            if present:
                self._keys.remove(key)
            existed.append(present)
        return existed

    def put_many(self, items: Sequence[tuple[bytes, bytes]]) -> list[bool]:
        with self._lock:
            return self._put([k for k, _ in items])

    def delete_many(self, keys: Sequence[bytes]) -> list[bool]:
        with self._lock:
            return self._delete(keys)

    def write_batch(self, ops: Sequence[tuple[str, Sequence]]) -> list[list[bool]]:
        with self._lock:
            return [self._put([k for k, _ in payload]) if kind == "put" else self._delete(payload)
                    for kind, payload in ops]

    def clear(self) -> None:
        with self._lock:
            self._keys.clear()

    # meta ------------------------------------------------------------------------------------
    def get_meta(self, name: str) -> str | None:
        return self._meta.get_meta(name) if self._meta is not None else self._memory_meta.get(name)

    def set_meta(self, values: dict[str, str]) -> None:
        if self._meta is not None:
            self._meta.set_meta(values)
        else:
            self._memory_meta.update({k: str(v) for k, v in values.items()})

    def close(self) -> None:
        pass


class SqliteKeyLedger(SqliteStore):
    """SqliteStore holding keys with empty values, fsynced on every commit ("full"): a
    position is confirmed to the store only after the ledger commit that covers it, so a
    power loss cannot lose a change the store already forgot."""

    durable = True

    def __init__(self, data_dir: Path) -> None:
        super().__init__(Path(data_dir), sync_level="full")

    def clear(self) -> None:
        self._transaction(lambda conn: conn.execute("DELETE FROM kv"))

    # Set-wise writes: one statement per 500 keys whose RETURNING clause names the rows it
    # inserted (or deleted), instead of a SELECT and an INSERT (or DELETE) per key (SQLite docs,
    # "The RETURNING Clause", SQLite 3.35 and later). Inside the transaction only this writer
    # changes the table, and a key repeated in a batch is new (or present) once: its second
    # row conflicts (or finds nothing) and is not returned.
    CHUNK = 500

    @classmethod
    def _put_rows(cls, conn: sqlite3.Connection, items: Sequence[tuple[bytes, bytes]]) -> list[bool]:
        keys = [bytes(k) for k, _ in items]
        inserted: set[bytes] = set()
        for start in range(0, len(keys), cls.CHUNK):
            part = keys[start:start + cls.CHUNK]
            rows = ",".join("(?, x'')" for _ in part)
            inserted.update(bytes(r[0]) for r in conn.execute(
                f"INSERT INTO kv(key, value) VALUES {rows} ON CONFLICT(key) DO NOTHING RETURNING key", part))
        return cls._first_of(keys, inserted)

    @classmethod
    def _delete_rows(cls, conn: sqlite3.Connection, keys: Sequence[bytes]) -> list[bool]:
        keys = [bytes(k) for k in keys]
        deleted: set[bytes] = set()
        for start in range(0, len(keys), cls.CHUNK):
            part = keys[start:start + cls.CHUNK]
            marks = ",".join("?" * len(part))
            deleted.update(bytes(r[0]) for r in conn.execute(
                f"DELETE FROM kv WHERE key IN ({marks}) RETURNING key", part))
        return cls._first_of(keys, deleted)

    @staticmethod
    def _first_of(keys: list[bytes], changed: set[bytes]) -> list[bool]:
        """Per key, True at its first occurrence when the statement changed its row."""
        flags = []
        for key in keys:
            hit = key in changed
            flags.append(hit)
            if hit:
                changed.discard(key)
        return flags


def open_ledger(kind: str, state_dir: Path | None) -> KeyLedger:
    """"memory" (meta in STATE_DIR/agent-state.json; in memory without a folder) or "sqlite"
    (STATE_DIR/ledger/)."""
    if kind == "memory":
        return MemoryKeyLedger(None if state_dir is None else Path(state_dir) / META_FILE)
    if kind == "sqlite":
        if state_dir is None:
            raise ValueError("the sqlite ledger needs a state folder")
        return SqliteKeyLedger(Path(state_dir) / LEDGER_DIR)
    raise ValueError(f"unknown ledger kind {kind!r} (known: memory, sqlite)")


class AgentStore:
    """The `Store` NodeCore drives for an agent: the ledger for listing, writes and meta;
    the external store for point reads (probes read the store itself, never the ledger).

    Writes through NodeCore change the ledger only. A write routed through a coordinator goes
    to the external store and reaches the ledger through the feed (FeedApplier.write)."""

    def __init__(self, ledger: KeyLedger, external: ExternalStore) -> None:
        self.ledger = ledger
        self.external = external

    def get(self, key: bytes) -> bytes | None:
        return self.get_many([key])[0]

    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        try:
            return self.external.get_many(keys)
        except StoreError:
            raise
        except Exception as exc:  # noqa: BLE001 - the driver's error (redis, psycopg2), named in the message
            raise StoreUnavailable(f"{self.external.url} did not answer the probe: {type(exc).__name__}: "
                                   f"{exc}") from None

    def put_many(self, items: Sequence[tuple[bytes, bytes]]) -> list[bool]:
        return self.ledger.put_many(items)

    def delete_many(self, keys: Sequence[bytes]) -> list[bool]:
        return self.ledger.delete_many(keys)

    def write_batch(self, ops: Sequence[tuple[str, Sequence]]) -> list[list[bool]]:
        return self.ledger.write_batch(ops)

    def scan(self, after: bytes | None, limit: int) -> list[bytes]:
        return self.ledger.scan(after, limit)

    def count(self) -> int:
        return self.ledger.count()

    def get_meta(self, name: str) -> str | None:
        return self.ledger.get_meta(name)

    def set_meta(self, values: dict[str, str]) -> None:
        self.ledger.set_meta(values)

    def clear(self) -> None:
        self.ledger.clear()

    def close(self) -> None:
        self.ledger.close()
