"""Machine-readable error details of the Router service, shared by the coordinator and clients.

A Router error carries an `ErrorDetail` (proto/shardsieve/v1/routing.proto) in the trailing
metadata entry `ERROR_DETAIL_KEY`; binary metadata keys end in "-bin" (gRPC over HTTP/2,
"Custom-Metadata"). Clients decide what failed from these fields (which node could not be
asked, for which key, which setting a refusal names, whether a write changed anything), never
from the text of the status message, which is for people.
"""

from __future__ import annotations

from typing import Iterable, Sequence

import grpc

from shardsieve.v1 import routing_pb2

ERROR_DETAIL_KEY = "shardsieve-error-bin"

Reason = int   # an ErrorReason value

CANDIDATE_UNAVAILABLE = routing_pb2.ERROR_REASON_CANDIDATE_UNAVAILABLE
NODE_UNAVAILABLE = routing_pb2.ERROR_REASON_NODE_UNAVAILABLE
INVALID_INPUT = routing_pb2.ERROR_REASON_INVALID_INPUT
LIMIT_EXCEEDED = routing_pb2.ERROR_REASON_LIMIT_EXCEEDED
UNKNOWN_NODE = routing_pb2.ERROR_REASON_UNKNOWN_NODE
SECOND_COPY = routing_pb2.ERROR_REASON_SECOND_COPY
NO_NODE = routing_pb2.ERROR_REASON_NO_NODE
MOVE_UNFINISHED = routing_pb2.ERROR_REASON_MOVE_UNFINISHED
HINTS_FULL = routing_pb2.ERROR_REASON_HINTS_FULL

EFFECT_NONE = routing_pb2.WRITE_EFFECT_NONE
EFFECT_PARTIAL = routing_pb2.WRITE_EFFECT_PARTIAL
EFFECT_UNKNOWN = routing_pb2.WRITE_EFFECT_UNKNOWN

# Node failures whose call certainly never reached the node's store: a refused connection,
# an unknown address. Anything else (a deadline, a reset mid-call) may have been applied.
NOT_SENT_CODES = frozenset({grpc.StatusCode.UNAVAILABLE})


def reason_name(reason: int) -> str:
    """'CANDIDATE_UNAVAILABLE', ... for an ErrorReason value."""
    try:
        return routing_pb2.ErrorReason.Name(reason).removeprefix("ERROR_REASON_")
    except ValueError:
        return str(reason)


def node_failure(node_id: str, address: str, code: grpc.StatusCode | None, detail: str) -> routing_pb2.NodeFailure:
    return routing_pb2.NodeFailure(node_id=node_id, address=address,
                                   code=(code or grpc.StatusCode.UNAVAILABLE).value[0], detail=detail)


def detail(reason: Reason, *, key: bytes = b"", nodes: Iterable[routing_pb2.NodeFailure] = (), setting: str = "",
           effect: int = 0, done_on: Sequence[str] = (), holders: Sequence[str] = ()) -> routing_pb2.ErrorDetail:
    return routing_pb2.ErrorDetail(reason=reason, key=key, nodes=list(nodes), setting=setting, effect=effect,
                                   done_on=list(done_on), holders=list(holders))


def trailing(error_detail: routing_pb2.ErrorDetail | None) -> tuple[tuple[str, bytes], ...]:
    """The trailing metadata that carries `error_detail` (empty without one)."""
    if error_detail is None:
        return ()
    return ((ERROR_DETAIL_KEY, error_detail.SerializeToString()),)


def from_metadata(metadata: Iterable[tuple[str, str | bytes]] | None) -> routing_pb2.ErrorDetail | None:
    """The ErrorDetail in a call's trailing metadata, or None when it carries none (the call
    never reached a coordinator, or the peer is not one). A malformed entry is treated as none."""
    for key, value in metadata or ():
        if key == ERROR_DETAIL_KEY and isinstance(value, bytes):
            try:
                return routing_pb2.ErrorDetail.FromString(value)
            except Exception:  # noqa: BLE001 - protobuf raises DecodeError; a bad entry proves nothing
                return None
    return None


def code_of(value: int) -> grpc.StatusCode:
    """The grpc.StatusCode of a numeric code (UNKNOWN for a number gRPC does not define)."""
    for code in grpc.StatusCode:
        if code.value[0] == value:
            return code
    return grpc.StatusCode.UNKNOWN
