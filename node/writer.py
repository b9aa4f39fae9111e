"""The node's one writer thread: store commits (and their fsync) never run on the event loop.

The gRPC servicer checks a write on the loop, queues it with `NodeCore.queue_write` and awaits
its future. This thread commits whatever is queued when it wakes, all of it in one store
transaction (`NodeCore.commit_queued`, under the node lock): while one commit syncs to disk,
the writes that arrive queue up and share the next one (group commit). A future resolves
only after the commit returned, so an acknowledgement always follows durability
(docs/architecture.md#4-nothing-acknowledged-is-lost).
"""

from __future__ import annotations

import asyncio
import logging
import threading

from shardsieve.node.core import NodeCore, PendingWrite, WriteResult

log = logging.getLogger("shardsieve.node.writer")


class GroupWriter:
    """Commits the node's queued writes on one thread; `write` is awaited on the event loop."""

    def __init__(self, core: NodeCore) -> None:
        self.core = core
        self._wake = threading.Event()
        self._stopping = False
        self._thread = threading.Thread(target=self._run, name="node-writer", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self, timeout: float = 10.0) -> None:
        """Commit what is still queued, then end the thread."""
        self._stopping = True
        self._wake.set()
        if self._thread.is_alive():
            self._thread.join(timeout)

    async def write(self, kind: str, payload: list) -> list[WriteResult]:
        """Queue a checked write (NodeCore.check_put / check_delete) and wait for its commit."""
        if not payload:
            return []
        loop = asyncio.get_running_loop()
        done: asyncio.Future[PendingWrite] = loop.create_future()

        def resolve(op: PendingWrite) -> None:      # on the writer thread, after the commit
            try:
                loop.call_soon_threadsafe(_settle, done, op)
            except RuntimeError:      # the loop is closed: nobody waits for this answer any more
                pass

        self.core.queue_write(kind, payload, on_done=resolve)
        self._wake.set()
        op = await asyncio.shield(done)     # a cancelled caller does not undo a queued write
        return op.results()

    def _run(self) -> None:
        while True:
            self._wake.wait()
            self._wake.clear()      # before taking the queue: a write queued after this wakes us again
            try:
                with self.core.lock:
                    self.core.commit_queued()
            except Exception:  # noqa: BLE001 - commit_queued reports to every op; keep the thread alive
                log.exception("group commit failed")
            if self._stopping and not self.core.has_queued_writes():
                return


def _settle(future: asyncio.Future[PendingWrite], op: PendingWrite) -> None:
    if not future.done():
        future.set_result(op)
