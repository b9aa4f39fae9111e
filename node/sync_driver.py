"""One long-lived FilterSync.Stream per coordinator: the thin asyncio driver around the node's NodeSync.

Each coordinator gets its own task, grpc.aio channel, outbox and backoff, so a slow or dead
coordinator never holds back another, and writes never wait on any of them. The stream runs
in the shared pump (shardsieve/stream_pump.py). The driver feeds NodeSync its inputs (stream
opened, each coordinator message, heartbeat and retransmit ticks, stream closed) through
`NodeCore.sync_step` in a worker thread (`executor`: the node lock may be held by a commit's
fsync, which the event loop must never wait for); NodeSync's Ready puts this stream's messages
in its outbox. The outbox is bounded in effect: NodeSync is given a send budget for this
stream only while fewer than `MAX_QUEUED` messages wait to be written; it bounds the history
it keeps for a lagging coordinator and switches it to a snapshot beyond that.

An agent holds its streams while its store's feed is not live (`hold`/`release`): the
stream ends at once and stays closed, so every coordinator lists the node as stale
(docs/agents.md, "Staleness and the new epoch"); a release reconnects without backoff.

Reconnects use jittered exponential backoff (after the n-th failure in a row sleep
uniform(min/2, min(max, min*2^n)): "full jitter" of AWS Architecture Blog, "Exponential
Backoff And Jitter", 2015, with a floor of min/2 so a reconnect never spins), reset after a
stream that worked (an ack arrived).
"""

from __future__ import annotations

import asyncio
import logging
import random
import time
from concurrent.futures import Executor
from typing import Any, Callable, Sequence

import grpc

from shardsieve.security import make_aio_channel
from shardsieve.stream_pump import Outbox, StreamEnd, pump
from shardsieve.sync.errors import SyncError
from shardsieve.sync.node_side import SEND_BUDGET_BYTES
from shardsieve.v1 import sync_pb2, sync_pb2_grpc

log = logging.getLogger("shardsieve.node.sync")

MAX_QUEUED = 64
HELD = "the node holds its sync streams"


def backoff_delay(failures: int, lo: float, hi: float, rng: random.Random) -> float:
    """The wait before the next attempt after `failures` failed streams in a row (module docstring)."""
    ceiling = min(hi, lo * (2 ** min(failures, 20)))
    return rng.uniform(lo / 2, ceiling)


class StreamOutbox:
    """NodeCore's Outbox for one stream (node/core.py): NodeSync's send budget is open while the
    pump's outbox has room; sends may come from any thread."""

    def __init__(self, outbox: Outbox[sync_pb2.NodeMessage]) -> None:
        self.outbox = outbox

    def room(self) -> int:
        return SEND_BUDGET_BYTES if self.outbox.room() > 0 else 0

    def send(self, messages: Sequence[sync_pb2.NodeMessage]) -> None:
        self.outbox.send(messages)


class SyncDriver:
    """Drives the stream to one coordinator address until stop()."""

    def __init__(self, core: Any, address: str, *, push_interval: float = 0.05, heartbeat_interval: float = 1.0,
                 backoff_min: float = 0.1, backoff_max: float = 5.0, rng: random.Random | None = None,
                 on_sent: Callable[[sync_pb2.NodeMessage, float], None] | None = None,
                 credentials: grpc.ChannelCredentials | None = None,
                 metadata: tuple[tuple[str, str], ...] = (), executor: Executor | None = None) -> None:
        self.core = core
        self.credentials = credentials   # TLS (None: plaintext) and the sync token: shardsieve/security.py
        self.metadata = metadata
        self.address = address
        self.peer = f"coordinator@{address}"
        self.push_interval = push_interval
        self.heartbeat_interval = heartbeat_interval
        self.backoff_min = backoff_min
        self.backoff_max = backoff_max
        self.rng = rng or random.Random()
        self.on_sent = on_sent          # timestamp hook: (message, time.monotonic() when handed to gRPC)
        self.executor = executor        # where NodeSync steps run (None: the loop's default executor)
        self._stopping: asyncio.Event | None = None
        self._task: asyncio.Task[None] | None = None
        self._released: asyncio.Event | None = None   # set while streams may run (see hold)
        self._held_reason = ""
        self._outbox: Outbox[sync_pb2.NodeMessage] | None = None   # of the stream running now
        self.connected = False
        self.connects = 0
        self.acks = 0
        self.last_error = ""

    # ------------------------------------------------------------------ lifecycle
    def start(self, held: str = "") -> None:
        """Start the driver's task on the running loop (`held`: start held, for that reason)."""
        self._stopping = asyncio.Event()
        self._released = asyncio.Event()
        if held:
            self._held_reason = held
        else:
            self._released.set()
        self._task = asyncio.create_task(self._run(), name=f"sync-{self.address}")

    @property
    def held(self) -> bool:
        return self._released is not None and not self._released.is_set()

    def hold(self, reason: str) -> None:
        """End the stream now and open none until release() (call on the loop). The coordinator
        sees the stream close, so it lists this node as stale at once."""
        if self._released is None or self.held:
            return
        self._released.clear()
        self._held_reason = reason
        outbox = self._outbox
        if outbox is not None:
            outbox.end(StreamEnd(grpc.StatusCode.CANCELLED, f"{HELD}: {reason}"), now=True)
        log.info("sync stream held", extra={"coordinator": self.address, "reason": reason})

    def release(self) -> None:
        """Open the stream again (at once, without backoff)."""
        if self._released is None or not self.held:
            return
        self._released.set()
        log.info("sync stream released", extra={"coordinator": self.address})

    async def stop(self, timeout: float = 5.0) -> None:
        """End the stream (the coordinator sees it close) and the reconnect loop."""
        if self._stopping is not None:
            self._stopping.set()
        if self._task is not None:
            self._task.cancel()
            await asyncio.wait([self._task], timeout=timeout)

    def status(self) -> dict[str, Any]:
        return {"address": self.address, "connected": self.connected, "connects": self.connects,
                "acks": self.acks, "lag": self.core.peer_lag(self.peer), "last_error": self.last_error,
                "held": self._held_reason if self.held else ""}

    # ------------------------------------------------------------------ loop
    async def _run(self) -> None:
        failures = 0
        while not self._stopped():
            if self.held:
                if await self._until_released():
                    break
                failures = 0
                continue
            try:
                worked = await self._one_stream()
            except asyncio.CancelledError:
                raise
            except Exception as exc:  # noqa: BLE001 - a driver bug must not end syncing for good
                self.last_error = f"{type(exc).__name__}: {exc}"
                log.exception("sync driver error", extra={"coordinator": self.address})
                worked = False
            if self._stopped():
                break
            if self.held:
                continue
            failures = 0 if worked else failures + 1
            delay = backoff_delay(failures, self.backoff_min, self.backoff_max, self.rng)
            log.info("sync stream down, reconnecting", extra={"coordinator": self.address,
                                                              "delay_s": round(delay, 3),
                                                              "error": self.last_error})
            if await self._pause(delay):
                break

    def _stopped(self) -> bool:
        return self._stopping is not None and self._stopping.is_set()

    async def _until_released(self) -> bool:
        """Wait until release() or stop(); True when stopping."""
        assert self._stopping is not None and self._released is not None
        stopping = asyncio.ensure_future(self._stopping.wait())
        released = asyncio.ensure_future(self._released.wait())
        try:
            await asyncio.wait([stopping, released], return_when=asyncio.FIRST_COMPLETED)
        finally:
            stopping.cancel()
            released.cancel()
        return self._stopped()

    async def _pause(self, delay: float) -> bool:
        """Wait `delay` seconds or until stop(); True when stopping."""
        assert self._stopping is not None
        try:
            await asyncio.wait_for(self._stopping.wait(), delay)
        except asyncio.TimeoutError:
            pass
        return self._stopped()

    async def _one_stream(self) -> bool:
        """Open, run and close one stream; True if the coordinator acknowledged something on it."""
        loop = asyncio.get_running_loop()
        outbox: Outbox[sync_pb2.NodeMessage] = Outbox(MAX_QUEUED)
        self._outbox = outbox
        acked = [False]
        channel = make_aio_channel(self.address, self.credentials, options=[
            ("grpc.max_send_message_length", 64 << 20), ("grpc.max_receive_message_length", 64 << 20),
            ("grpc.keepalive_time_ms", 10_000), ("grpc.keepalive_timeout_ms", 5_000)])
        call: Any = None
        ticker: asyncio.Task[None] | None = None
        closing: list[asyncio.Future[None]] = []
        opened = False
        try:
            # queues the Hello in the outbox
            await loop.run_in_executor(self.executor, self.core.open_stream, self.peer, StreamOutbox(outbox),
                                       time.monotonic())
            opened = True
            call = sync_pb2_grpc.FilterSyncStub(channel).Stream(metadata=self.metadata)
            self.connects += 1
            ticker = asyncio.create_task(self._tick(), name=f"sync-tick-{self.address}")

            async def handle(reply: sync_pb2.CoordinatorMessage) -> None:
                self.connected = True
                if reply.WhichOneof("body") == "ack":
                    self.acks += 1
                    acked[0] = True
                try:
                    await loop.run_in_executor(self.executor, self._receive, reply)
                except SyncError as exc:
                    log.warning("coordinator message refused, resetting stream",
                                extra={"coordinator": self.address, "error": f"{type(exc).__name__}: {exc}"})
                    raise

            async def write(msg: sync_pb2.NodeMessage) -> None:
                if self.on_sent is not None:
                    self.on_sent(msg, time.monotonic())
                await call.write(msg)

            def on_close(_end: StreamEnd) -> None:   # once; the node lock is taken off the loop
                closing.append(loop.run_in_executor(self.executor, self.core.close_stream, self.peer))

            end = await pump(read=call.read, write=write, handle=handle, outbox=outbox, on_close=on_close,
                             name=f"sync-{self.address}")
            self._note_end(end)
            if end.limit:   # the coordinator refused this node's filter by a setting of its own
                await loop.run_in_executor(self.executor, self._refused, end.limit)
            return acked[0]
        except SyncError as exc:
            self.last_error = f"{type(exc).__name__}: {exc}"
            log.warning("sync protocol error, resetting stream", extra={"coordinator": self.address,
                                                                        "error": self.last_error})
            return False
        finally:
            self.connected = False
            self._outbox = None
            if ticker is not None:
                ticker.cancel()
            if call is not None:
                call.cancel()
            if not closing and opened:      # the pump never ran: close what open_stream opened
                closing.append(loop.run_in_executor(self.executor, self.core.close_stream, self.peer))
            if closing:
                await asyncio.shield(closing[0])
            await channel.close()

    def _note_end(self, end: StreamEnd) -> None:
        if end.ok or end.code == grpc.StatusCode.CANCELLED and (self._stopped() or self.held):
            return
        self.last_error = end.describe()
        if end.code == grpc.StatusCode.ABORTED:
            # e.g. another stream for this node id took over at the coordinator; the detail names its peer
            log.warning("the coordinator ended this sync stream", extra={"coordinator": self.address,
                                                                         "detail": end.details})

    def _refused(self, limit: str) -> None:
        with self.core.sync_step(time.monotonic()) as sync:
            sync.refused(self.peer, limit)

    def _receive(self, reply: sync_pb2.CoordinatorMessage) -> None:
        now = time.monotonic()
        with self.core.sync_step(now) as sync:
            sync.receive(self.peer, reply, now)

    async def _tick(self) -> None:
        """Every push interval: retransmit timers run and the outbox may have room again; a
        heartbeat with the node's stats every heartbeat interval."""
        loop = asyncio.get_running_loop()
        last_heartbeat = 0.0
        while True:
            await asyncio.sleep(self.push_interval)
            now = time.monotonic()
            beat = now - last_heartbeat >= self.heartbeat_interval
            if beat:
                last_heartbeat = now
            try:
                await loop.run_in_executor(self.executor, self._step, now, beat)
            except Exception as exc:  # noqa: BLE001 - logged; the stream's own errors end it elsewhere
                log.warning("sync tick failed", extra={"coordinator": self.address,
                                                       "error": f"{type(exc).__name__}: {exc}"})

    def _step(self, now: float, heartbeat: bool) -> None:
        with self.core.sync_step(now) as sync:
            if heartbeat:
                sync.heartbeat(self.peer, self.core.counters())
