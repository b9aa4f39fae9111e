"""One long-lived FilterSync.Stream per coordinator: the thin I/O driver around the node's NodeSync.

Each coordinator gets its own thread, channel, outbound queue and backoff, so a slow or dead
coordinator never holds back another, and writes never wait on any of them. The driver feeds
NodeSync its inputs (stream opened, each coordinator message, heartbeat and retransmit
ticks, stream closed) through `NodeCore.sync_step`, which holds the node lock and then
carries out NodeSync's Ready; this stream's messages land in its outbound queue (its
`Outbox`). The queue is bounded in effect: NodeSync is given a send budget for this stream
only while fewer than `MAX_QUEUED` messages wait to be sent; it bounds the history it keeps
for a lagging coordinator and switches it to a snapshot beyond that.

Reconnects use jittered exponential backoff (after the n-th failure in a row sleep
uniform(min/2, min(max, min*2^n)): "full jitter" of AWS Architecture Blog, "Exponential
Backoff And Jitter", 2015, with a floor of min/2 so a reconnect never spins), reset after a
stream that worked (an ack arrived).
"""

from __future__ import annotations

import logging
import queue
import random
import threading
import time
from typing import Any, Callable, Iterator, Sequence

import grpc

from shardsieve.security import make_channel
from shardsieve.sync.errors import SyncError
from shardsieve.sync.node_side import SEND_BUDGET_BYTES
from shardsieve.v1 import sync_pb2, sync_pb2_grpc

log = logging.getLogger("shardsieve.node.sync")

MAX_QUEUED = 64
_CLOSE = object()


class _QueueOutbox:
    """NodeCore's Outbox for one stream: the queue the gRPC request iterator reads."""

    def __init__(self, q: queue.Queue[Any]) -> None:
        self.queue = q

    def room(self) -> int:
        return SEND_BUDGET_BYTES if self.queue.qsize() < MAX_QUEUED else 0

    def send(self, messages: Sequence[sync_pb2.NodeMessage]) -> None:
        for msg in messages:
            self.queue.put(msg)


class SyncDriver:
    """Drives the stream to one coordinator address until stop()."""

    def __init__(self, core: Any, address: str, *, push_interval: float = 0.05, heartbeat_interval: float = 1.0,
                 backoff_min: float = 0.1, backoff_max: float = 5.0, rng: random.Random | None = None,
                 on_sent: Callable[[sync_pb2.NodeMessage, float], None] | None = None,
                 credentials: grpc.ChannelCredentials | None = None,
                 metadata: tuple[tuple[str, str], ...] = ()) -> None:
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
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._thread = threading.Thread(target=self._run, name=f"sync-{address}", daemon=True)
        self.connected = False
        self.connects = 0
        self.acks = 0
        self.last_error = ""

    # ------------------------------------------------------------------ lifecycle
    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._wake.set()

    def join(self, timeout: float | None = None) -> None:
        self._thread.join(timeout)

    def status(self) -> dict[str, Any]:
        return {"address": self.address, "connected": self.connected, "connects": self.connects,
                "acks": self.acks, "lag": self.core.peer_lag(self.peer), "last_error": self.last_error}

    # ------------------------------------------------------------------ loop
    def _run(self) -> None:
        failures = 0
        while not self._stop.is_set():
            try:
                worked = self._one_stream()
            except Exception as exc:  # noqa: BLE001 - a driver bug must not end syncing for good
                self.last_error = f"{type(exc).__name__}: {exc}"
                log.exception("sync driver error", extra={"coordinator": self.address})
                worked = False
            if self._stop.is_set():
                break
            failures = 0 if worked else failures + 1
            ceiling = min(self.backoff_max, self.backoff_min * (2 ** min(failures, 20)))
            delay = self.rng.uniform(self.backoff_min / 2, ceiling)
            log.info("sync stream down, reconnecting", extra={"coordinator": self.address,
                                                              "delay_s": round(delay, 3),
                                                              "error": self.last_error})
            self._stop.wait(delay)

    def _one_stream(self) -> bool:
        """Open, run and close one stream; True if the coordinator acknowledged something on it."""
        outq: queue.Queue[Any] = queue.Queue()
        got_ack = threading.Event()
        reader_done = threading.Event()
        channel = make_channel(self.address, self.credentials, options=[
            ("grpc.max_send_message_length", 64 << 20), ("grpc.max_receive_message_length", 64 << 20),
            ("grpc.keepalive_time_ms", 10_000), ("grpc.keepalive_timeout_ms", 5_000)])
        call = None
        opened = False
        try:
            self.core.open_stream(self.peer, _QueueOutbox(outq), time.monotonic())   # queues the Hello
            opened = True
            stub = sync_pb2_grpc.FilterSyncStub(channel)
            call = stub.Stream(self._requests(outq), metadata=self.metadata)
            self.connects += 1
            reader = threading.Thread(target=self._read, args=(call, got_ack, reader_done),
                                      name=f"sync-read-{self.address}", daemon=True)
            reader.start()
            last_heartbeat = 0.0
            while not self._stop.is_set() and not reader_done.is_set():
                self._wake.wait(self.push_interval)
                self._wake.clear()
                now = time.monotonic()
                # a tick: retransmit timers run, and the queue may have room again
                with self.core.sync_step(now) as sync:
                    if now - last_heartbeat >= self.heartbeat_interval:
                        sync.heartbeat(self.peer, self.core.counters())
                        last_heartbeat = now
            return got_ack.is_set()
        except SyncError as exc:
            self.last_error = f"{type(exc).__name__}: {exc}"
            log.warning("sync protocol error, resetting stream", extra={"coordinator": self.address,
                                                                        "error": self.last_error})
            return False
        finally:
            self.connected = False
            outq.put(_CLOSE)
            if call is not None:
                call.cancel()
            if opened:
                self.core.close_stream(self.peer)
            channel.close()

    def _requests(self, outq: queue.Queue[Any]) -> Iterator[sync_pb2.NodeMessage]:
        while True:
            msg = outq.get()
            if msg is _CLOSE:
                return
            if self.on_sent is not None:
                self.on_sent(msg, time.monotonic())
            yield msg

    def _read(self, call: Any, got_ack: threading.Event, done: threading.Event) -> None:
        try:
            for reply in call:
                self.connected = True
                if reply.WhichOneof("body") == "ack":
                    self.acks += 1
                    got_ack.set()
                now = time.monotonic()
                try:
                    with self.core.sync_step(now) as sync:
                        sync.receive(self.peer, reply, now)
                except SyncError as exc:
                    self.last_error = f"{type(exc).__name__}: {exc}"
                    log.warning("coordinator message refused, resetting stream",
                                extra={"coordinator": self.address, "error": self.last_error})
                    return
        except grpc.RpcError as exc:
            code = exc.code() if hasattr(exc, "code") else None
            if code != grpc.StatusCode.CANCELLED:
                self.last_error = f"{code.name if code else 'error'}: {exc.details() if hasattr(exc, 'details') else exc}"
        except Exception as exc:  # noqa: BLE001 - end this stream, keep the driver alive
            self.last_error = f"{type(exc).__name__}: {exc}"
            log.exception("sync stream reader failed", extra={"coordinator": self.address})
        finally:
            done.set()
            self._wake.set()
