"""The node's critical section and the adapter around NodeSync: store + write lock + group commit.

Why one lock: a key must never be in the store without its bits in the filter a coordinator
routes with, and a delta must never carry half a write
(docs/architecture.md#1-no-false-negatives-once-synced). So every write commits to the store
and is recorded in `NodeSync` (which counts it in the filters it owns and stamps it with the
(epoch, sequence) of the delta that will carry it) while holding `NodeCore.lock`. NodeSync
(no I/O, not thread-safe) is only ever called under the same lock.

Everything NodeSync produces comes out of one call, `NodeSync.ready()`. `sync_step` hands
NodeSync out for one step under the lock and then carries the Ready out, in order: durable
writes to the store's meta table, messages to each coordinator stream's outbox, actions
(start a rebuild scan, log lines), then `ack` (docs/architecture.md#how-events-flow).

Writes: every write is queued (`queue_write`) and committed by whoever commits next
(`commit_queued`, under the lock): the daemon's one writer thread (node/writer.py) or, for
in-process callers, the caller of `put_many` / `delete_many` itself. Either way every queued
write goes out in one store transaction (one fsync) and is acknowledged only after it.

Rebuild: NodeSync asks for a store scan (StartScan). A scan thread reads the store in key
order, one batch per lock hold (so writes wait at most one batch), hands each batch to
`NodeSync.scan_batch` and reports the end of the store with `scan_done`. Which filters a
write reaches meanwhile is NodeSync's rule, not this module's.

Nothing here knows about the event loop: the daemon runs these calls in worker threads
(docs/node.md, "Threads and the event loop").
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Callable, Protocol

from shardsieve import hashing
from shardsieve.bloom import CountingBloomFilter
from shardsieve.geometry import Geometry, geometry_for
from shardsieve.node.store import Store, StoreError, iter_all_keys
from shardsieve.sync.node_side import (
    Durable,
    NodeSync,
    NodeSyncConfig,
    StartScan,
    StoreCounters,
    WriteStamp,
)
from shardsieve.v1 import sync_pb2

log = logging.getLogger("shardsieve.node.core")

META_EPOCH = "epoch"        # highest epoch this node id ever used; every start uses a larger one
META_CAPACITY = "capacity"  # size of the last filter that every coordinator switched to
META_FPR = "target_fpr"

_LOG_LEVELS = {"info": logging.INFO, "warning": logging.WARNING, "error": logging.ERROR}


class InvalidInput(ValueError):
    """A request breaks a limit (empty key, key/value too large, batch too long); nothing was written."""


class LoadCancelled(RuntimeError):
    """A stop was requested while the filter was being loaded from the store."""


class NotReady(RuntimeError):
    """The node is still rebuilding its filter from the store (or shutting down)."""


@dataclass(frozen=True)
class Limits:
    max_key_bytes: int = 1024
    max_value_bytes: int = 1 << 20
    max_batch: int = 1000


def check_keys(keys: Sequence[bytes], limits: Limits) -> None:
    """InvalidInput naming the first item that breaks a limit (batch length, empty or long key)."""
    if len(keys) > limits.max_batch:
        raise InvalidInput(f"batch of {len(keys)} items is above max-batch ({limits.max_batch})")
    for i, key in enumerate(keys):
        if len(key) == 0:
            raise InvalidInput(f"item {i}: empty key (keys must be 1..{limits.max_key_bytes} bytes)")
        if len(key) > limits.max_key_bytes:
            raise InvalidInput(f"item {i}: key of {len(key)} bytes is above max-key-bytes ({limits.max_key_bytes})")


def check_items(items: Sequence[tuple[bytes, bytes]], limits: Limits) -> list[tuple[bytes, bytes]]:
    """The items as bytes, once every key and value is within `limits` (else InvalidInput)."""
    items = [(bytes(k), bytes(v)) for k, v in items]
    check_keys([k for k, _ in items], limits)
    for i, (_, value) in enumerate(items):
        if len(value) > limits.max_value_bytes:
            raise InvalidInput(f"item {i}: value of {len(value)} bytes is above max-value-bytes "
                               f"({limits.max_value_bytes})")
    return items


@dataclass(frozen=True)
class WriteResult:
    created: bool      # put: the key was new; delete: the key existed
    epoch: int
    sequence: int      # the delta sequence that carries (or would carry) this change
    # during a rebuild hand-over: (old epoch, sequence) that carries the change there too
    old_position: tuple[int, int] | None = None


class Outbox(Protocol):
    """Where the messages for one coordinator stream go (the sync driver's send queue)."""

    def room(self) -> int:
        """Bytes of deltas and snapshot chunks the stream can take now (0: its queue is full)."""

    def send(self, messages: Sequence[sync_pb2.NodeMessage]) -> None:
        """Queue the messages in order; must not block."""


@dataclass
class _Counters:
    reads: int = 0
    reads_missed: int = 0
    writes: int = 0
    deletes: int = 0


@dataclass
class PendingWrite:
    """One queued write: its result, stamp or error once `done` (then `on_done` is called,
    from the thread that committed it)."""

    kind: str                 # "put" (payload: [(key, value)]) or "delete" (payload: [key])
    payload: list
    on_done: Callable[[PendingWrite], None] | None = None
    done: bool = False
    result: list[bool] = field(default_factory=list)
    error: BaseException | None = None
    stamp: WriteStamp | None = None

    def results(self) -> list[WriteResult]:
        """The per-item results (raises the commit's error)."""
        if self.error is not None:
            raise self.error
        assert self.stamp is not None
        stamp = self.stamp
        return [WriteResult(flag, stamp.epoch, stamp.sequence, stamp.old_position) for flag in self.result]


class NodeCore:
    """Store + NodeSync of one node, consistent under `lock`."""

    def __init__(self, node_id: str, store: Store, *, capacity: int, target_fpr: float, seed: int = 0,
                 limits: Limits = Limits(), scan_batch: int = 2000, push_interval: float = 0.05,
                 push_threshold: int = 4096, history_limit: int = 1024, storage_address: str = "",
                 background_rebuild: bool = True) -> None:
        self.node_id = node_id
        self.store = store
        self.limits = limits
        self.scan_batch = scan_batch
        self.push_interval = push_interval
        self.push_threshold = push_threshold
        self.history_limit = history_limit
        self.storage_address = storage_address
        self.background_rebuild = background_rebuild   # False: the caller drives rebuild_step() (unit tests)
        self.lock = threading.RLock()
        self._queue_lock = threading.Lock()
        self._queue: list[PendingWrite] = []
        self._counter_lock = threading.Lock()
        self._counters = _Counters()
        self.ready = False
        # A rebuild that every coordinator switched to persisted its size; it wins over the configured one.
        stored_capacity = store.get_meta(META_CAPACITY)
        stored_fpr = store.get_meta(META_FPR)
        if stored_capacity is not None and stored_fpr is not None:
            if (int(stored_capacity), float(stored_fpr)) != (capacity, target_fpr):
                log.info("using the filter size of the last rebuild", extra={
                    "capacity": int(stored_capacity), "target_fpr": float(stored_fpr),
                    "configured_capacity": capacity, "configured_fpr": target_fpr})
            capacity, target_fpr = int(stored_capacity), float(stored_fpr)
        self.seed = seed
        self._initial = (capacity, target_fpr)
        self.sync: NodeSync | None = None
        self._outboxes: dict[str, Outbox] = {}
        self._scan_keys: Iterator[list[bytes]] | None = None   # the store read of a rebuild scan
        # Called (from any thread) when a cut is due before the next push interval: the size
        # threshold was reached, or a rebuild scan ended. The pusher (node/pusher.py) sets it.
        self.wake_pusher: Callable[[], None] = lambda: None
        self._stop = threading.Event()
        self._scan_threads: list[threading.Thread] = []

    # ------------------------------------------------------------------ views (logs and tests)
    @property
    def epoch(self) -> int:
        with self.lock:
            return self._sync().epoch

    @property
    def geometry(self) -> Geometry:
        with self.lock:
            return self._sync().geometry

    @property
    def key_count(self) -> int:
        with self.lock:
            return self._sync().key_count

    def _sync(self) -> NodeSync:
        if self.sync is None:
            raise NotReady("node is loading its filter from the store; retry when health is SERVING")
        return self.sync

    # ------------------------------------------------------------------ start-up
    def load(self, progress: Callable[[int, float], None] | None = None,
             cancel: threading.Event | None = None) -> None:
        """Scan the store into a fresh filter, persist a new epoch, then become ready.
        Raises LoadCancelled (nothing persisted) when `cancel` is set during the scan."""
        started = time.monotonic()
        capacity, target_fpr = self._initial
        geometry = geometry_for(capacity, target_fpr, self.seed)
        total = 0
        last_report = started
        with self.lock:
            fresh = CountingBloomFilter(geometry)
            for keys in iter_all_keys(self.store, 20_000):
                if cancel is not None and cancel.is_set():
                    raise LoadCancelled(f"stopped while loading the filter ({total} keys scanned)")
                fresh.add_positions(hashing.positions(keys, geometry))
                total += len(keys)
                now = time.monotonic()
                if progress is not None and now - last_report >= 1.0:
                    progress(total, now - started)
                    last_report = now
            if progress is not None:
                progress(total, time.monotonic() - started)
            epoch = int(self.store.get_meta(META_EPOCH) or 0) + 1
            self.store.set_meta({META_EPOCH: str(epoch)})   # durable before any coordinator sees it
            config = NodeSyncConfig(push_interval_ms=max(1, int(round(self.push_interval * 1000))),
                                    cut_after_bits=self.push_threshold, max_history_deltas=self.history_limit)
            self.sync = NodeSync(self.node_id, self.storage_address, fresh, epoch=epoch, capacity=capacity,
                                 target_fpr=target_fpr, key_count=total, config=config)
            self.ready = True
        log.info("filter loaded from store", extra={"keys": total, "epoch": epoch, "geometry": str(geometry),
                                                    "seconds": round(time.monotonic() - started, 3)})

    # ------------------------------------------------------------------ validation
    def _check_keys(self, keys: Sequence[bytes]) -> None:
        check_keys(keys, self.limits)

    def require_ready(self) -> None:
        """NotReady while the filter is loading or the node is stopping."""
        if not self.ready or self._stop.is_set():
            raise NotReady("node is loading its filter from the store (or stopping); retry when health is SERVING")

    # ------------------------------------------------------------------ reads
    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        self.require_ready()
        keys = [bytes(k) for k in keys]
        self._check_keys(keys)
        values = self.store.get_many(keys) if len(keys) != 1 else [self.store.get(keys[0])]
        missed = sum(1 for v in values if v is None)
        with self._counter_lock:
            self._counters.reads += len(keys)
            self._counters.reads_missed += missed
        return values

    def scan_keys(self, after: bytes | None, limit: int) -> list[bytes]:
        self.require_ready()
        return self.store.scan(after, limit)

    def counters(self) -> StoreCounters:
        """The store traffic counted so far (reads, wasted probes, writes, deletes)."""
        with self._counter_lock:
            c = self._counters
            return StoreCounters(reads=c.reads, reads_missed=c.reads_missed, writes=c.writes, deletes=c.deletes)

    # ------------------------------------------------------------------ writes
    def check_put(self, items: Sequence[tuple[bytes, bytes]]) -> list[tuple[bytes, bytes]]:
        """The items as bytes, once every key and value is within the limits (else InvalidInput)."""
        self.require_ready()
        return check_items(items, self.limits)

    def check_delete(self, keys: Sequence[bytes]) -> list[bytes]:
        """The keys as bytes, once every one is within the limits (else InvalidInput)."""
        self.require_ready()
        keys = [bytes(k) for k in keys]
        self._check_keys(keys)
        return keys

    def put_many(self, items: Sequence[tuple[bytes, bytes]]) -> list[WriteResult]:
        """Validate all items, then one store transaction + filter update; results in item order."""
        items = self.check_put(items)
        return self._write("put", items) if items else []

    def delete_many(self, keys: Sequence[bytes]) -> list[WriteResult]:
        """Validate, delete in one transaction, uncount only keys that existed."""
        keys = self.check_delete(keys)
        return self._write("delete", keys) if keys else []

    def write_checked(self, kind: str, payload: list) -> list[bool]:
        """Commit a write whose caller already checked it ("put": [(key, value)] as bytes,
        "delete": [key]) and return the per-item flags (put: the key was new; delete: it
        existed): an agent's feed, whose non-empty keys come from its own store
        (node/adapters/applier.py). Skips the per-item checks and results of put_many."""
        self.require_ready()
        if not payload:
            return []
        op = self._commit(kind, payload)
        if op.error is not None:
            raise op.error
        return op.result

    def _write(self, kind: str, payload: list) -> list[WriteResult]:
        return self._commit(kind, payload).results()

    def _commit(self, kind: str, payload: list) -> PendingWrite:
        """Queue the op and commit the queue unless a commit already took it (group commit:
        writers that queued behind a commit in progress share the next one)."""
        op = self.queue_write(kind, payload)
        with self.lock:
            if not op.done:
                self.commit_queued()
        return op

    def queue_write(self, kind: str, payload: list,
                    on_done: Callable[[PendingWrite], None] | None = None) -> PendingWrite:
        """Queue a checked write ("put": [(key, value)], "delete": [key]) for the next commit."""
        op = PendingWrite(kind, payload, on_done)
        with self._queue_lock:
            self._queue.append(op)
        return op

    def has_queued_writes(self) -> bool:
        with self._queue_lock:
            return bool(self._queue)

    def commit_queued(self) -> int:
        """Commit every queued op in one transaction (one fsync), record them in NodeSync in queue
        order and give them all the stamp taken after the last one; call with `lock` held.
        Concurrent writers thus share a sync instead of paying one each. A failed commit fails
        every op of its group (none was applied). Returns the number of ops committed."""
        with self._queue_lock:
            ops, self._queue = self._queue, []
        if not ops:
            return 0
        try:
            results = self.store.write_batch([(o.kind, o.payload) for o in ops])
            sync = self._sync()
            stamp: WriteStamp | None = None
            writes = deletes = 0
            for o, flags in zip(ops, results):      # the commit returned: durable
                if o.kind == "put":
                    stamp = sync.record(added=[k for (k, _), c in zip(o.payload, flags) if c])
                    writes += len(o.payload)
                else:
                    stamp = sync.record(removed=[k for k, e in zip(o.payload, flags) if e])
                    deletes += len(o.payload)
                o.result = flags
            assert stamp is not None    # the group holds at least one op
            for o in ops:
                o.stamp, o.done = stamp, True
            if stamp.cut_due:
                self.wake_pusher()
            with self._counter_lock:
                self._counters.writes += writes
                self._counters.deletes += deletes
        except BaseException as exc:
            if not isinstance(exc, StoreError):
                log.exception("write failed after the store call", extra={"ops": len(ops)})
            for o in ops:   # every op of the group gets the error (a StoreError: nothing applied)
                if not o.done:
                    o.error, o.done = exc, True
        for o in ops:
            if o.on_done is not None:
                o.on_done(o)
        return len(ops)

    # ------------------------------------------------------------------ one NodeSync step
    @contextmanager
    def sync_step(self, now: float | None = None) -> Iterator[NodeSync]:
        """Hold the node lock, hand out NodeSync for one step (inputs), then carry out what is
        ready. Every caller of NodeSync outside the write path goes through here."""
        with self.lock:
            sync = self._sync()
            try:
                yield sync
            finally:
                self._carry_out(sync, time.monotonic() if now is None else now)

    def _carry_out(self, sync: NodeSync, now: float) -> None:
        """Durable writes, then messages per stream, then actions; then acknowledge."""
        ready = sync.ready(now, {peer: outbox.room() for peer, outbox in self._outboxes.items()})
        if ready.durable is not None:
            self._persist(ready.durable)
        for peer, messages in ready.messages.items():
            outbox = self._outboxes.get(peer)
            if outbox is not None:
                outbox.send(messages)
        for action in ready.actions:
            if isinstance(action, StartScan):
                self._start_scan(action)
            else:
                log.log(_LOG_LEVELS[action.level], action.message, extra=dict(action.fields))
        sync.ack(ready)

    def _persist(self, durable: Durable) -> None:
        values: dict[str, str] = {}
        if durable.highest_epoch is not None:
            values[META_EPOCH] = str(durable.highest_epoch)
        if durable.rebuilt_size is not None:
            capacity, target_fpr = durable.rebuilt_size
            values[META_CAPACITY], values[META_FPR] = str(capacity), repr(target_fpr)
        self.store.set_meta(values)

    # ------------------------------------------------------------------ change stream
    def cut(self, now: float | None = None) -> list[tuple[int, int]]:
        """Cut pending changes into deltas and hand them to every stream (normally the pusher,
        node/pusher.py, does this every push interval). Returns the (epoch, sequence) of each delta."""
        with self.sync_step(now) as sync:
            return sync.cut()

    def stop(self) -> None:
        """Refuse new requests and wait for a running rebuild scan to stop (shutdown)."""
        self._stop.set()
        for thread in self._scan_threads:
            thread.join(5.0)

    # ------------------------------------------------------------------ coordinator streams (driver calls)
    def open_stream(self, peer: str, outbox: Outbox, now: float) -> None:
        """A stream to a coordinator opened: its messages go to `outbox` from now on."""
        with self.sync_step(now) as sync:
            self._outboxes[peer] = outbox
            sync.connect(peer, now)

    def close_stream(self, peer: str) -> None:
        with self.lock:
            self._outboxes.pop(peer, None)
            if self.sync is not None:
                with self.sync_step() as sync:
                    sync.disconnect(peer)

    def peer_lag(self, peer: str) -> int:
        """Sequences of the current epoch cut but not acknowledged by peer (-1: not connected)."""
        with self.lock:
            sync = self.sync
            if sync is None or peer not in sync.peers:
                return -1
            return sync.peer_status(peer).lag

    # ------------------------------------------------------------------ rebuild
    def request_rebuild(self, capacity: int, target_fpr: float, reason: str = "local") -> None:
        """Start a rebuild without a coordinator (tools and tests); same path as a coordinator request."""
        now = time.monotonic()
        with self.sync_step(now) as sync:
            sync.request_rebuild(capacity, target_fpr, reason=reason, requested_by="local", now=now)

    def _start_scan(self, action: StartScan) -> None:
        """Carry out StartScan (lock held): a key-ordered read of the store, one batch per step."""
        self._scan_keys = iter_all_keys(self.store, self.scan_batch)
        if self.background_rebuild:
            thread = threading.Thread(target=self._rebuild_scan, args=(action.keys,), name="rebuild-scan",
                                      daemon=True)
            self._scan_threads = [t for t in self._scan_threads if t.is_alive()] + [thread]
            thread.start()

    def rebuild_step(self) -> bool:
        """One batch of a rebuild scan under the lock. Returns True when no scan is left to do."""
        return self._scan_step() is None

    def _scan_step(self) -> int | None:
        """Read the next batch of keys and hand it to NodeSync (or report the end of the store),
        in one lock hold so no write slips between the read and the hand-over. Returns the
        number of keys handed, None when there is no scan (any more)."""
        now = time.monotonic()
        with self.sync_step(now) as sync:
            if self._scan_keys is None:
                return None
            keys = next(self._scan_keys, None)
            if keys:
                sync.scan_batch(keys)
                return len(keys)
            self._scan_keys = None
            sync.scan_done(now)
            return None

    def _rebuild_scan(self, total: int) -> None:
        """Background scan: one locked batch at a time, so writes wait at most one batch."""
        last_log = time.monotonic()
        scanned = 0
        try:
            while not self._stop.is_set():
                handed = self._scan_step()
                if handed is None:
                    break
                scanned += handed
                now = time.monotonic()
                if now - last_log >= 1.0:
                    log.info("rebuild scanning", extra={"keys_scanned": scanned, "of": total})
                    last_log = now
        except Exception as exc:  # noqa: BLE001 - a failed scan must not leave the rebuild running
            log.exception("rebuild scan failed")
            try:
                with self.sync_step() as sync:
                    self._scan_keys = None
                    sync.scan_failed(f"scan failed: {exc}")
            except Exception:  # noqa: BLE001 - logged; the node keeps serving with the old filter
                log.exception("could not abandon the failed rebuild")
        self.wake_pusher()

    # ------------------------------------------------------------------ stats
    def stats(self) -> dict[str, object]:
        """Every figure of the node (the wire stats plus local-only rebuild counts), for metrics."""
        with self.lock:
            report = self._sync().report(self.counters())
        s = report.stats
        out: dict[str, object] = {f.name: getattr(s, f.name) for f in s.DESCRIPTOR.fields}
        out["geometry"] = Geometry.from_proto(s.geometry)
        out["rebuilds_completed"] = report.rebuilds_completed
        out["rebuilds_abandoned"] = report.rebuilds_abandoned
        return out

    def stats_proto(self) -> sync_pb2.NodeStats:
        with self.lock:
            return self._sync().report(self.counters()).stats
