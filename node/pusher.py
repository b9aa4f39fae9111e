"""The node's push timer, an asyncio task: cut pending filter changes into deltas every push
interval, and sooner when NodeCore says a cut is due (the size threshold, the end of a rebuild
scan) (docs/architecture.md#3-bounded-staleness; docs/node.md, "Sync").

The cut itself takes the node lock, which a store commit holds during its fsync, so it runs in
a worker thread (`executor`); the loop only keeps time.
"""

from __future__ import annotations

import asyncio
import logging
import threading
import time
from concurrent.futures import Executor

from shardsieve.node.core import NodeCore

log = logging.getLogger("shardsieve.node.pusher")


class Pusher:
    """Cuts on a fixed cadence of `interval` seconds, plus extra cuts when one is due."""

    def __init__(self, core: NodeCore, interval: float, executor: Executor | None = None) -> None:
        self.core = core
        self.interval = interval
        self.executor = executor
        self._due: asyncio.Event | None = None
        self._task: asyncio.Task[None] | None = None

    def start(self) -> None:
        """Start the task on the running loop and take NodeCore's wake-up calls (from any thread)."""
        loop = asyncio.get_running_loop()
        due = self._due = asyncio.Event()

        def wake() -> None:
            try:
                loop.call_soon_threadsafe(due.set)
            except RuntimeError:      # the loop is closed (shutdown)
                pass

        self.core.wake_pusher = wake
        self._task = asyncio.create_task(self._run(), name="pusher")

    async def stop(self) -> None:
        self.core.wake_pusher = lambda: None
        if self._task is not None:
            self._task.cancel()
            try:
                await self._task
            except asyncio.CancelledError:
                pass

    async def _run(self) -> None:
        assert self._due is not None
        loop = asyncio.get_running_loop()
        next_cut = time.monotonic() + self.interval
        while True:
            try:
                await asyncio.wait_for(self._due.wait(), max(0.0, next_cut - time.monotonic()))
                early = True
            except asyncio.TimeoutError:
                early = False
            self._due.clear()
            try:
                await loop.run_in_executor(self.executor, self.core.cut)
            except Exception:  # noqa: BLE001 - keep pushing; the error is logged with its trace
                log.exception("cutting a delta failed")
            now = time.monotonic()
            if not early or now >= next_cut:
                next_cut += self.interval
                if next_cut <= now:          # fell behind (a long lock hold): restart the cadence
                    next_cut = now + self.interval


class ThreadedPusher:
    """A Pusher on an event loop of its own thread, for in-process users of NodeCore that have no
    loop (the node benchmark's in-process baseline). `stop()` ends the loop and the thread."""

    def __init__(self, core: NodeCore, interval: float) -> None:
        self._loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self._loop.run_forever, name="pusher-loop", daemon=True)
        self._pusher = Pusher(core, interval)

    def start(self) -> ThreadedPusher:
        self._thread.start()

        async def begin() -> None:
            self._pusher.start()
        asyncio.run_coroutine_threadsafe(begin(), self._loop).result(10)
        return self

    def stop(self) -> None:
        asyncio.run_coroutine_threadsafe(self._pusher.stop(), self._loop).result(10)
        self._loop.call_soon_threadsafe(self._loop.stop)
        self._thread.join(10)
        self._loop.close()
