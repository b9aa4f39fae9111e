"""WatchReplicas: the replica feed (coordinator/replica_feed.py) as a grpc.aio server stream.

A subscription costs no thread: it is a coroutine on the coordinator's event loop that waits
for the publisher's wake-up (or the marks interval), takes what the subscriber is owed under
the coordinator's lock (log entries, snapshot cuts and freshness marks read in one hold, so
the marks describe the replicas as sent), cuts snapshots into chunks in a worker thread, and
writes. A subscriber that does not read is not read for: gRPC flow control holds the write,
its cursor falls behind the bounded log, and its next read is a reset (a fresh snapshot of
every replica). At most max-replica-subscribers subscribe at once (RESOURCE_EXHAUSTED past
that, naming the setting); the read token is required (coordinator/daemon.py).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from concurrent.futures import Executor
from typing import Callable

import grpc

from shardsieve import error_detail as ed
from shardsieve.coordinator.membership import Membership, fresh_nodes, state_name
from shardsieve.coordinator.policy import LivePolicy
from shardsieve.coordinator.replica_feed import (
    Entry,
    FeedFull,
    ReplicaPublisher,
    SnapshotCut,
    Subscription,
    snapshot_updates,
)
from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.v1 import routing_pb2

log = logging.getLogger("shardsieve.coordinator.replica_watch")

# One ReplicaFeed message carries updates up to about this many bytes (a snapshot chunk is at
# most 1 MiB, shardsieve/snapshot.py), well under the clients' default 4 MiB receive limit.
MESSAGE_BYTES = 2 << 20
DEFAULT_MARKS_INTERVAL_S = 0.5

Step = tuple[str, str, "Entry | SnapshotCut | None"]


class ReplicaWatch:
    """The WatchReplicas handler over the coordinator's publisher, shell and membership."""

    def __init__(self, publisher: ReplicaPublisher, shell: CoordinatorShell, membership: Membership,
                 policy: LivePolicy, packed: Callable[[str], bytes], *, executor: Executor | None = None,
                 marks_interval_s: float = DEFAULT_MARKS_INTERVAL_S,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.publisher = publisher
        self.shell = shell
        self.membership = membership
        self.policy = policy
        self.packed = packed
        self.executor = executor
        self.marks_interval_s = marks_interval_s
        self.clock = clock

    # -- under the coordinator's lock ------------------------------------------------------------
    def marks(self) -> routing_pb2.FleetMarks:
        """The coordinator's freshness view of every known node (the caller holds the lock)."""
        policy = self.policy.current
        now = self.clock()
        fresh = fresh_nodes(self.shell.synced_heard(), policy, now)
        out = routing_pb2.FleetMarks(mode=policy.mode, stale_after_s=policy.stale_after_s)
        for node_id in sorted(self.membership.node_ids()):
            state = self.shell.node(node_id)
            has = state is not None and state.has_replica
            out.nodes.add(node_id=node_id, address=self.membership.address(node_id) or "", fresh=node_id in fresh,
                          state=state_name(state, node_id not in fresh, False), epoch=state.epoch if has else 0,
                          sequence=state.sequence if has else 0, has_replica=has)
        return out

    def take(self, sub: Subscription) -> tuple[bool, list[Step], routing_pb2.FleetMarks]:
        """What `sub` is owed: entries (or a reset), the snapshots to send cut now, and the marks,
        all in one hold of the coordinator's lock."""
        with self.shell.lock:
            pull = self.publisher.pull(sub)
            nodes = [s.node_id for s in self.shell.nodes() if s.has_replica]
            steps: list[Step] = []
            for kind, node_id, entry in self.publisher.plan(pull, nodes):
                if kind == "snapshot":
                    cut = self.publisher.cut(node_id, self.membership.address(node_id) or "", self.packed)
                    if cut is not None:
                        steps.append((kind, node_id, cut))
                else:
                    steps.append((kind, node_id, entry))
            return pull.reset, steps, self.marks()

    def next_messages(self, sub: Subscription) -> list[routing_pb2.ReplicaFeed]:
        """What `sub` is sent next (at least its marks): entries or a reset, with snapshots cut
        and encoded (heavy for large filters: the stream runs this off the event loop then)."""
        reset, steps, marks = self.take(sub)
        updates: list[routing_pb2.NodeUpdate] = []
        for kind, node_id, item in steps:
            if kind == "snapshot":
                assert isinstance(item, SnapshotCut)
                self.publisher.sent_snapshot(sub, item)     # counts it: the count is its snapshot id
                updates += snapshot_updates(item, sub.snapshots_sent)
            elif kind == "delta":
                assert isinstance(item, Entry)
                if self.publisher.keep_delta(sub, item):
                    updates.append(routing_pb2.NodeUpdate(node_id=node_id, delta=item.delta()))
            else:
                self.publisher.sent_unlisted(sub, node_id)
                updates.append(routing_pb2.NodeUpdate(node_id=node_id, unlisted=True))
        return _messages(reset, updates, marks)

    # -- the stream ------------------------------------------------------------------------------
    async def WatchReplicas(self, request: routing_pb2.WatchReplicasRequest,
                            context: grpc.aio.ServicerContext) -> None:
        loop = asyncio.get_running_loop()
        wake = asyncio.Event()
        try:
            sub = self.publisher.subscribe(lambda: loop.call_soon_threadsafe(wake.set))
        except FeedFull as exc:
            await context.abort(grpc.StatusCode.RESOURCE_EXHAUSTED, str(exc), trailing_metadata=ed.trailing(
                ed.detail(ed.LIMIT_EXCEEDED, setting="max-replica-subscribers")))
            return
        try:
            while True:
                heavy = sub.reset_needed or self.publisher.floor() > sub.cursor or self.publisher.has_installs(sub)
                if heavy:
                    messages = await loop.run_in_executor(self.executor, self.next_messages, sub)
                else:
                    messages = await self.shell.call(self.next_messages, sub)
                for message in messages:
                    await context.write(message)
                if self.publisher.backlog(sub) > 0:
                    continue
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(wake.wait(), timeout=self.marks_interval_s)
                wake.clear()
        finally:
            self.publisher.unsubscribe(sub)


def _messages(reset: bool, updates: list[routing_pb2.NodeUpdate],
              marks: routing_pb2.FleetMarks) -> list[routing_pb2.ReplicaFeed]:
    """Updates cut into messages of about MESSAGE_BYTES; `reset` on the first, the marks on the last."""
    messages = [routing_pb2.ReplicaFeed(reset=reset)]
    size = 0
    for update in updates:
        n = update.ByteSize()
        if size and size + n > MESSAGE_BYTES:
            messages.append(routing_pb2.ReplicaFeed())
            size = 0
        messages[-1].updates.append(update)
        size += n
    messages[-1].marks.CopyFrom(marks)
    return messages
