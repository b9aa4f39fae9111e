"""The client's exceptions, and how a failed call maps onto them.

Every exception says what is known, decided from structured data only: the gRPC status code
and the coordinator's ErrorDetail (trailing metadata "shardsieve-error-bin", or a batch
result's KeyError; shardsieve/error_detail.py), never from the text of a message.

    ShardsieveError
    ├── InvalidInput            the request is wrong; nothing changed (LimitExceeded: a size limit)
    ├── NotFound                a named thing does not exist (UnknownNode: a node id)
    ├── Refused                 the coordinator declined (SecondCopy: the key lives on another node)
    ├── AuthFailed              token or certificate refused
    ├── Overloaded              a coordinator limit is full (hints, feed subscribers)
    └── Unavailable             something could not be reached
        ├── CoordinatorUnavailable   no coordinator answered (maybe_applied for a write)
        ├── CandidateUnavailable     a node that may hold the key could not be asked
        ├── NodeUnavailable          the node a write went to did not acknowledge it
        ├── MoveUnfinished           a move wrote the new copy, an old one is still there
        └── NoNodeAvailable          no node is connected to place a write on

A key proven absent is not an error: `ReadResult.found` is False (every candidate answered
"not here"). `CandidateUnavailable` is the opposite: absence is NOT proven.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import grpc

from shardsieve import error_detail as ed
from shardsieve.v1 import routing_pb2


@dataclass(frozen=True)
class NodeFailure:
    """A node that could not be asked, and how its call failed."""

    node_id: str
    address: str
    code: grpc.StatusCode
    detail: str

    @classmethod
    def of(cls, msg: routing_pb2.NodeFailure) -> NodeFailure:
        return cls(msg.node_id, msg.address, ed.code_of(msg.code), msg.detail)

    def __str__(self) -> str:
        where = f" at {self.address}" if self.address else ""
        return f"{self.node_id}{where} ({self.code.name})"


class ShardsieveError(Exception):
    """Base of every client error. `code`: the gRPC status (None when no call was made);
    `detail`: the coordinator's ErrorDetail (None when it sent none); `coordinator`: the address
    that answered, if any; `key`: the key concerned, if known."""

    retryable = False

    def __init__(self, message: str, *, code: grpc.StatusCode | None = None,
                 detail: routing_pb2.ErrorDetail | None = None, coordinator: str = "", key: bytes | None = None) -> None:
        super().__init__(" ".join(message.split()))
        self.message = " ".join(message.split())
        self.code = code
        self.detail = detail
        self.coordinator = coordinator
        self.key = key if key is not None else (detail.key if detail is not None and detail.key else None)

    @property
    def effect(self) -> int:
        """WriteEffect of a failed write (WRITE_EFFECT_UNSPECIFIED when unknown or not a write)."""
        return self.detail.effect if self.detail is not None else 0

    @property
    def nothing_applied(self) -> bool:
        """The coordinator states nothing reached any node's store: repeating cannot apply twice."""
        return self.effect == ed.EFFECT_NONE


class InvalidInput(ShardsieveError):
    """INVALID_ARGUMENT / OUT_OF_RANGE: fix the request; retrying it unchanged fails the same way."""


class LimitExceeded(InvalidInput):
    """A size limit: `setting` names it (max-key-bytes, max-value-bytes, max-batch-items, ...)."""

    @property
    def setting(self) -> str:
        return self.detail.setting if self.detail is not None else ""


class NotFound(ShardsieveError):
    """NOT_FOUND: something named in the request does not exist (not a missing key: see ReadResult)."""


class UnknownNode(NotFound):
    """A write named a node id the coordinator does not know."""


class Refused(ShardsieveError):
    """FAILED_PRECONDITION: the coordinator declined the request in the state it is in."""


class SecondCopy(Refused):
    """A write on a named node of a key held elsewhere, without move: `holders` hold it."""

    @property
    def holders(self) -> list[str]:
        return list(self.detail.holders) if self.detail is not None else []


class AuthFailed(ShardsieveError):
    """UNAUTHENTICATED / PERMISSION_DENIED: the token (or certificate) was refused."""


class Overloaded(ShardsieveError):
    """RESOURCE_EXHAUSTED: a coordinator limit is full (read-your-writes hints, feed subscribers)."""

    @property
    def setting(self) -> str:
        return self.detail.setting if self.detail is not None else ""


class Unavailable(ShardsieveError):
    """Something could not be reached; the subclasses say what."""

    retryable = True

    @property
    def nodes(self) -> list[NodeFailure]:
        """The nodes that could not be asked (empty when the coordinator itself failed)."""
        return [NodeFailure.of(n) for n in self.detail.nodes] if self.detail is not None else []

    @property
    def node_ids(self) -> list[str]:
        return [n.node_id for n in self.nodes]


class CoordinatorUnavailable(Unavailable):
    """No coordinator answered. `tried`: the addresses tried; `maybe_applied`: a write was sent
    and its outcome is unknown (read it back before repeating it)."""

    def __init__(self, message: str, *, tried: tuple[str, ...] = (), maybe_applied: bool = False,
                 **kwargs: Any) -> None:
        super().__init__(message, **kwargs)
        self.tried = tried
        self.maybe_applied = maybe_applied


class CandidateUnavailable(Unavailable):
    """A node that may hold the key could not be asked: absence is not proven (a read), or the
    write could not tell where the key lives (nothing was written: `nothing_applied`)."""


class NodeUnavailable(Unavailable):
    """The node a write or delete was sent to did not acknowledge it: it may or may not be applied."""


class MoveUnfinished(Unavailable):
    """A move wrote the new copy (`done_on`) but could not delete an old one (`nodes`): repeat the move."""

    @property
    def done_on(self) -> list[str]:
        return list(self.detail.done_on) if self.detail is not None else []


class NoNodeAvailable(Unavailable):
    """No node is connected: nowhere to place a new key. Nothing was written."""


_BY_REASON: dict[int, type[ShardsieveError]] = {
    ed.CANDIDATE_UNAVAILABLE: CandidateUnavailable,
    ed.NODE_UNAVAILABLE: NodeUnavailable,
    ed.INVALID_INPUT: InvalidInput,
    ed.LIMIT_EXCEEDED: LimitExceeded,
    ed.UNKNOWN_NODE: UnknownNode,
    ed.SECOND_COPY: SecondCopy,
    ed.NO_NODE: NoNodeAvailable,
    ed.MOVE_UNFINISHED: MoveUnfinished,
    ed.HINTS_FULL: Overloaded,
}

_BY_CODE: dict[grpc.StatusCode, type[ShardsieveError]] = {
    grpc.StatusCode.INVALID_ARGUMENT: InvalidInput,
    grpc.StatusCode.OUT_OF_RANGE: InvalidInput,
    grpc.StatusCode.NOT_FOUND: NotFound,
    grpc.StatusCode.FAILED_PRECONDITION: Refused,
    grpc.StatusCode.UNAUTHENTICATED: AuthFailed,
    grpc.StatusCode.PERMISSION_DENIED: AuthFailed,
    grpc.StatusCode.RESOURCE_EXHAUSTED: Overloaded,
}


def from_status(code: grpc.StatusCode, message: str, detail: routing_pb2.ErrorDetail | None, *,
                coordinator: str = "", write: bool = False) -> ShardsieveError:
    """The exception of a call that ended with `code` and (maybe) an ErrorDetail.

    With a detail, its reason decides. Without one, the code does; an UNAVAILABLE or
    DEADLINE_EXCEEDED without a detail did not come from a coordinator's decision (the
    connection failed, or no answer came in time): CoordinatorUnavailable, and for a write
    `maybe_applied` (it may have been sent)."""
    if detail is not None and detail.reason in _BY_REASON:
        return _BY_REASON[detail.reason](message, code=code, detail=detail, coordinator=coordinator)
    if code in (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.DEADLINE_EXCEEDED, grpc.StatusCode.CANCELLED):
        return CoordinatorUnavailable(message, code=code, detail=detail, coordinator=coordinator,
                                      tried=(coordinator,) if coordinator else (), maybe_applied=write)
    cls = _BY_CODE.get(code, ShardsieveError)
    return cls(message, code=code, detail=detail, coordinator=coordinator)


def from_rpc_error(exc: grpc.RpcError, coordinator: str, *, write: bool = False) -> ShardsieveError:
    """The exception of a failed gRPC call (sync or asyncio) to a coordinator."""
    code = exc.code() if hasattr(exc, "code") else grpc.StatusCode.UNKNOWN
    message = (exc.details() if hasattr(exc, "details") else "") or code.name
    trailing = exc.trailing_metadata() if hasattr(exc, "trailing_metadata") else None
    return from_status(code, message, ed.from_metadata(trailing), coordinator=coordinator, write=write)


def from_key_error(err: routing_pb2.KeyError, coordinator: str, key: bytes) -> ShardsieveError:
    """The exception of one key of a batch call (its KeyError carries what a single call would)."""
    exc = from_status(ed.code_of(err.code), err.message, err.detail if err.HasField("detail") else None,
                      coordinator=coordinator)
    exc.key = key
    return exc
