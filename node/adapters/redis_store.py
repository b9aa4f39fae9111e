"""Redis adapter: the keys of one database of an existing Redis server (docs/agents.md, "Redis").

Change feed. One connection subscribes to the key-event channels of the database
(Redis docs, "Keyspace notifications": `__keyevent@DB__:EVENT`, message = the key):
`new` (a key was created, flag n), `rename_to`, `move_to` (adds); `del`, `expired`,
`evicted`, `rename_from`, `move_from` (removals). The server publishes them while it runs
the command, and one connection receives messages in the order they were published, so
the feed is in the server's order. The same connection turns on client-side caching
tracking redirected to itself (Redis docs, "Client-side caching": FLUSHALL and FLUSHDB send
a null invalidation message to every tracking client), which is the only signal a flush
gives; it does not say which database, so any flush starts a new listing.

The subscription is made BEFORE the listing (SCAN), so a key written during the listing
arrives as an event even when SCAN missed it; SCAN itself returns every key present for the
whole scan (Redis docs, SCAN, "Scan guarantees").

Feed breaks (a FeedBroken event, then a new listing): the connection fails or is killed
(CLIENT KILL TYPE pubsub), the server restarts (its run_id changes), a flush, a health mark
not echoed within `check_timeout`, or the agent falling `max_queued_events` behind. Redis
keeps no notification for a disconnected subscriber (Redis docs, "Keyspace notifications":
Pub/Sub is fire and forget), hence the relisting.

Marks: MULTI; DBSIZE; EXISTS ""; PUBLISH <this feed's mark channel> <token>; EXEC. The count
and the mark are taken in one atomic transaction, so the applier can compare the ledger's
count with the store's at exactly that point of the stream (the empty key is left out: the
node API refuses empty keys, so it is never routed).

Probes: a string's value is its bytes; any other type (hash, list, set, sorted set, stream)
answers with its DUMP serialization (Redis docs, DUMP: the opaque format RESTORE accepts),
so a probe tells presence and hands back something a client can restore or decode.
"""

from __future__ import annotations

import itertools
import logging
import random
import secrets
import threading
import time
from collections import deque
from typing import Any, Sequence
from urllib.parse import unquote, urlsplit

import redis

from shardsieve.node.adapters.resp import RespConnection, RespError
from shardsieve.node.store import (
    FeedBroken,
    FeedEvent,
    KeysAdded,
    KeysRemoved,
    Listed,
    ListingDone,
    ListingStarted,
    Mark,
    StoreError,
)

log = logging.getLogger("shardsieve.node.agent.redis")

ADD_EVENTS = ("new", "rename_to", "move_to")
REMOVE_EVENTS = ("del", "expired", "evicted", "rename_from", "move_from")
#: notify-keyspace-events classes the feed needs: E (key-event channels), g (del, rename,
#: move), x (expired), e (evicted), n (new keys; not part of the alias A).
NEEDED_FLAGS = "Egxen"
_ALIAS_A = "g$lshzxetd"
INVALIDATE_CHANNEL = b"__redis__:invalidate"


def missing_notify_flags(current: str) -> str:
    """The classes of NEEDED_FLAGS that `current` (a notify-keyspace-events value) lacks."""
    have = set(current.replace("A", _ALIAS_A))
    return "".join(flag for flag in NEEDED_FLAGS if flag not in have)


def merged_notify_flags(current: str) -> str:
    """`current` plus the missing classes (other users' classes are kept)."""
    return current + missing_notify_flags(current)


class RedisStore:
    """ExternalStore for redis://[USER:PASSWORD@]HOST:PORT/DB (rediss:// for TLS)."""

    resumable = False

    def __init__(self, url: str, *, configure_notifications: bool = False, scan_count: int = 1000,
                 check_interval: float = 1.0, check_timeout: float = 10.0, max_queued_events: int = 1_000_000,
                 socket_timeout: float = 10.0) -> None:
        parts = urlsplit(url)
        if parts.scheme not in ("redis", "rediss") or not parts.hostname:
            raise StoreError(f"not a Redis address: {url!r} (use redis://HOST:PORT/DB)")
        path = parts.path.strip("/") or "0"
        if not path.isdigit():
            raise StoreError(f"the database in {url!r} must be a number (redis://HOST:PORT/DB), got {path!r}")
        self.host = parts.hostname
        self.port = parts.port or 6379
        self.db = int(path)
        self.tls = parts.scheme == "rediss"
        self.username = unquote(parts.username) if parts.username else None
        self.password = unquote(parts.password) if parts.password else None
        self.url = f"{parts.scheme}://{self.host}:{self.port}/{self.db}"
        self.configure_notifications = configure_notifications
        self.scan_count = scan_count
        self.check_interval = check_interval
        self.check_timeout = check_timeout
        self.max_queued_events = max_queued_events
        self.socket_timeout = socket_timeout
        self._tokens = itertools.count(1)
        self._token_lock = threading.Lock()
        self.client = redis.Redis(host=self.host, port=self.port, db=self.db, username=self.username,
                                  password=self.password, ssl=self.tls, protocol=2,
                                  socket_timeout=socket_timeout, socket_connect_timeout=5.0)
        try:
            self.check_notifications()
        except redis.RedisError as exc:
            raise StoreError(f"cannot reach Redis at {self.url}: {exc}") from None

    # ------------------------------------------------------------------ set-up checks
    def check_notifications(self) -> None:
        """Refuse (StoreError, one line with the fix) unless the server publishes the events
        the feed needs; with configure_notifications=True add the missing classes instead."""
        try:
            current = str(self.client.config_get("notify-keyspace-events").get("notify-keyspace-events", ""))
        except redis.ResponseError as exc:
            raise StoreError(f"cannot read notify-keyspace-events from Redis at {self.url} ({exc}); "
                             f"allow the agent's user CONFIG GET (ACL: +config|get)") from None
        missing = missing_notify_flags(current)
        if not missing:
            return
        wanted = merged_notify_flags(current)
        if self.configure_notifications:
            self.client.config_set("notify-keyspace-events", wanted)
            log.warning("turned on the keyspace events the agent needs (not saved in redis.conf)",
                        extra={"store": self.url, "notify_keyspace_events": wanted})
            return
        raise StoreError(f"Redis at {self.url} does not publish the key events the agent needs "
                         f"(notify-keyspace-events is {current!r}, missing {missing!r}); fix: redis-cli -h {self.host} "
                         f"-p {self.port} CONFIG SET notify-keyspace-events {wanted} (and put "
                         f"'notify-keyspace-events {wanted}' in redis.conf)")

    def run_id(self) -> str:
        return str(self.client.info("server")["run_id"])

    # ------------------------------------------------------------------ point access
    def exists_many(self, keys: Sequence[bytes]) -> list[bool]:
        pipe = self.client.pipeline(transaction=False)
        for key in keys:
            pipe.exists(key)
        return [bool(n) for n in pipe.execute()]

    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        pipe = self.client.pipeline(transaction=False)
        for key in keys:
            pipe.get(key)
        values: list[Any] = pipe.execute(raise_on_error=False)
        other = [i for i, v in enumerate(values) if isinstance(v, redis.ResponseError)]
        if other:
            pipe = self.client.pipeline(transaction=False)
            for i in other:
                pipe.dump(keys[i])
            for i, dumped in zip(other, pipe.execute()):
                values[i] = dumped
        return [None if v is None else bytes(v) for v in values]

    def put_many(self, items: Sequence[tuple[bytes, bytes]]) -> None:
        if items:
            self.client.mset({bytes(k): bytes(v) for k, v in items})

    def delete_many(self, keys: Sequence[bytes]) -> None:
        if keys:
            self.client.delete(*[bytes(k) for k in keys])

    # ------------------------------------------------------------------ feed
    def next_token(self) -> int:
        with self._token_lock:
            return next(self._tokens)

    def open_feed(self, resume_from: str | None) -> "RedisFeed":
        feed = RedisFeed(self)
        feed.start()
        return feed

    def close(self) -> None:
        self.client.close()


class RedisFeed:
    """The subscription thread of one feed (see the module doc)."""

    def __init__(self, store: RedisStore) -> None:
        self.store = store
        self.origin = ""
        self.channel = b"shardsieve:mark:" + secrets.token_hex(8).encode()
        self._events: deque[FeedEvent] = deque()
        self._cond = threading.Condition()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="redis-feed", daemon=True)
        self._conn: RespConnection | None = None
        self._queued = 0                             # keys (and other events) queued, not polled yet
        self._pending_marks: dict[int, float] = {}   # token -> sent at (health checks and marks)
        self._counts: dict[int, int] = {}            # token -> key count taken with it
        self._lock = threading.Lock()
        self._rng = random.Random()

    def start(self) -> None:
        self._thread.start()

    # ------------------------------------------------------------------ ChangeFeed
    def poll(self, timeout: float) -> list[FeedEvent]:
        with self._cond:
            if not self._events and not self._stop.is_set():
                self._cond.wait(timeout)
            out = list(self._events)
            self._events.clear()
            self._queued = 0
            return out

    def mark(self) -> int:
        token, count = self._mark()
        return token

    def _mark(self) -> tuple[int, int]:
        store = self.store
        token = store.next_token()
        pipe = store.client.pipeline(transaction=True)
        pipe.dbsize()
        pipe.exists(b"")
        pipe.publish(self.channel, str(token).encode())
        with self._lock:
            self._pending_marks[token] = time.monotonic()
        dbsize, empty_key, _ = pipe.execute()
        count = int(dbsize) - int(empty_key)
        with self._lock:
            if token in self._pending_marks:   # not echoed yet (always so for the feed thread's own marks)
                self._counts[token] = count
        return token, count

    def confirm(self, position: int) -> None:
        """Redis notifications cannot be replayed: nothing to confirm."""

    def close(self) -> None:
        self._stop.set()
        with self._cond:
            self._cond.notify_all()
        if self._thread.is_alive() and threading.current_thread() is not self._thread:
            self._thread.join(10.0)
        self._disconnect()

    # ------------------------------------------------------------------ the thread
    def _emit(self, event: FeedEvent) -> None:
        self._emit_many([event])

    def _emit_many(self, events: list[FeedEvent]) -> None:
        """Queue events in order with one wake-up; _Behind past max_queued_events keys queued."""
        if not events:
            return
        with self._cond:
            self._events.extend(events)
            self._queued += sum(len(e.keys) if isinstance(e, (KeysAdded, KeysRemoved, Listed)) else 1
                                for e in events)
            overflow = self._queued > self.store.max_queued_events
            self._cond.notify_all()
        if overflow:
            raise _Behind()

    def _run(self) -> None:
        failures = 0
        last_run_id: str | None = None
        broken_reported = False
        reason = "first listing"
        while not self._stop.is_set():
            try:
                run_id = self._connect()
                if last_run_id is not None and run_id != last_run_id:
                    reason = f"the server restarted (run_id {last_run_id[:12]} -> {run_id[:12]})"
                last_run_id = self.origin = run_id
                failures = 0
                broken_reported = False
                while not self._stop.is_set():
                    self._listing(reason)
                    reason = self._follow()
                    if reason:     # a flush or a backlog: list again on the same subscription
                        continue
                    break
            except _Behind:
                with self._cond:
                    self._events.clear()
                    self._queued = 0
                    self._events.append(FeedBroken("the agent fell behind the store's changes"))
                    self._cond.notify_all()
                reason = "the agent fell behind the store's changes"
                self._disconnect()
            except (redis.RedisError, OSError, _Stalled, StoreError) as exc:
                self._disconnect()
                if self._stop.is_set():
                    return
                if not broken_reported:
                    with self._cond:
                        self._events.append(FeedBroken(f"lost the subscription to {self.store.url}: {exc}"))
                        self._cond.notify_all()
                    broken_reported = True
                reason = f"the subscription was lost ({exc})"
                failures += 1
                delay = self._rng.uniform(0.05, min(5.0, 0.1 * 2 ** min(failures, 6)))
                self._stop.wait(delay)

    def _connect(self) -> str:
        """A new subscription (tracking redirected to itself, then SUBSCRIBE); returns the run_id."""
        self._disconnect()
        store = self.store
        store.check_notifications()
        run_id = store.run_id()
        conn = RespConnection(store.host, store.port, tls=store.tls, timeout=store.socket_timeout)
        try:
            if store.password is not None:
                conn.command("AUTH", *([store.username] if store.username else []), store.password)
            client_id = conn.command("CLIENT", "ID")
            conn.command("CLIENT", "TRACKING", "on", "REDIRECT", client_id)
            channels = [f"__keyevent@{store.db}__:{e}".encode() for e in ADD_EVENTS + REMOVE_EVENTS]
            channels += [INVALIDATE_CHANNEL, self.channel]
            conn.send("SUBSCRIBE", *channels)
            for _ in channels:
                reply = conn.read_one()
                if not (isinstance(reply, list) and reply[0] == b"subscribe"):
                    raise redis.ConnectionError(f"unexpected reply to SUBSCRIBE: {reply!r}")
        except RespError as exc:
            conn.close()
            raise redis.ConnectionError(f"the subscription was refused: {exc}") from None
        except BaseException:
            conn.close()
            raise
        self._conn = conn
        with self._lock:
            self._pending_marks.clear()
        return run_id

    def _disconnect(self) -> None:
        conn, self._conn = self._conn, None
        if conn is not None:
            conn.close()

    def _listing(self, reason: str) -> None:
        """ListingStarted, SCAN batches (draining the subscription between them), ListingDone."""
        self._emit(ListingStarted(reason))
        cursor = 0
        client = self.store.client
        while not self._stop.is_set():
            cursor, keys = client.scan(cursor, count=self.store.scan_count)
            if keys:
                self._emit(Listed(tuple(bytes(k) for k in keys)))
            flush = self._drain(0.0)
            if flush:
                self._emit(FeedBroken(flush))
                self._emit(ListingStarted(flush))
                cursor = 0
                continue
            if cursor == 0:
                break
        self._emit(ListingDone())

    def _follow(self) -> str:
        """Read the subscription until the stop, a flush (returns why) or an error (raises)."""
        next_check = 0.0
        while not self._stop.is_set():
            now = time.monotonic()
            if now >= next_check:
                self._check_health(now)
                next_check = now + self.store.check_interval
            flush = self._drain(min(0.1, self.store.check_interval))
            if flush:
                self._emit(FeedBroken(flush))
                return flush
        return ""

    def _check_health(self, now: float) -> None:
        with self._lock:
            late = [t for t, sent in self._pending_marks.items() if now - sent > self.store.check_timeout]
        if late:
            raise _Stalled(f"a mark was not echoed within {self.store.check_timeout}s")
        self._mark()

    def _drain(self, wait: float) -> str:
        """Turn every message readable now (waiting up to `wait` s for the first) into events,
        a run of adds (or removals) as one event, queued with one wake-up. Returns a reason
        when a flush was signalled."""
        conn = self._conn
        if conn is None:
            raise redis.ConnectionError("not connected")
        prefix = f"__keyevent@{self.store.db}__:".encode()
        cut = len(prefix)
        adds = {e.encode() for e in ADD_EVENTS}
        flush = ""
        events: list[FeedEvent] = []
        run: list[bytes] = []
        run_adds = True
        for reply in conn.read_replies(wait):
            if not isinstance(reply, list) or len(reply) != 3 or reply[0] != b"message":
                continue
            _, channel, data = reply
            if channel.startswith(prefix) and data is not None:
                added = channel[cut:] in adds
                if run and added != run_adds:
                    events.append(KeysAdded(tuple(run)) if run_adds else KeysRemoved(tuple(run)))
                    run = []
                run_adds = added
                run.append(data)
                continue
            if run:
                events.append(KeysAdded(tuple(run)) if run_adds else KeysRemoved(tuple(run)))
                run = []
            if channel == self.channel:
                token = int(data)
                with self._lock:
                    self._pending_marks.pop(token, None)
                    count = self._counts.pop(token, None)
                events.append(Mark(token, count))
            elif channel == INVALIDATE_CHANNEL and data is None:
                flush = "a database was flushed (FLUSHDB or FLUSHALL)"
        if run:
            events.append(KeysAdded(tuple(run)) if run_adds else KeysRemoved(tuple(run)))
        self._emit_many(events)
        return flush


class _Stalled(Exception):
    """The subscription stopped echoing marks (a half-open connection)."""


class _Behind(Exception):
    """More events are queued than max_queued_events."""
