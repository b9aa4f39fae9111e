"""The coordinator's one lock around its protocol object, and the dispatch of what changed.

CoordinatorSync (shardsieve/sync/coordinator_side.py) owns every node's state and is not
thread-safe. Every call into it goes through this shell, under `lock`; each call's events are
handed to the subscribers (membership, hints, accounting, monitor, metrics, the stream
transport), each event to every subscriber in the order given, before the lock is released
(docs/architecture.md#how-events-flow). The replies are the caller's to send.

Readers (candidates, status, metrics, operations) take the same lock and read the live
per-node state through `node` / `nodes` (read-only `NodeState`).

The coordinator runs on one asyncio event loop, and almost every call into the shell comes
from it; the lock stays as a cheap guard for the few that do not: work heavy enough to run in
a worker thread (a very large delta, a large LocateBatch's candidate merge) and the metrics
endpoint's thread. `call` is how the loop's code uses the shell: on the loop while the lock is
free (holds are short, so it nearly always is), in a worker thread otherwise, so the event
loop never waits for the lock (docs/coordinator.md, "Event loop and threads").

A snapshot install is split (shardsieve/sync/coordinator_side.py, `install_off_call`): the
decode and the index install run in a worker thread (`run_install`, no lock: it touches only
its job and the index, which has its own), the state commit under the lock (`finish_install`).
"""

from __future__ import annotations

import asyncio
import logging
import threading
from collections.abc import Hashable
from concurrent.futures import Executor
from typing import Any, Callable, Mapping, Sequence, TypeVar

from shardsieve.sync.coordinator_side import (
    CoordinatorSync,
    NodeState,
    Position,
    SnapshotInstall,
    SyncEvent,
    SyncResult,
)
from shardsieve.v1 import sync_pb2

log = logging.getLogger("shardsieve.coordinator.shell")

Subscriber = Callable[[SyncEvent], None]
T = TypeVar("T")


class CoordinatorShell:
    """CoordinatorSync behind the coordinator's lock, with its events dispatched in order."""

    def __init__(self, sync: CoordinatorSync, subscribers: Sequence[Subscriber] = (),
                 executor: Executor | None = None) -> None:
        self.lock = threading.RLock()
        self._sync = sync
        self._subscribers: list[Subscriber] = list(subscribers)
        self.executor = executor   # where `call` runs what is heavy or finds the lock taken (None: the loop's default)

    async def call(self, fn: Callable[..., T], *args: Any, off_loop: bool = False) -> T:
        """fn(*args) from the event loop: run at once, holding the lock, when the lock is free and
        the work is light; else (off_loop: heavy work) in `executor`. `fn` takes the lock itself
        for what it reads or changes, so it is correct either way."""
        if not off_loop and self.lock.acquire(blocking=False):
            try:
                return fn(*args)
            finally:
                self.lock.release()
        return await asyncio.get_running_loop().run_in_executor(self.executor, lambda: fn(*args))

    def subscribe(self, subscriber: Subscriber) -> None:
        """Add a subscriber after the others (wiring time, before any stream opens)."""
        with self.lock:
            self._subscribers.append(subscriber)

    def _dispatch(self, result: SyncResult) -> SyncResult:
        for event in result.events:
            for subscriber in self._subscribers:
                try:
                    subscriber(event)
                except Exception:  # noqa: BLE001 - one subscriber's bug must not starve the others
                    log.exception("event subscriber failed", extra={"event": type(event).__name__,
                                                                    "node_id": event.node_id})
        return result

    # -- mutations (each one dispatches its events) ------------------------------------------------
    def open(self, stream_id: Hashable, hello: sync_pb2.Hello, now: float) -> SyncResult:
        with self.lock:
            return self._dispatch(self._sync.open(stream_id, hello, now))

    def receive(self, node_id: str, stream_id: Hashable, msg: sync_pb2.NodeMessage, now: float) -> SyncResult:
        with self.lock:
            return self._dispatch(self._sync.receive(node_id, stream_id, msg, now))

    def close(self, node_id: str, stream_id: Hashable, now: float) -> SyncResult:
        with self.lock:
            return self._dispatch(self._sync.close(node_id, stream_id, now))

    def run_install(self, job: SnapshotInstall) -> None:
        """The heavy half of a snapshot install (a worker thread; no lock: see the module docstring)."""
        self._sync.run_install(job)

    def finish_install(self, job: SnapshotInstall, now: float) -> SyncResult:
        with self.lock:
            return self._dispatch(self._sync.finish_install(job, now))

    def unlist(self, node_id: str) -> SyncResult:
        with self.lock:
            return self._dispatch(self._sync.unlist(node_id))

    def request_rebuild(self, node_id: str, capacity: int, target_fpr: float, reason: str,
                        now: float) -> SyncResult:
        with self.lock:
            return self._dispatch(self._sync.request_rebuild(node_id, capacity, target_fpr, reason, now))

    # -- reads (call with `lock` held) -----------------------------------------------------------
    def node(self, node_id: str) -> NodeState | None:
        return self._sync.node(node_id)

    def nodes(self) -> list[NodeState]:
        return self._sync.nodes()

    def position(self, node_id: str) -> Position | None:
        return self._sync.position(node_id)

    def synced_heard(self) -> Mapping[str, float]:
        return self._sync.synced_heard()

    def synced_changes(self) -> int:
        return self._sync.synced_changes()
