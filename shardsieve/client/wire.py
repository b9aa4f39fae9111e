"""The client's two transports share this: the Router methods it calls, replies turned into
results, direct node probes turned into results, and argument checks. No I/O."""

from __future__ import annotations

from typing import Any, Sequence

import grpc

from shardsieve import error_detail as ed
from shardsieve.client.errors import CandidateUnavailable, InvalidInput, from_key_error
from shardsieve.client.policy import DELETE, READ, WRITE
from shardsieve.client.results import LOCAL, Candidate, DeleteResult, ReadResult, WriteResult
from shardsieve.v1 import routing_pb2, storage_pb2

ROUTER = "/shardsieve.v1.Router/"
ADMIN = "/shardsieve.v1.Admin/"

# name -> (request class, reply class, kind for the retry policy)
ROUTER_METHODS: dict[str, tuple[type, type, str]] = {
    "Locate": (routing_pb2.LocateRequest, routing_pb2.LocateReply, READ),
    "LocateBatch": (routing_pb2.LocateBatchRequest, routing_pb2.LocateBatchReply, READ),
    "Read": (routing_pb2.ReadRequest, routing_pb2.ReadReply, READ),
    "ReadBatch": (routing_pb2.ReadBatchRequest, routing_pb2.ReadBatchReply, READ),
    "Write": (routing_pb2.WriteRequest, routing_pb2.WriteReply, WRITE),
    "WriteBatch": (routing_pb2.WriteBatchRequest, routing_pb2.WriteBatchReply, WRITE),
    "Remove": (routing_pb2.RemoveRequest, routing_pb2.RemoveReply, DELETE),
    "RemoveBatch": (routing_pb2.RemoveBatchRequest, routing_pb2.RemoveBatchReply, DELETE),
}

# Node batch calls carry at most this many keys (the nodes' default max-batch, node/settings.py).
NODE_BATCH = 1000

CHANNEL_OPTIONS = [
    ("grpc.max_receive_message_length", 64 << 20),
    # reconnect soon after a restart (gRPC's default backoff grows to minutes)
    ("grpc.initial_reconnect_backoff_ms", 100),
    ("grpc.min_reconnect_backoff_ms", 100),
    ("grpc.max_reconnect_backoff_ms", 1000),
]


def check_key(key: bytes, what: str = "key") -> bytes:
    if not isinstance(key, (bytes, bytearray, memoryview)):
        raise InvalidInput(f"{what} must be bytes, got {type(key).__name__}")
    if not key:
        raise InvalidInput(f"{what} must not be empty")
    return bytes(key)


def check_keys(keys: Sequence[bytes]) -> list[bytes]:
    if isinstance(keys, (bytes, str)):
        raise InvalidInput("give a sequence of keys, not one key")
    return [check_key(k, f"key #{i}") for i, k in enumerate(keys)]


def read_result(key: bytes, reply: routing_pb2.ReadReply | routing_pb2.ReadResult, coordinator: str) -> ReadResult:
    if isinstance(reply, routing_pb2.ReadResult) and reply.HasField("error"):
        return ReadResult(key, False, candidates=reply.candidates, error=from_key_error(reply.error, coordinator, key))
    return ReadResult(key, reply.found, reply.value if reply.found else None, reply.node_id or None,
                      reply.candidates, reply.wasted_probes)


def write_result(key: bytes, reply: routing_pb2.WriteReply) -> WriteResult:
    return WriteResult(key, reply.node_id, reply.created, reply.epoch, reply.sequence, tuple(reply.moved_from))


def write_results(items: Sequence[routing_pb2.WriteRequest], reply: routing_pb2.WriteBatchReply,
                  coordinator: str) -> list[WriteResult]:
    out = []
    for item, r in zip(items, reply.results):
        if r.HasField("error"):
            out.append(WriteResult(item.key, error=from_key_error(r.error, coordinator, item.key)))
        else:
            out.append(write_result(item.key, r.reply))
    return out


def delete_results(keys: Sequence[bytes], reply: routing_pb2.RemoveBatchReply, coordinator: str) -> list[DeleteResult]:
    return [DeleteResult(k, error=from_key_error(r.error, coordinator, k)) if r.HasField("error")
            else DeleteResult(k, tuple(r.node_ids)) for k, r in zip(keys, reply.results)]


def candidates_of(reply: routing_pb2.LocateReply) -> list[Candidate]:
    return [Candidate(c.node_id, c.address, c.stale, c.hinted) for c in reply.candidates]


def write_items(items: Sequence[Any]) -> list[routing_pb2.WriteRequest]:
    """put_many items: (key, value) pairs, or (key, value, node_id[, move]) tuples."""
    out = []
    for i, item in enumerate(items):
        if not isinstance(item, (tuple, list)) or not 2 <= len(item) <= 4:
            raise InvalidInput(f"item #{i} must be (key, value[, node_id[, move]])")
        key, value = check_key(item[0], f"key #{i}"), item[1]
        if not isinstance(value, (bytes, bytearray, memoryview)):
            raise InvalidInput(f"value #{i} must be bytes, got {type(value).__name__}")
        node_id = item[2] if len(item) > 2 else ""
        move = bool(item[3]) if len(item) > 3 else False
        if move and not node_id:
            raise InvalidInput(f"item #{i}: move needs a node id to move the key to")
        out.append(routing_pb2.WriteRequest(key=key, value=bytes(value), node_id=node_id or "", move=move))
    return out


# -- direct probes (local routing) -------------------------------------------------------------------
class ProbeFailure:
    """A node call that failed (for CandidateUnavailable's detail)."""

    __slots__ = ("node_id", "address", "code", "details")

    def __init__(self, node_id: str, address: str, exc: grpc.RpcError) -> None:
        self.node_id = node_id
        self.address = address
        self.code = exc.code() if hasattr(exc, "code") else grpc.StatusCode.UNKNOWN
        self.details = (exc.details() if hasattr(exc, "details") else "") or ""


def unreachable(key: bytes, failed: Sequence[ProbeFailure]) -> CandidateUnavailable:
    """The same exception (and ErrorDetail) a coordinator's read sends when a candidate could
    not be asked, built here for a direct probe."""
    names = "; ".join(f"{f.node_id}: {f.code.name} {f.details}".strip() for f in failed)
    detail = ed.detail(ed.CANDIDATE_UNAVAILABLE, key=key,
                       nodes=[ed.node_failure(f.node_id, f.address, f.code, f.details) for f in failed])
    return CandidateUnavailable(f"read of key {key[:64]!r} incomplete: candidate node(s) could not be asked "
                                f"({names}); retry once they are reachable", code=grpc.StatusCode.UNAVAILABLE,
                                detail=detail)


def local_read(key: bytes, cands: Sequence[Candidate],
               answers: Sequence[storage_pb2.GetReply | ProbeFailure]) -> ReadResult:
    """A locally routed read from each candidate's answer (in candidate order)."""
    failed = [a for a in answers if isinstance(a, ProbeFailure)]
    wasted = 0
    for c, a in zip(cands, answers):
        if isinstance(a, ProbeFailure):
            continue
        if a.found:
            return ReadResult(key, True, a.value, c.node_id, len(cands), wasted, LOCAL)
        wasted += 1
    if failed:
        raise unreachable(key, failed)
    return ReadResult(key, False, None, None, len(cands), wasted, LOCAL)


def group_by_node(rows: Sequence[Sequence[Candidate]]) -> dict[str, tuple[str, list[int]]]:
    """node id -> (address, indices of the keys it is a candidate of)."""
    plan: dict[str, tuple[str, list[int]]] = {}
    for i, cands in enumerate(rows):
        for c in cands:
            plan.setdefault(c.node_id, (c.address, []))[1].append(i)
    return plan


def local_reads(keys: Sequence[bytes], rows: Sequence[Sequence[Candidate]],
                answers: dict[str, dict[int, storage_pb2.GetReply | ProbeFailure]]) -> list[ReadResult]:
    """Per-key results of a locally routed batch from each node's answers by key index."""
    out = []
    for i, (key, cands) in enumerate(zip(keys, rows)):
        try:
            out.append(local_read(key, cands, [answers[c.node_id][i] for c in cands]))
        except CandidateUnavailable as exc:
            out.append(ReadResult(key, False, candidates=len(cands), route=LOCAL, error=exc))
    return out
