"""The one stream pump (shardsieve/stream_pump.py), driven by scripted reads and writes.

What it must do (its module docstring): write the handler's replies in order; end with OK when
the peer closes its side, with the status a SyncError names (shardsieve/sync/errors.py) or a
StreamRefused carries, or with the status of a failed call; drop what is queued when ended
"now"; stop reading while the outbox is full; run the close callback exactly once however the
stream ends (common practice for cleanup hooks). Status codes and their meaning: gRPC's
doc/statuscodes.md.
"""

from __future__ import annotations

import asyncio
import threading
from typing import Any

import grpc
import pytest

from shardsieve.stream_pump import Outbox, StreamEnd, StreamRefused, pump
from shardsieve.sync.errors import MalformedMessage


class Peer:
    """Scripted reads (then EOF, or a wait that never ends), recorded writes."""

    def __init__(self, inbound: list[Any], *, hang: bool = False, block_writes: bool = False) -> None:
        self.inbound = list(inbound)
        self.hang = hang
        self.reads = 0
        self.written: list[Any] = []
        self.writes_open = asyncio.Event()
        if not block_writes:
            self.writes_open.set()

    async def read(self) -> Any:
        if self.inbound:
            self.reads += 1
            item = self.inbound.pop(0)
            if isinstance(item, BaseException):
                raise item
            return item
        if self.hang:
            await asyncio.Event().wait()
        return grpc.aio.EOF

    async def write(self, msg: Any) -> None:
        await self.writes_open.wait()
        self.written.append(msg)


class Closes:
    def __init__(self) -> None:
        self.ends: list[StreamEnd] = []

    def __call__(self, end: StreamEnd) -> None:
        self.ends.append(end)


class FailedCall(grpc.RpcError):
    def code(self) -> grpc.StatusCode:
        return grpc.StatusCode.UNAVAILABLE

    def details(self) -> str:
        return "the peer went away"


def run(coro: Any) -> Any:
    return asyncio.run(coro)


def test_replies_are_written_in_order_and_eof_ends_ok_once() -> None:
    async def main() -> tuple[StreamEnd, Peer, Closes]:
        peer, closes = Peer(["a", "b", "c"]), Closes()
        end = await pump(read=peer.read, write=peer.write, handle=lambda m: [m + "1", m + "2"], outbox=Outbox(),
                         on_close=closes)
        return end, peer, closes
    end, peer, closes = run(main())
    assert end.ok and peer.written == ["a1", "a2", "b1", "b2", "c1", "c2"]
    assert closes.ends == [end]


def test_a_sync_error_ends_with_its_status_after_the_replies_before_it() -> None:
    def handle(msg: str) -> list[str]:
        if msg == "bad":
            raise MalformedMessage("a message with no body")
        return [f"ack {msg}"]

    async def main() -> tuple[StreamEnd, Peer, Closes]:
        peer, closes = Peer(["x", "bad", "never read"], hang=True), Closes()
        end = await pump(read=peer.read, write=peer.write, handle=handle, outbox=Outbox(), on_close=closes)
        return end, peer, closes
    end, peer, closes = run(main())
    assert end.code == getattr(grpc.StatusCode, MalformedMessage("").grpc_status_name)
    assert "no body" in end.details and peer.written == ["ack x"] and peer.reads == 2
    assert closes.ends == [end]


def test_a_refusal_and_an_async_handler() -> None:
    async def handle(msg: str) -> list[str]:
        await asyncio.sleep(0)
        if msg == "intruder":
            raise StreamRefused(grpc.StatusCode.PERMISSION_DENIED, "not this node's token")
        return [msg.upper()]

    async def main() -> tuple[StreamEnd, Peer]:
        peer = Peer(["hello", "intruder"], hang=True)
        return await pump(read=peer.read, write=peer.write, handle=handle, outbox=Outbox()), peer
    end, peer = run(main())
    assert (end.code, end.details, peer.written) == (grpc.StatusCode.PERMISSION_DENIED, "not this node's token",
                                                     ["HELLO"])


def test_a_failed_read_ends_with_the_call_status() -> None:
    async def main() -> tuple[StreamEnd, Closes]:
        peer, closes = Peer(["x", FailedCall()]), Closes()
        end = await pump(read=peer.read, write=peer.write, handle=lambda m: [], outbox=Outbox(), on_close=closes)
        return end, closes
    end, closes = run(main())
    assert (end.code, end.details) == (grpc.StatusCode.UNAVAILABLE, "the peer went away") and closes.ends == [end]


def test_ending_from_another_thread_drops_what_is_queued() -> None:
    async def main() -> tuple[StreamEnd, Peer, Closes]:
        peer, closes = Peer([], hang=True, block_writes=True), Closes()
        outbox: Outbox[str] = Outbox()
        task = asyncio.ensure_future(pump(read=peer.read, write=peer.write, handle=lambda m: [], outbox=outbox,
                                          on_close=closes))
        await asyncio.sleep(0)
        outbox.send(["queued-1", "queued-2", "queued-3"])
        while len(outbox) != 2:                                     # the writer took the first, blocks on it
            await asyncio.sleep(0)
        ender = threading.Thread(target=outbox.end, args=(StreamEnd(grpc.StatusCode.ABORTED, "taken over"),),
                                 kwargs={"now": True})
        ender.start()
        ender.join()
        peer.writes_open.set()
        return await asyncio.wait_for(task, 10), peer, closes
    end, peer, closes = run(main())
    assert (end.code, end.details) == (grpc.StatusCode.ABORTED, "taken over")
    assert peer.written == ["queued-1"]                             # taken before the end; the rest dropped
    assert closes.ends == [end]


def test_a_full_outbox_stops_reading() -> None:
    """Back-pressure: with room for 2 and a writer that cannot write, the reader stops once the
    outbox is full: one reply in the writer's hands, 2 queued, one waiting in the reader's
    hands: 4 messages read, not 10."""
    async def main() -> tuple[Peer, int]:
        peer = Peer([f"m{i}" for i in range(10)], hang=True, block_writes=True)
        outbox: Outbox[str] = Outbox(limit=2)
        task = asyncio.ensure_future(pump(read=peer.read, write=peer.write, handle=lambda m: [m],
                                          outbox=outbox))
        while len(outbox) < 2:                     # the outbox fills up
            await asyncio.sleep(0)
        for _ in range(20):                        # and stays full: the reader does not go on
            await asyncio.sleep(0)
        reads_while_blocked = peer.reads
        peer.writes_open.set()
        while len(peer.written) < 10:
            await asyncio.sleep(0)
        outbox.end(StreamEnd(grpc.StatusCode.OK, "done"))
        await asyncio.wait_for(task, 10)
        return peer, reads_while_blocked
    peer, reads_while_blocked = run(main())
    assert reads_while_blocked == 4
    assert peer.reads == 10 and peer.written == [f"m{i}" for i in range(10)]   # everything, in order, once writes flowed


def test_cancelling_the_pump_closes_once() -> None:
    async def main() -> Closes:
        peer, closes = Peer([], hang=True), Closes()
        task = asyncio.ensure_future(pump(read=peer.read, write=peer.write, handle=lambda m: [], outbox=Outbox(),
                                          on_close=closes))
        await asyncio.sleep(0)
        task.cancel()
        with pytest.raises(asyncio.CancelledError):
            await task
        return closes
    closes = run(main())
    assert [e.code for e in closes.ends] == [grpc.StatusCode.CANCELLED]


def test_an_outbox_has_room_for_at_least_one_message() -> None:
    with pytest.raises(ValueError):
        Outbox(limit=0)
