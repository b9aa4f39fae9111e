"""Keeps the pauses of Python's cyclic garbage collector short in a coordinator of a large fleet.

A coordinator keeps a few dozen long-lived objects per node and per sync stream (its state, the
stream's tasks, futures and buffers: about 90 per node at 1,000 nodes, measured with
gc.get_objects). A full collection walks every tracked object, and under steady sync traffic
one comes every few seconds (the young objects that happen to survive two younger collections
add up to the quarter of the old generation that triggers the next one: CPython's gc module
documentation, gc.set_threshold, and its developer guide on the garbage collector). At 1,000
nodes each one held the event loop for 40-100 ms, which every call waiting on the loop felt.

`SurvivorFreezer` moves what is alive at start-up, and what survived each full collection, to
the collector's permanent generation (gc.freeze), so the next full collection walks only what
reached the old generation since. Reference counting frees objects as before; only garbage
that is part of a reference cycle among frozen objects waits, until `thaw` (gc.unfreeze, then
one full collection over everything), which the daemon calls every THAW_INTERVAL_S.
"""

from __future__ import annotations

import gc
import logging
import time
from typing import Any, Callable

log = logging.getLogger("shardsieve.coordinator.gc")

THAW_INTERVAL_S = 600.0


class SurvivorFreezer:
    """Freezes the survivors of every full collection; `thaw` collects the frozen ones once."""

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        self._clock = clock
        self._installed = False
        self.thawed_at = clock()

    def install(self) -> None:
        """Freeze what is alive now (modules, classes, the daemon's wiring) and every full
        collection's survivors from now on."""
        if not self._installed:
            self._installed = True
            gc.freeze()
            gc.callbacks.append(self._after_collection)

    def uninstall(self) -> None:
        if self._installed:
            self._installed = False
            gc.callbacks.remove(self._after_collection)
            gc.unfreeze()

    def _after_collection(self, phase: str, info: dict[str, Any]) -> None:
        if phase == "stop" and info.get("generation") == 2:
            gc.freeze()

    def thaw(self) -> float:
        """Collect everything once, frozen objects included (then freeze the survivors again);
        returns the seconds it took."""
        start = time.perf_counter()
        gc.unfreeze()
        collected = gc.collect()        # a full collection: its callback freezes the survivors
        took = time.perf_counter() - start
        self.thawed_at = self._clock()
        log.info("garbage collector: full collection of frozen objects", extra={
            "collected": collected, "frozen": gc.get_freeze_count(), "ms": round(took * 1000, 1)})
        return took

    def thaw_due(self) -> bool:
        return self._clock() - self.thawed_at >= THAW_INTERVAL_S
