"""NodeStorage gRPC servicer: a thin adapter from wire messages to NodeCore calls.

All validation lives in NodeCore (so in-process writers get the same checks); this module
only maps InvalidInput to INVALID_ARGUMENT, a not-yet-loaded node to UNAVAILABLE and store
failures to INTERNAL, each with the core's message.
"""

from __future__ import annotations

import logging
from typing import Callable, TypeVar

import grpc

from shardsieve.node.core import InvalidInput, NodeCore, NotReady, WriteResult
from shardsieve.node.store import StoreError
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

    def __init__(self, core: NodeCore) -> None:
        self.core = core

    def _call(self, context: grpc.ServicerContext, fn: Callable[[], R]) -> R:
        try:
            return fn()
        except InvalidInput as exc:
            context.abort(grpc.StatusCode.INVALID_ARGUMENT, str(exc))
        except NotReady as exc:
            context.abort(grpc.StatusCode.UNAVAILABLE, str(exc))
        except StoreError as exc:
            log.error("store failure", extra={"error": str(exc)})
            context.abort(grpc.StatusCode.INTERNAL, str(exc))
        raise AssertionError("unreachable")  # context.abort raises

    def Put(self, request: storage_pb2.PutRequest, context: grpc.ServicerContext) -> storage_pb2.WriteAck:
        return self._call(context, lambda: _ack(self.core.put_many([(request.key, request.value)])[0]))

    def Get(self, request: storage_pb2.GetRequest, context: grpc.ServicerContext) -> storage_pb2.GetReply:
        def run() -> storage_pb2.GetReply:
            value = self.core.get_many([request.key])[0]
            return storage_pb2.GetReply(found=value is not None, value=value or b"")
        return self._call(context, run)

    def Delete(self, request: storage_pb2.DeleteRequest, context: grpc.ServicerContext) -> storage_pb2.WriteAck:
        return self._call(context, lambda: _ack(self.core.delete_many([request.key])[0]))

    def BatchPut(self, request: storage_pb2.BatchPutRequest, context: grpc.ServicerContext) -> storage_pb2.BatchWriteAck:
        def run() -> storage_pb2.BatchWriteAck:
            results = self.core.put_many([(item.key, item.value) for item in request.items])
            return storage_pb2.BatchWriteAck(acks=[_ack(r) for r in results])
        return self._call(context, run)

    def BatchGet(self, request: storage_pb2.BatchGetRequest, context: grpc.ServicerContext) -> storage_pb2.BatchGetReply:
        def run() -> storage_pb2.BatchGetReply:
            values = self.core.get_many(list(request.keys))
            return storage_pb2.BatchGetReply(items=[
                storage_pb2.GetReply(found=v is not None, value=v or b"") for v in values])
        return self._call(context, run)

    def BatchDelete(self, request: storage_pb2.BatchDeleteRequest,
                    context: grpc.ServicerContext) -> storage_pb2.BatchWriteAck:
        def run() -> storage_pb2.BatchWriteAck:
            results = self.core.delete_many(list(request.keys))
            return storage_pb2.BatchWriteAck(acks=[_ack(r) for r in results])
        return self._call(context, run)

    def Stats(self, request: storage_pb2.NodeStatsRequest, context: grpc.ServicerContext) -> storage_pb2.NodeStatsReply:
        return self._call(context, lambda: storage_pb2.NodeStatsReply(
            node_id=self.core.node_id, stats=self.core.stats_proto()))

    def ScanKeys(self, request: storage_pb2.ScanKeysRequest, context: grpc.ServicerContext) -> storage_pb2.ScanKeysReply:
        def run() -> storage_pb2.ScanKeysReply:
            limit = request.limit or SCAN_DEFAULT
            if limit > SCAN_MAX:
                raise InvalidInput(f"scan limit {limit} is above the maximum of {SCAN_MAX} keys per call")
            keys = self.core.scan_keys(request.after if request.after else None, limit + 1)
            done = len(keys) <= limit
            return storage_pb2.ScanKeysReply(keys=keys[:limit], done=done)
        return self._call(context, run)
