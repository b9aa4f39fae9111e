"""The node's critical section: store write + filter update + change stream, under one lock.

Why one lock: a key must never be in the store without its bits in the filter a coordinator
routes with (no false negatives), and a delta must never carry half a write. So every write
commits to the store, updates the counting filter(s) and is stamped with the (epoch,
sequence) of the delta that will carry it while holding `NodeCore.lock`; the sync protocol
object (`NodeSync`, no I/O, not thread-safe) is only ever called under the same lock.

Rebuild (issue point 5): a second counting filter at the new geometry is filled by a scan of
the store in key order, one batch per lock hold. A write during the scan touches the new
filter only when its key is at or below the scan cursor; keys above the cursor are picked up
by the scan itself (touching them twice would double-count a counter, or underflow one on a
delete). When the scan is complete `NodeSync.begin_epoch` makes the new filter current and
streams it as a snapshot under a new epoch; both filters receive every write until every
coordinator verified the new one (OldFilterRetired), so the filter a coordinator routes with
never lacks a key the node holds.
"""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass, field
from typing import Callable, Sequence

from shardsieve.node.store import Store, StoreError
from shardsieve import hashing
from shardsieve.bloom import CountingBloomFilter
from shardsieve.geometry import Geometry, geometry_for
from shardsieve.sync import node_side
from shardsieve.sync.node_side import NodeSync, NodeSyncConfig
from shardsieve.v1 import sync_pb2

log = logging.getLogger("shardsieve.node.core")

META_EPOCH = "epoch"        # highest epoch this node id ever used; every start uses a larger one
META_CAPACITY = "capacity"  # size of the last filter that every coordinator switched to
META_FPR = "target_fpr"


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


@dataclass(frozen=True)
class WriteResult:
    created: bool      # put: the key was new; delete: the key existed
    epoch: int
    sequence: int      # the delta sequence that carries (or would carry) this change
    # during a rebuild hand-over: (old epoch, sequence) that carries the change there too
    old_position: tuple[int, int] | None = None


@dataclass
class Counters:
    reads: int = 0
    reads_missed: int = 0
    writes: int = 0
    deletes: int = 0


@dataclass
class _PendingWrite:
    kind: str                 # "put" (payload: [(key, value)]) or "delete" (payload: [key])
    payload: list
    done: bool = False
    result: list[bool] = field(default_factory=list)
    error: BaseException | None = None
    epoch: int = 0
    sequence: int = 0
    old: tuple[int, int] | None = None


@dataclass
class RebuildScan:
    """A filter being filled by a store scan. cursor: highest key already scanned in."""

    capacity: int
    target_fpr: float
    filter: CountingBloomFilter
    requested_by: str
    reason: str
    total_at_start: int
    cursor: bytes | None = None
    scan_done: bool = False
    scanned: int = 0
    started: float = field(default_factory=time.monotonic)

    def covers(self, key: bytes) -> bool:
        """True when the scan already passed key, so a write of key must update this filter too."""
        return self.scan_done or (self.cursor is not None and key <= self.cursor)


class NodeCore:
    """Store + counting filter(s) + NodeSync of one node, consistent under `lock`."""

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
        self._queue: list[_PendingWrite] = []
        self._counter_lock = threading.Lock()
        self.counters = Counters()
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
        self.key_count = 0
        self.sync: NodeSync | None = None
        self.rebuild: RebuildScan | None = None
        self.rebuilds_completed = 0      # old filter retired after every coordinator verified the new one
        self.rebuilds_abandoned = 0
        self._rebuild_thread: threading.Thread | None = None
        self._pending_flips = 0
        self._push_now = threading.Event()
        self._stop = threading.Event()
        self._pusher: threading.Thread | None = None
        self.listeners: list[Callable[[], None]] = []   # woken after a cut produced deltas
        self.cut_hooks: list[Callable[[list, float], None]] = []  # (deltas, monotonic time) after each cut

    # ------------------------------------------------------------------ views
    @property
    def filter(self) -> CountingBloomFilter:
        """The current filter (the one Hellos and new deltas describe)."""
        return self._sync().filter

    @property
    def geometry(self) -> Geometry:
        return self._sync().geometry

    @property
    def epoch(self) -> int:
        return self._sync().epoch

    @property
    def capacity(self) -> int:
        return self._sync().capacity

    @property
    def target_fpr(self) -> float:
        return self._sync().target_fpr

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
        after: bytes | None = None
        last_report = started
        with self.lock:
            fresh = CountingBloomFilter(geometry)
            while True:
                if cancel is not None and cancel.is_set():
                    raise LoadCancelled(f"stopped while loading the filter ({total} keys scanned)")
                keys = self.store.scan(after, 20_000)
                if not keys:
                    break
                fresh.add_positions(hashing.positions(keys, geometry))
                total += len(keys)
                after = keys[-1]
                now = time.monotonic()
                if progress is not None and now - last_report >= 1.0:
                    progress(total, now - started)
                    last_report = now
            if progress is not None:
                progress(total, time.monotonic() - started)
            epoch = int(self.store.get_meta(META_EPOCH) or 0) + 1
            self.store.set_meta({META_EPOCH: str(epoch)})   # durable before any coordinator sees it
            self.key_count = total
            config = NodeSyncConfig(push_interval_ms=max(1, int(round(self.push_interval * 1000))),
                                    max_history_deltas=self.history_limit)
            self.sync = NodeSync(self.node_id, self.storage_address, fresh, epoch=epoch, capacity=capacity,
                                 target_fpr=target_fpr, key_count=total, config=config)
            self.ready = True
        log.info("filter loaded from store", extra={"keys": total, "epoch": epoch, "geometry": str(geometry),
                                                    "seconds": round(time.monotonic() - started, 3)})

    # ------------------------------------------------------------------ validation
    def _check_keys(self, keys: Sequence[bytes]) -> None:
        if len(keys) > self.limits.max_batch:
            raise InvalidInput(f"batch of {len(keys)} items is above max-batch ({self.limits.max_batch})")
        for i, key in enumerate(keys):
            if len(key) == 0:
                raise InvalidInput(f"item {i}: empty key (keys must be 1..{self.limits.max_key_bytes} bytes)")
            if len(key) > self.limits.max_key_bytes:
                raise InvalidInput(f"item {i}: key of {len(key)} bytes is above max-key-bytes "
                                   f"({self.limits.max_key_bytes})")

    def _require_ready(self) -> None:
        if not self.ready or self._stop.is_set():
            raise NotReady("node is loading its filter from the store (or stopping); retry when health is SERVING")

    # ------------------------------------------------------------------ reads
    def get_many(self, keys: Sequence[bytes]) -> list[bytes | None]:
        self._require_ready()
        keys = [bytes(k) for k in keys]
        self._check_keys(keys)
        values = self.store.get_many(keys) if len(keys) != 1 else [self.store.get(keys[0])]
        missed = sum(1 for v in values if v is None)
        with self._counter_lock:
            self.counters.reads += len(keys)
            self.counters.reads_missed += missed
        return values

    def scan_keys(self, after: bytes | None, limit: int) -> list[bytes]:
        self._require_ready()
        return self.store.scan(after, limit)

    # ------------------------------------------------------------------ writes
    def put_many(self, items: Sequence[tuple[bytes, bytes]]) -> list[WriteResult]:
        """Validate all items, then one store transaction + filter update; results in item order."""
        self._require_ready()
        items = [(bytes(k), bytes(v)) for k, v in items]
        self._check_keys([k for k, _ in items])
        for i, (_, value) in enumerate(items):
            if len(value) > self.limits.max_value_bytes:
                raise InvalidInput(f"item {i}: value of {len(value)} bytes is above max-value-bytes "
                                   f"({self.limits.max_value_bytes})")
        if not items:
            return []
        created, epoch, sequence, old = self._write("put", items)
        return [WriteResult(c, epoch, sequence, old) for c in created]

    def delete_many(self, keys: Sequence[bytes]) -> list[WriteResult]:
        """Validate, delete in one transaction, uncount only keys that existed."""
        self._require_ready()
        keys = [bytes(k) for k in keys]
        self._check_keys(keys)
        if not keys:
            return []
        existed, epoch, sequence, old = self._write("delete", keys)
        return [WriteResult(e, epoch, sequence, old) for e in existed]

    def _write(self, kind: str, payload: list) -> tuple[list[bool], int, int, tuple[int, int] | None]:
        """Group commit: queue the op; whoever holds the write lock next commits every queued op
        in one transaction (one fsync), updates the filters in queue order and stamps them all.
        Concurrent writers thus share a sync instead of paying one each; a lone writer commits
        alone at once. A failed commit fails every op of its group (none was applied)."""
        op = _PendingWrite(kind, payload)
        with self._queue_lock:
            self._queue.append(op)
        with self.lock:
            if not op.done:
                with self._queue_lock:
                    ops, self._queue = self._queue, []
                try:
                    results = self.store.write_batch([(o.kind, o.payload) for o in ops])
                    writes = deletes = 0
                    for o, flags in zip(ops, results):      # the commit returned: durable
                        if o.kind == "put":
                            changed = [k for (k, _), c in zip(o.payload, flags) if c]
                            writes += len(o.payload)
                        else:
                            changed = [k for k, e in zip(o.payload, flags) if e]
                            deletes += len(o.payload)
                        if changed:
                            self._apply(changed, add=o.kind == "put")
                        o.result = flags
                    epoch, sequence = self._stamp()
                    old = self._old_stamp()
                    for o in ops:
                        o.epoch, o.sequence, o.old, o.done = epoch, sequence, old, True
                    with self._counter_lock:
                        self.counters.writes += writes
                        self.counters.deletes += deletes
                except BaseException as exc:
                    if not isinstance(exc, StoreError):
                        log.exception("write failed after the store call", extra={"ops": len(ops)})
                    for o in ops:   # every op of the group gets the error (a StoreError: nothing applied)
                        if not o.done:
                            o.error, o.done = exc, True
        if op.error is not None:
            raise op.error
        return op.result, op.epoch, op.sequence, op.old

    def _stamp(self) -> tuple[int, int]:
        """(epoch, sequence) a coordinator must have applied to hold the current filter state:
        the next delta's when changes are pending since the last cut, else the last cut's (an
        overwrite, a delete of a missing key, or a key whose bits were all set already, needs no
        new delta; naming one that may never be cut would hold a read-your-writes hint forever).
        "Nothing pending" is judged by the checksum, so a 2^-64 coincidence could only make a
        coordinator drop its hint one push interval early."""
        sync = self._sync()
        if sync.filter.checksum == sync.checksum:
            return sync.epoch, sync.sequence
        return sync.pending_sequence

    def _old_stamp(self) -> tuple[int, int] | None:
        """During a rebuild hand-over the write is in the old filter too: the old epoch's
        position that holds it (same rule as _stamp). A coordinator still on the old epoch holds
        the write once its replica reaches it, even if the rebuild is then abandoned."""
        cut = self._sync().old_cut
        old_filter = self._sync().old_filter
        if cut is None or old_filter is None:
            return None
        epoch, sequence, checksum = cut
        return (epoch, sequence) if old_filter.checksum == checksum else (epoch, sequence + 1)

    def _apply(self, keys: list[bytes], add: bool) -> None:
        """Filter side of a committed write (caller holds the lock): every live filter, and a
        filter being scanned only for keys the scan already passed."""
        sync = self._sync()
        targets: list[tuple[CountingBloomFilter, list[bytes]]] = [(sync.filter, keys)]
        if sync.old_filter is not None:
            targets.append((sync.old_filter, keys))
        rb = self.rebuild
        if rb is not None and not rb.scan_done:
            covered = [k for k in keys if rb.covers(k)]
            if covered:
                targets.append((rb.filter, covered))
        cache: dict[tuple[Geometry, int], object] = {}
        for filt, subset in targets:
            key_id = (filt.geometry, len(subset))
            pos = cache.get(key_id)
            if pos is None:
                pos = hashing.positions(subset, filt.geometry)
                cache[key_id] = pos
            if add:
                filt.add_positions(pos)  # type: ignore[arg-type]
            else:
                filt.remove_positions(pos)  # type: ignore[arg-type]
        self.key_count += len(keys) if add else -len(keys)
        self._pending_flips += len(keys) * sync.geometry.hashes
        if self._pending_flips >= self.push_threshold:
            self._push_now.set()

    # ------------------------------------------------------------------ change stream
    def cut(self, now: float | None = None) -> list:
        """Cut pending changes into deltas (normally the pusher thread does this every push interval)."""
        now = time.monotonic() if now is None else now
        with self.lock:
            sync = self._sync()
            deltas = sync.cut(now, key_count=self.key_count)
            self._pending_flips = 0
            self._handle_events()
        if deltas:
            for hook in self.cut_hooks:
                hook(deltas, now)
            for listener in self.listeners:
                listener()
        return deltas

    def start_pusher(self, interval: float | None = None) -> None:
        if interval is not None:
            self.push_interval = interval
        self._pusher = threading.Thread(target=self._push_loop, name="pusher", daemon=True)
        self._pusher.start()

    def stop_pusher(self) -> None:
        self._stop.set()
        self._push_now.set()
        if self._pusher is not None:
            self._pusher.join(5.0)
        if self._rebuild_thread is not None:
            self._rebuild_thread.join(5.0)

    def _push_loop(self) -> None:
        """Cut on a fixed cadence of push_interval, plus extra cuts when the size threshold fires."""
        next_cut = time.monotonic() + self.push_interval
        while not self._stop.is_set():
            early = self._push_now.wait(max(0.0, next_cut - time.monotonic()))
            self._push_now.clear()
            if self._stop.is_set():
                return
            try:
                self.cut()
            except Exception:  # noqa: BLE001 - keep pushing; the error is logged with its trace
                log.exception("cutting a delta failed")
            now = time.monotonic()
            if not early or now >= next_cut:
                next_cut += self.push_interval
                if next_cut <= now:          # fell behind (a long lock hold): restart the cadence
                    next_cut = now + self.push_interval

    # ------------------------------------------------------------------ per-coordinator (driver calls)
    def peer_open(self, peer: str, now: float) -> list[sync_pb2.NodeMessage]:
        with self.lock:
            out = self._sync().connect(peer, now)
            self._handle_events()
            return out

    def peer_receive(self, peer: str, msg: sync_pb2.CoordinatorMessage, now: float) -> list[sync_pb2.NodeMessage]:
        with self.lock:
            try:
                return self._sync().receive(peer, msg, now)
            finally:
                self._handle_events()

    def peer_poll(self, peer: str, now: float) -> list[sync_pb2.NodeMessage]:
        with self.lock:
            try:
                return self._sync().outgoing(peer, now)
            finally:
                self._handle_events()

    def peer_close(self, peer: str) -> None:
        with self.lock:
            if self.sync is not None:
                self.sync.disconnect(peer)
                self._handle_events()

    def peer_lag(self, peer: str) -> int:
        """Sequences of the current epoch cut but not acknowledged by peer (-1: not connected)."""
        with self.lock:
            sync = self.sync
            if sync is None or peer not in sync.peers:
                return -1
            status = sync.peer_status(peer)
            if status.stream_epoch != sync.epoch:
                return sync.sequence + 1
            return max(0, sync.sequence - status.acked)

    def heartbeat(self) -> sync_pb2.NodeMessage:
        with self.lock:
            return self._sync().heartbeat(self.stats_proto())

    # ------------------------------------------------------------------ rebuild
    def _handle_events(self) -> None:
        """React to NodeSync events (caller holds the lock)."""
        sync = self._sync()
        for event in sync.take_events():
            if isinstance(event, node_side.RebuildRequested):
                self._start_rebuild(event.peer, int(event.request.capacity), float(event.request.target_fpr),
                                    event.request.reason)
            elif isinstance(event, node_side.PeerSwitched):
                log.info("coordinator switched to the rebuilt filter", extra={"peer": event.peer,
                                                                             "epoch": event.epoch})
            elif isinstance(event, node_side.OldFilterRetired):
                self.store.set_meta({META_CAPACITY: str(sync.capacity), META_FPR: repr(sync.target_fpr)})
                self.rebuild = None
                self.rebuilds_completed += 1
                log.info("rebuild complete, old filter retired", extra={
                    "old_epoch": event.old_epoch, "epoch": event.new_epoch, "capacity": sync.capacity,
                    "geometry": str(sync.geometry)})
            elif isinstance(event, node_side.RebuildAbandoned):
                self.rebuild = None
                self.rebuilds_abandoned += 1
                self._persist_epoch(event.epoch)
                log.warning("rebuild abandoned", extra={"epoch": event.epoch, "reason": event.reason})
            elif isinstance(event, node_side.SnapshotStarted):
                log.info("snapshot cut", extra={"peer": event.peer, "epoch": event.epoch, "sequence": event.sequence,
                                                "purpose": "rebuild" if event.purpose == node_side.PURPOSE_REBUILD
                                                else "resync", "reason": event.reason,
                                                "encoded_bytes": event.encoded_bytes})

    def _persist_epoch(self, epoch: int) -> None:
        current = int(self.store.get_meta(META_EPOCH) or 0)
        if epoch > current:
            self.store.set_meta({META_EPOCH: str(epoch)})

    def _start_rebuild(self, peer: str, capacity: int, target_fpr: float, reason: str) -> None:
        sync = self._sync()
        if self.rebuild is not None or sync.dual_write:
            return
        geometry = geometry_for(capacity, target_fpr, self.seed)
        sync.start_rebuild(capacity, target_fpr, time.monotonic())
        self.rebuild = RebuildScan(capacity=capacity, target_fpr=target_fpr, filter=CountingBloomFilter(geometry),
                                   requested_by=peer, reason=reason, total_at_start=self.key_count)
        log.info("rebuild started", extra={"peer": peer, "capacity": capacity, "target_fpr": target_fpr,
                                           "geometry": str(geometry), "keys": self.key_count, "reason": reason})
        if self.background_rebuild:
            self._rebuild_thread = threading.Thread(target=self._rebuild_scan, name="rebuild-scan", daemon=True)
            self._rebuild_thread.start()

    def request_rebuild(self, capacity: int, target_fpr: float, reason: str = "local") -> None:
        """Start a rebuild without a coordinator (tools and tests); same path as a coordinator request."""
        with self.lock:
            self._start_rebuild("local", capacity, target_fpr, reason)

    def rebuild_step(self) -> bool:
        """Scan one batch into the rebuild filter under the lock; at the end hand it to NodeSync.
        Returns True when no scan is left to do."""
        with self.lock:
            rb = self.rebuild
            if rb is None or rb.scan_done:
                return True
            keys = self.store.scan(rb.cursor, self.scan_batch)
            if keys:
                rb.filter.add_positions(hashing.positions(keys, rb.filter.geometry))
                rb.cursor = keys[-1]
                rb.scanned += len(keys)
                self._sync().report_scan_progress(rb.scanned / max(1, rb.total_at_start, rb.scanned))
                return False
            rb.scan_done = True
            epoch = self._sync().begin_epoch(rb.filter, rb.capacity, rb.target_fpr, time.monotonic())
            self._persist_epoch(epoch)
            log.info("rebuild scan complete, streaming the new filter", extra={
                "epoch": epoch, "keys": rb.scanned, "seconds": round(time.monotonic() - rb.started, 3)})
            self._handle_events()
            return True

    def _rebuild_scan(self) -> None:
        """Background scan: one locked batch at a time, so writes wait at most one batch."""
        last_log = time.monotonic()
        try:
            while not self._stop.is_set():
                if self.rebuild_step():
                    break
                now = time.monotonic()
                rb = self.rebuild
                if rb is not None and now - last_log >= 1.0:
                    log.info("rebuild scanning", extra={"keys_scanned": rb.scanned, "of": rb.total_at_start})
                    last_log = now
        except Exception as exc:  # noqa: BLE001 - a failed scan must not leave dual writes running
            log.exception("rebuild scan failed")
            with self.lock:
                if self.sync is not None and self.sync.dual_write and self.sync.old_filter is None:
                    self.sync.abandon_rebuild(f"scan failed: {exc}")
                    self._handle_events()
        self._push_now.set()

    # ------------------------------------------------------------------ stats
    def stats(self) -> dict[str, object]:
        with self.lock:
            sync = self._sync()
            with self._counter_lock:
                c = Counters(**vars(self.counters))
            filt = sync.filter
            return {
                "key_count": self.key_count, "capacity": sync.capacity, "geometry": sync.geometry,
                "fill": float(filt.fill()), "predicted_fpr": float(filt.predicted_fpr()),
                "reads": c.reads, "reads_missed": c.reads_missed, "writes": c.writes, "deletes": c.deletes,
                "bytes_pushed": int(sync.bytes_pushed), "epoch": sync.epoch, "sequence": sync.sequence,
                "target_fpr": sync.target_fpr, "rebuild_epoch": sync.rebuild_epoch,
                "rebuild_progress": float(sync.rebuild_progress), "rebuild_phase": sync.rebuild_phase,
                "saturated_counters": int(filt.saturated_counters()),
                "rebuilds_completed": self.rebuilds_completed, "rebuilds_abandoned": self.rebuilds_abandoned,
            }

    def stats_proto(self) -> sync_pb2.NodeStats:
        s = self.stats()
        geometry = s.pop("geometry")
        for local_only in ("rebuilds_completed", "rebuilds_abandoned"):   # metrics only, not on the wire
            s.pop(local_only)
        return sync_pb2.NodeStats(geometry=geometry.to_proto(), **s)  # type: ignore[arg-type, union-attr]
