"""An asyncio event loop on a thread of its own, for synchronous tests, benchmarks and helpers that
serve or call grpc.aio (the daemons' transport) from plain code.

    with LoopThread() as loop:
        server = loop.run(make_server())      # a coroutine, run on the loop; its result returned
        ...
    # the loop is stopped and closed here

Everything made on the loop (servers, channels) must be used and closed on it: gRPC's asyncio
objects belong to the loop that created them (gRPC Python asyncio API docs).
"""

from __future__ import annotations

import asyncio
import threading
from typing import Any, Coroutine, TypeVar

T = TypeVar("T")


class LoopThread:
    """A running event loop on a daemon thread; `run` hands it coroutines from any other thread."""

    def __init__(self, name: str = "event-loop") -> None:
        self.loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self.loop.run_forever, name=name, daemon=True)
        self._thread.start()

    def run(self, coro: Coroutine[Any, Any, T], timeout: float | None = 30.0) -> T:
        """Run coro on the loop and wait for its result (its exception is raised here)."""
        return asyncio.run_coroutine_threadsafe(coro, self.loop).result(timeout)

    def close(self) -> None:
        if self.loop.is_closed():
            return
        self.loop.call_soon_threadsafe(self.loop.stop)
        self._thread.join(10)
        self.loop.close()

    def __enter__(self) -> LoopThread:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
