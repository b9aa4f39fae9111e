"""NodeStorage gRPC servicer on grpc.aio: a thin adapter from wire messages to NodeCore calls.

All validation lives in NodeCore (so in-process writers get the same checks); this module
only maps InvalidInput to INVALID_ARGUMENT, a not-yet-loaded node to UNAVAILABLE and store
failures to INTERNAL, each with the core's message (an agent's store that does not answer,
StoreUnavailable, is UNAVAILABLE; a key or value it cannot hold, StoreRefused, INVALID_ARGUMENT). Nothing here blocks the event loop:
writes are checked on the loop and committed by the writer thread (node/writer.py); reads,
scans and stats (which take the node lock a commit holds during its fsync) run on the read
threads (`readers`).
"""

from __future__ import annotations

import asyncio
import logging
from concurrent.futures import Executor
from typing import Awaitable, Callable, TypeVar

import grpc

from shardsieve.node.core import InvalidInput, NodeCore, NotReady, WriteResult
from shardsieve.node.store import StoreError, StoreRefused, StoreUnavailable
from shardsieve.node.writer import GroupWriter
from shardsieve.v1 import storage_pb2, storage_pb2_grpc

log = logging.getLogger("shardsieve.node.service")
R = TypeVar("R")

SCAN_DEFAULT = 1000
SCAN_MAX = 10_000


def _ack(result: WriteResult) -> storage_pb2.WriteAck:
    ack = storage_pb2.WriteAck(created=result.created, epoch=result.epoch, sequence=result.sequence)
    if result.old_position is not None:
        ack.old_position.epoch, ack.old_position.sequence = result.old_position
    return ack


class NodeStorageService(storage_pb2_grpc.NodeStorageServicer):
    """Serves put/get/delete (single and batched), stats and key scans from one NodeCore."""

    def __init__(self, core: NodeCore, writer: GroupWriter | None, readers: Executor | None = None) -> None:
        self.core = core
        self.writer = writer
        self.readers = readers

    async def _call(self, context: grpc.aio.ServicerContext, fn: Callable[[], Awaitable[R]]) -> R:
        try:
            return await fn()
        except InvalidInput as exc:
            await context.abort(grpc.StatusCode.INVALID_ARGUMENT, str(exc))
        except (NotReady, StoreUnavailable) as exc:
            await context.abort(grpc.StatusCode.UNAVAILABLE, str(exc))
        except StoreRefused as exc:
            await context.abort(grpc.StatusCode.INVALID_ARGUMENT, str(exc))
        except StoreError as exc:
            log.error("store failure", extra={"error": str(exc)})
            await context.abort(grpc.StatusCode.INTERNAL, str(exc))
        raise AssertionError("unreachable")  # context.abort raises

    async def _read(self, fn: Callable[..., R], *args: object) -> R:
        return await asyncio.get_running_loop().run_in_executor(self.readers, fn, *args)

    # The three paths an agent replaces (node/agent_service.py) ----------------------------------
    async def _put(self, items: list[tuple[bytes, bytes]]) -> list[WriteResult]:
        assert self.writer is not None
        return await self.writer.write("put", self.core.check_put(items))

    async def _delete(self, keys: list[bytes]) -> list[WriteResult]:
        assert self.writer is not None
        return await self.writer.write("delete", self.core.check_delete(keys))

    async def _get(self, keys: list[bytes]) -> list[bytes | None]:
        return await self._read(self.core.get_many, keys)

    async def Put(self, request: storage_pb2.PutRequest, context: grpc.aio.ServicerContext) -> storage_pb2.WriteAck:
        async def run() -> storage_pb2.WriteAck:
            return _ack((await self._put([(request.key, request.value)]))[0])
        return await self._call(context, run)

    async def Get(self, request: storage_pb2.GetRequest, context: grpc.aio.ServicerContext) -> storage_pb2.GetReply:
        async def run() -> storage_pb2.GetReply:
            value = (await self._get([request.key]))[0]
            return storage_pb2.GetReply(found=value is not None, value=value or b"")
        return await self._call(context, run)

    async def Delete(self, request: storage_pb2.DeleteRequest,
                     context: grpc.aio.ServicerContext) -> storage_pb2.WriteAck:
        async def run() -> storage_pb2.WriteAck:
            return _ack((await self._delete([request.key]))[0])
        return await self._call(context, run)

    async def BatchPut(self, request: storage_pb2.BatchPutRequest,
                       context: grpc.aio.ServicerContext) -> storage_pb2.BatchWriteAck:
        async def run() -> storage_pb2.BatchWriteAck:
            results = await self._put([(item.key, item.value) for item in request.items])
            return storage_pb2.BatchWriteAck(acks=[_ack(r) for r in results])
        return await self._call(context, run)

    async def BatchGet(self, request: storage_pb2.BatchGetRequest,
                       context: grpc.aio.ServicerContext) -> storage_pb2.BatchGetReply:
        async def run() -> storage_pb2.BatchGetReply:
            values = await self._get(list(request.keys))
            return storage_pb2.BatchGetReply(items=[
                storage_pb2.GetReply(found=v is not None, value=v or b"") for v in values])
        return await self._call(context, run)

    async def BatchDelete(self, request: storage_pb2.BatchDeleteRequest,
                          context: grpc.aio.ServicerContext) -> storage_pb2.BatchWriteAck:
        async def run() -> storage_pb2.BatchWriteAck:
            results = await self._delete(list(request.keys))
            return storage_pb2.BatchWriteAck(acks=[_ack(r) for r in results])
        return await self._call(context, run)

    async def Stats(self, request: storage_pb2.NodeStatsRequest,
                    context: grpc.aio.ServicerContext) -> storage_pb2.NodeStatsReply:
        async def run() -> storage_pb2.NodeStatsReply:
            stats = await self._read(self.core.stats_proto)
            return storage_pb2.NodeStatsReply(node_id=self.core.node_id, stats=stats)
        return await self._call(context, run)

    async def ScanKeys(self, request: storage_pb2.ScanKeysRequest,
                       context: grpc.aio.ServicerContext) -> storage_pb2.ScanKeysReply:
        async def run() -> storage_pb2.ScanKeysReply:
            limit = request.limit or SCAN_DEFAULT
            if limit > SCAN_MAX:
                raise InvalidInput(f"scan limit {limit} is above the maximum of {SCAN_MAX} keys per call")
            keys = await self._read(self.core.scan_keys, request.after if request.after else None, limit + 1)
            done = len(keys) <= limit
            return storage_pb2.ScanKeysReply(keys=keys[:limit], done=done)
        return await self._call(context, run)
