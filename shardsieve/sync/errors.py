"""Errors of the sync protocol objects.

Every error below is raised *before* any state is touched, so the driver (the gRPC
client on the node, the servicer on the coordinator) can end the stream and reconnect
without harming the filter, the replica or the other peers. Each names what was wrong
and what was expected, so the log line alone tells an operator which side misbehaved.

Drivers map them to gRPC status codes with `grpc_status_name` (a name, not the grpc
enum, so this module stays free of I/O libraries).
"""

from __future__ import annotations


class SyncError(Exception):
    """Base of every sync-protocol error."""

    #: gRPC status code name a servicer should end the stream with.
    grpc_status_name: str = "FAILED_PRECONDITION"


class ProtocolViolation(SyncError):
    """The peer sent something the protocol forbids at this point; reset the stream."""


class InvalidHello(ProtocolViolation):
    """A Hello with an empty node id, an invalid geometry, or other unusable fields."""

    grpc_status_name = "INVALID_ARGUMENT"


class UnsupportedProtocolVersion(InvalidHello):
    """The Hello names a protocol version this build does not speak."""


class HelloTwice(ProtocolViolation):
    """A second Hello on a stream that already opened."""


class NotOpened(ProtocolViolation):
    """A message on a stream before its Hello (or after it was closed / taken over)."""


class StaleStream(NotOpened):
    """A message on a stream that a newer stream of the same node id has replaced."""

    grpc_status_name = "ABORTED"


class WrongNodeId(ProtocolViolation):
    """A message addressed to another node id than the one this stream belongs to."""


class UnknownEpoch(ProtocolViolation):
    """A message naming an epoch the receiver never had (a future epoch)."""


class GeometryMismatch(ProtocolViolation):
    """A message naming a geometry other than the one of its epoch."""


class SequenceAhead(ProtocolViolation):
    """The coordinator claims to have applied a sequence the node never produced."""


class PositionOutOfRange(ProtocolViolation):
    """A Hello or delta names an epoch or sequence past the largest a position may carry (or a
    delta at sequence 0, which is a baseline, not a change): nothing could follow it."""

    grpc_status_name = "INVALID_ARGUMENT"

    def __init__(self, message: str, *, epoch: int, sequence: int, max_epoch: int, max_sequence: int) -> None:
        super().__init__(message)
        self.epoch = epoch
        self.sequence = sequence
        self.max_epoch = max_epoch
        self.max_sequence = max_sequence


class FloorAboveSequence(InvalidHello):
    """A Hello whose history floor is above its own sequence: no history can look like that."""

    def __init__(self, message: str, *, history_floor: int, sequence: int) -> None:
        super().__init__(message)
        self.history_floor = history_floor
        self.sequence = sequence


class EpochBehindReplica(ProtocolViolation):
    """A Hello or delta from an epoch older than the coordinator's replica of that node: a node
    never goes back to an epoch it left, so this is a node that lost its persisted epoch (or a
    forged message). Taking it would roll the replica back."""

    def __init__(self, message: str, *, epoch: int, replica_epoch: int) -> None:
        super().__init__(message)
        self.epoch = epoch
        self.replica_epoch = replica_epoch


class MalformedMessage(ProtocolViolation):
    """A message with no body, or a body the receiver does not handle on this side."""

    grpc_status_name = "INVALID_ARGUMENT"


class UnknownPeer(SyncError):
    """The driver named a peer that is not connected (a driver bug, not a peer fault)."""

    grpc_status_name = "INTERNAL"


class RebuildStateError(SyncError):
    """A rebuild step the phase table does not allow (e.g. scan_done with no scan running)."""

    grpc_status_name = "INTERNAL"
