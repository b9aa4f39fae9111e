"""The coordinator's one lock around its protocol object, and the dispatch of what changed.

CoordinatorSync (shardsieve/sync/coordinator_side.py) owns every node's state and is not
thread-safe. Every call into it goes through this shell, under `lock`; each call's events are
handed to the subscribers (membership, hints, accounting, monitor, metrics, the stream
transport), each event to every subscriber in the order given, before the lock is released
(docs/architecture.md#how-events-flow). The replies are the caller's to send.

Readers (candidates, status, metrics, operations) take the same lock and read the live
per-node state through `node` / `nodes` (read-only `NodeState`). Nothing reads coordinator
state from another thread without this lock, so it can later become a single event loop.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Hashable
from typing import Callable, Mapping, Sequence

from shardsieve.sync.coordinator_side import CoordinatorSync, NodeState, Position, SyncEvent, SyncResult
from shardsieve.v1 import sync_pb2

log = logging.getLogger("shardsieve.coordinator.shell")

Subscriber = Callable[[SyncEvent], None]


class CoordinatorShell:
    """CoordinatorSync behind the coordinator's lock, with its events dispatched in order."""

    def __init__(self, sync: CoordinatorSync, subscribers: Sequence[Subscriber] = ()) -> None:
        self.lock = threading.RLock()
        self._sync = sync
        self._subscribers: list[Subscriber] = list(subscribers)

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
