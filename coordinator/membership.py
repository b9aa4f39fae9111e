"""Which nodes a coordinator knows and where they listen; and the freshness rule.

Known nodes: the ones expected from the settings (expect-node), the ones remembered in the
state dir's membership file (nodes.json) and every node that opened a sync stream. A known
node is listed stale until it has a verified replica, so after a coordinator restart safe mode
lists every remembered node until it resyncs instead of losing track of it
(docs/coordinator.md, "Freshness contract" (c); docs/architecture.md#3-bounded-staleness).

`Membership` subscribes to the sync events: StreamOpened records the node and its storage
address (persisted when it changed), NodeUnlisted drops it. It is called under the
coordinator's lock like every other subscriber.
"""

from __future__ import annotations

import json
import logging
import math
import os
from pathlib import Path
from types import MappingProxyType
from typing import Mapping

from shardsieve.coordinator.policy import Policy
from shardsieve.sync.coordinator_side import NodeUnlisted, NodeState, StreamOpened, SyncEvent

log = logging.getLogger("shardsieve.coordinator.membership")

MEMBERSHIP_FILE = "nodes.json"


def fresh_nodes(synced_heard: Mapping[str, float], policy: Policy, now: float) -> set[str]:
    """The freshness rule. `synced_heard`: when each node synced was last heard from
    (CoordinatorSync.synced_heard). Fresh: synced and heard from within stale-after-s. Every
    other known node is stale: not known to the protocol yet, stream down, no verified replica,
    a snapshot outstanding (the replica may lack changes), or silent for stale-after-s."""
    after = policy.stale_after_s
    return {n for n, heard in synced_heard.items() if now - heard <= after}


class FreshNodes:
    """`fresh_nodes` kept between calls: every lookup needs the fresh set, and computing it
    passes over every synced node. Call under the coordinator's lock; do not modify the set.

    A result computed at `since` stays the freshness rule's answer at a later `now` while
    (1) the synced nodes are the same and no time went back (CoordinatorSync.synced_changes
    unchanged), (2) stale-after-s is the same, (3) the node fresh at `since` that was heard from
    least recently is still fresh at `now` (times only grow, so then every node fresh at `since`
    still is), and (4) no node stale at `since` has been heard from since: otherwise it is
    computed again. In a fleet whose nodes heartbeat well within stale-after-s that is about
    once per (stale-after-s - heartbeat interval), not once per lookup.
    """

    def __init__(self) -> None:
        self._key: tuple[int, float] | None = None
        self._since = math.inf
        self._oldest = -math.inf          # least recent time heard of the nodes fresh at `since`
        self._fresh: set[str] = set()
        self._stale: list[str] = []       # the synced nodes stale at `since`

    def get(self, synced_heard: Mapping[str, float], changes: int, policy: Policy, now: float) -> set[str]:
        after = policy.stale_after_s
        if (changes, after) == self._key and now >= self._since and now - self._oldest <= after \
                and not any(now - synced_heard[n] <= after for n in self._stale):
            return self._fresh
        fresh = fresh_nodes(synced_heard, policy, now)
        self._key = (changes, after)
        self._since = now
        self._oldest = min((synced_heard[n] for n in fresh), default=math.inf)
        self._fresh = fresh
        self._stale = [n for n in synced_heard if n not in fresh]
        return fresh


def is_stale(node: NodeState | None, policy: Policy, now: float) -> bool:
    heard = node.synced_heard_at if node is not None else None
    return heard is None or not fresh_nodes({node.node_id: heard}, policy, now)   # type: ignore[union-attr]


def state_name(node: NodeState | None, stale: bool, rebuild_in_flight: bool) -> str:
    """The state shown in status: disconnected, syncing, rebuilding, stale or fresh.

    stale: the freshness rule's verdict on the node (`is_stale`, or not in `fresh_nodes`);
    rebuild_in_flight: the saturation monitor is waiting for a rebuild of this node; the
    node's latest heartbeat also says when it is rebuilding on its own."""
    if node is None or not node.connected:
        return "disconnected"
    if not node.has_replica or node.awaiting_snapshot is not None:
        return "syncing"
    if rebuild_in_flight or (node.stats is not None and node.stats.rebuild_phase):
        return "rebuilding"
    return "stale" if stale else "fresh"


class Membership:
    """Known node ids and their storage addresses; persisted in state_dir when given."""

    def __init__(self, expected: Mapping[str, str] | None = None, state_dir: Path | None = None) -> None:
        self._path = None if state_dir is None else Path(state_dir) / MEMBERSHIP_FILE
        self._addresses: dict[str, str] = dict(expected or {})
        for node_id, address in self._load().items():
            self._addresses.setdefault(node_id, address)
        self._view = MappingProxyType(self._addresses)

    # -- reads ----------------------------------------------------------------------------------
    def knows(self, node_id: str) -> bool:
        return node_id in self._addresses

    def node_ids(self) -> list[str]:
        return sorted(self._addresses)

    def address(self, node_id: str) -> str | None:
        """The node's storage address ('' when never learned), None for an unknown node."""
        return self._addresses.get(node_id)

    def addresses(self) -> Mapping[str, str]:
        """Every known node and its address. The mapping is never changed once handed out (a
        change replaces it), so a lookup may keep using it after the lock is released, and the
        same object comes back until the membership changes."""
        return self._view

    # -- subscriber -----------------------------------------------------------------------------
    def on_event(self, event: SyncEvent) -> None:
        if isinstance(event, StreamOpened):
            known = self._addresses.get(event.node_id)
            if known is None or (event.address and event.address != known):
                self._addresses = {**self._addresses, event.node_id: event.address or (known or "")}
                self._view = MappingProxyType(self._addresses)
                self._save()
        elif isinstance(event, NodeUnlisted):
            if event.node_id in self._addresses:
                self._addresses = {n: a for n, a in self._addresses.items() if n != event.node_id}
                self._view = MappingProxyType(self._addresses)
                self._save()

    # -- the file -------------------------------------------------------------------------------
    def _load(self) -> dict[str, str]:
        if self._path is None or not self._path.exists():
            return {}
        try:
            data = json.loads(self._path.read_text())
            return {str(k): str(v) for k, v in data.get("nodes", {}).items()}
        except (OSError, ValueError, AttributeError) as exc:
            log.warning("membership file unreadable; starting without it",
                        extra={"path": str(self._path), "error": str(exc)})
            return {}

    def _save(self) -> None:
        """Write the whole membership (atomic rename). A failure is logged: routing goes on, and
        the file is written again at the next change."""
        if self._path is None:
            return
        try:
            self._path.parent.mkdir(parents=True, exist_ok=True)
            tmp = self._path.with_suffix(".tmp")
            tmp.write_text(json.dumps({"nodes": dict(sorted(self._addresses.items()))}, indent=1))
            os.replace(tmp, self._path)
        except OSError as exc:
            log.warning("membership file not written", extra={"path": str(self._path), "error": str(exc)})
