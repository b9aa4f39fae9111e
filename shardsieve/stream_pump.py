"""The one pump of every FilterSync stream: the node's driver, the coordinator's servicer and the
in-process test coordinator all run their streams through `pump`.

Why one: a stream has the same chores at both ends (read the peer's messages in order and hand
each to the protocol shell, write what the shell and others want sent, bound what waits,
end the stream with the right gRPC status, clean up exactly once), and three copies of them
drifted apart. The protocol objects stay synchronous and I/O-free
(docs/architecture.md#logic-without-io); this module is the asyncio shell around them.

A pump runs two coroutines on the event loop:
- the reader awaits `read()` and hands each message to `handle(msg)`, which returns the
  replies to send (or an awaitable of them); they go to the outbox, waiting while it is full,
  so a peer that does not read stops being read (HTTP/2 flow control pushes back);
- the writer takes the outbox's messages in order and awaits `write(msg)` for each.

The stream ends when the peer closes its side (EOF), the handler raises `SyncError` (status
`grpc_status_name`) or `StreamRefused` (its code), `read`/`write` fail (the peer went away),
someone calls `outbox.end(...)` (unlisted, taken over, stopping), or the task running the
pump is cancelled. `on_close(end)` then runs exactly once and `pump` returns the `StreamEnd`;
applying it (abort a server call, cancel a client call) is the caller's part.
"""

from __future__ import annotations

import asyncio
import collections
import inspect
import logging
import threading
from dataclasses import dataclass
from typing import Any, Awaitable, Callable, Generic, Iterable, Optional, Sequence, TypeVar, Union

import grpc

from shardsieve.limits import LIMIT_METADATA_KEY
from shardsieve.sync.errors import SyncError

log = logging.getLogger("shardsieve.stream")

In = TypeVar("In")
Out = TypeVar("Out")

DEFAULT_OUTBOX_LIMIT = 64


@dataclass(frozen=True)
class StreamEnd:
    """How a stream ended: a gRPC status code and its detail."""

    code: grpc.StatusCode
    details: str = ""
    limit: str = ""      # the setting a refusal for size broke (LimitExceeded.setting), sent as metadata

    @property
    def ok(self) -> bool:
        return self.code == grpc.StatusCode.OK

    @classmethod
    def of_sync_error(cls, exc: SyncError) -> StreamEnd:
        """A protocol error ends the stream with the status the error names (shardsieve/sync/errors.py)."""
        code = getattr(grpc.StatusCode, exc.grpc_status_name, grpc.StatusCode.FAILED_PRECONDITION)
        return cls(code, str(exc), getattr(exc, "setting", ""))

    @classmethod
    def of_rpc_error(cls, exc: BaseException) -> StreamEnd:
        """The status of a failed call (a peer that went away reads as UNAVAILABLE or CANCELLED)."""
        code = exc.code() if isinstance(exc, grpc.RpcError) and callable(getattr(exc, "code", None)) else None
        if not isinstance(code, grpc.StatusCode):
            return cls(grpc.StatusCode.UNAVAILABLE, f"{type(exc).__name__}: {exc}")
        details = exc.details() if callable(getattr(exc, "details", None)) else str(exc)  # type: ignore[union-attr]
        return cls(code, details or "", _limit_of(exc))

    def describe(self) -> str:
        return f"{self.code.name}: {self.details}" if self.details else self.code.name


def _limit_of(exc: BaseException) -> str:
    """The setting a refused stream broke, from the coordinator's trailing metadata ("" if none)."""
    trailing = getattr(exc, "trailing_metadata", None)
    try:
        metadata = trailing() if callable(trailing) else ()
    except Exception:  # noqa: BLE001 - no metadata on this error: nothing structured to read
        return ""
    for key, value in metadata or ():
        if key == LIMIT_METADATA_KEY:
            return value if isinstance(value, str) else value.decode("ascii", "replace")
    return ""


PEER_CLOSED = StreamEnd(grpc.StatusCode.OK, "the peer closed its side of the stream")
STOPPING = StreamEnd(grpc.StatusCode.OK, "this process is stopping")


class StreamRefused(Exception):
    """Raised by a handler to end its stream with a status (a refused Hello, a broken limit)."""

    def __init__(self, code: grpc.StatusCode, details: str) -> None:
        super().__init__(details)
        self.end = StreamEnd(code, details)


class Outbox(Generic[Out]):
    """What waits to be written on one stream, in order, with a bound.

    `put` (the reader's replies) waits while `limit` messages are queued. `send` never waits and
    may be called from any thread (the node's sync steps run in a worker thread): out-of-band
    senders bound themselves, the node's NodeSync by `room()`, the coordinator's rebuild
    requests by being one per rebuild. `end` may also be called from any thread.
    """

    def __init__(self, limit: int = DEFAULT_OUTBOX_LIMIT) -> None:
        if limit < 1:
            raise ValueError("an outbox needs room for at least one message")
        self.limit = limit
        self._items: collections.deque[Out] = collections.deque()
        self._lock = threading.Lock()        # `send` and `end` may come from worker threads
        self._end: StreamEnd | None = None
        self._end_now = False
        self._loop: asyncio.AbstractEventLoop | None = None
        self._thread: int | None = None
        self._ready: asyncio.Event | None = None     # something to write, or the end
        self._space: asyncio.Event | None = None     # below the limit again

    def bind(self, loop: asyncio.AbstractEventLoop) -> None:
        """Attach to the event loop that runs the pump (the pump does this)."""
        self._loop = loop
        self._thread = threading.get_ident()
        self._ready = asyncio.Event()
        self._space = asyncio.Event()
        self._space.set()
        with self._lock:
            if self._items or self._end is not None:
                self._ready.set()

    # -- any thread --------------------------------------------------------------------------------
    def __len__(self) -> int:
        return len(self._items)

    def room(self) -> int:
        """Messages that fit before the bound (0: full)."""
        return max(0, self.limit - len(self._items))

    @property
    def ended(self) -> StreamEnd | None:
        return self._end

    def send(self, messages: Iterable[Out]) -> None:
        """Queue messages in order without waiting (dropped once the stream ended)."""
        with self._lock:
            if self._end is not None:
                return
            self._items.extend(messages)
        self._wake()

    def end(self, end: StreamEnd, *, now: bool = False) -> None:
        """End the stream with `end` once what is queued is written (now: drop it and end at
        once). The first end wins."""
        with self._lock:
            if self._end is not None:
                return
            self._end = end
            self._end_now = now
            if now:
                self._items.clear()
        self._wake()

    def _wake(self) -> None:
        loop = self._loop
        if loop is None or self._ready is None:
            return
        if threading.get_ident() == self._thread:
            self._ready.set()
        else:
            try:
                loop.call_soon_threadsafe(self._ready.set)
            except RuntimeError:      # the loop is closed: nobody is left to write
                pass

    # -- the loop ----------------------------------------------------------------------------------
    async def put(self, messages: Sequence[Out]) -> None:
        """Queue messages, first waiting while the outbox is full (back-pressure)."""
        assert self._space is not None, "bind() first"
        while len(self._items) >= self.limit and self._end is None:
            self._space.clear()
            await self._space.wait()
        self.send(messages)

    async def next(self) -> Out | StreamEnd:
        """The next message to write, or the StreamEnd once everything before it was taken."""
        assert self._ready is not None and self._space is not None, "bind() first"
        while True:
            with self._lock:
                if self._end is not None and (self._end_now or not self._items):
                    return self._end
                if self._items:
                    item = self._items.popleft()
                    if len(self._items) < self.limit:
                        self._space.set()
                    return item
                self._ready.clear()
            await self._ready.wait()


# a handler returns the replies to send, or an awaitable of them (None: nothing to send)
Handler = Callable[[In], Union[Sequence[Out], Awaitable[Optional[Sequence[Out]]], None]]


async def pump(*, read: Callable[[], Awaitable[Any]], write: Callable[[Out], Awaitable[None]],
               handle: Handler[In, Out], outbox: Outbox[Out],
               on_close: Callable[[StreamEnd], None] | None = None, name: str = "") -> StreamEnd:
    """Run one stream until it ends (module docstring); returns how it ended.

    `read()` returns the next message or `grpc.aio.EOF`; `write(msg)` sends one. `on_close`
    runs exactly once, also when the task running the pump is cancelled (it must not block).
    """
    outbox.bind(asyncio.get_running_loop())
    reader = asyncio.create_task(_read_loop(read, handle, outbox, name), name=f"{name or 'stream'}-reader")
    end: StreamEnd = STOPPING
    try:
        while True:
            item = await outbox.next()
            if isinstance(item, StreamEnd):
                end = item
                break
            try:
                await write(item)
            except (grpc.RpcError, asyncio.InvalidStateError, grpc.aio.UsageError) as exc:   # the peer went away
                end = _first_end(outbox, StreamEnd.of_rpc_error(exc)
                                 if isinstance(exc, grpc.RpcError) else
                                 StreamEnd(grpc.StatusCode.CANCELLED, "the call ended while writing"))
                break
    except asyncio.CancelledError:
        end = _first_end(outbox, StreamEnd(grpc.StatusCode.CANCELLED, "the stream was cancelled"))
        raise
    finally:
        reader.cancel()
        try:
            await asyncio.shield(_settle(reader))
        except asyncio.CancelledError:
            pass
        if on_close is not None:
            try:
                on_close(end)
            except Exception:  # noqa: BLE001 - a cleanup bug must not hide how the stream ended
                log.exception("closing a sync stream failed", extra={"stream": name})
    return end


def _first_end(outbox: Outbox[Any], fallback: StreamEnd) -> StreamEnd:
    """An end already decided (e.g. by the reader) wins over how the writer noticed it."""
    outbox.end(fallback, now=True)
    return outbox.ended or fallback


async def _settle(task: asyncio.Task[Any]) -> None:
    try:
        await task
    except BaseException:  # noqa: BLE001 - the reader's outcome already went to the outbox
        pass


async def _read_loop(read: Callable[[], Awaitable[Any]], handle: Handler[In, Out], outbox: Outbox[Out],
                     name: str) -> None:
    try:
        while outbox.ended is None:
            msg = await read()
            if msg is grpc.aio.EOF:
                outbox.end(PEER_CLOSED)
                return
            replies = handle(msg)
            if inspect.isawaitable(replies):
                replies = await replies
            if replies:
                await outbox.put(list(replies))
    except SyncError as exc:
        outbox.end(StreamEnd.of_sync_error(exc))
    except StreamRefused as exc:
        outbox.end(exc.end)
    except grpc.RpcError as exc:           # the peer went away, or ended the call with a status
        outbox.end(StreamEnd.of_rpc_error(exc), now=True)
    except (asyncio.InvalidStateError, grpc.aio.UsageError):
        outbox.end(StreamEnd(grpc.StatusCode.CANCELLED, "the call ended while reading"), now=True)
    except asyncio.CancelledError:
        raise
    except Exception as exc:  # noqa: BLE001 - end this stream with the error, keep serving others
        log.exception("sync stream handler failed", extra={"stream": name})
        outbox.end(StreamEnd(grpc.StatusCode.INTERNAL, f"{type(exc).__name__}: {exc}"))
