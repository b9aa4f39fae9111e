from shardsieve.v1 import filter_pb2 as _filter_pb2
from shardsieve.v1 import sync_pb2 as _sync_pb2
from google.protobuf.internal import containers as _containers
from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Iterable as _Iterable, Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class ErrorReason(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    ERROR_REASON_UNSPECIFIED: _ClassVar[ErrorReason]
    ERROR_REASON_CANDIDATE_UNAVAILABLE: _ClassVar[ErrorReason]
    ERROR_REASON_NODE_UNAVAILABLE: _ClassVar[ErrorReason]
    ERROR_REASON_INVALID_INPUT: _ClassVar[ErrorReason]
    ERROR_REASON_LIMIT_EXCEEDED: _ClassVar[ErrorReason]
    ERROR_REASON_UNKNOWN_NODE: _ClassVar[ErrorReason]
    ERROR_REASON_SECOND_COPY: _ClassVar[ErrorReason]
    ERROR_REASON_NO_NODE: _ClassVar[ErrorReason]
    ERROR_REASON_MOVE_UNFINISHED: _ClassVar[ErrorReason]
    ERROR_REASON_HINTS_FULL: _ClassVar[ErrorReason]

class WriteEffect(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    WRITE_EFFECT_UNSPECIFIED: _ClassVar[WriteEffect]
    WRITE_EFFECT_NONE: _ClassVar[WriteEffect]
    WRITE_EFFECT_PARTIAL: _ClassVar[WriteEffect]
    WRITE_EFFECT_UNKNOWN: _ClassVar[WriteEffect]
ERROR_REASON_UNSPECIFIED: ErrorReason
ERROR_REASON_CANDIDATE_UNAVAILABLE: ErrorReason
ERROR_REASON_NODE_UNAVAILABLE: ErrorReason
ERROR_REASON_INVALID_INPUT: ErrorReason
ERROR_REASON_LIMIT_EXCEEDED: ErrorReason
ERROR_REASON_UNKNOWN_NODE: ErrorReason
ERROR_REASON_SECOND_COPY: ErrorReason
ERROR_REASON_NO_NODE: ErrorReason
ERROR_REASON_MOVE_UNFINISHED: ErrorReason
ERROR_REASON_HINTS_FULL: ErrorReason
WRITE_EFFECT_UNSPECIFIED: WriteEffect
WRITE_EFFECT_NONE: WriteEffect
WRITE_EFFECT_PARTIAL: WriteEffect
WRITE_EFFECT_UNKNOWN: WriteEffect

class Candidate(_message.Message):
    __slots__ = ("node_id", "address", "stale", "hinted")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    ADDRESS_FIELD_NUMBER: _ClassVar[int]
    STALE_FIELD_NUMBER: _ClassVar[int]
    HINTED_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    address: str
    stale: bool
    hinted: bool
    def __init__(self, node_id: _Optional[str] = ..., address: _Optional[str] = ..., stale: _Optional[bool] = ..., hinted: _Optional[bool] = ...) -> None: ...

class LocateRequest(_message.Message):
    __slots__ = ("key",)
    KEY_FIELD_NUMBER: _ClassVar[int]
    key: bytes
    def __init__(self, key: _Optional[bytes] = ...) -> None: ...

class LocateReply(_message.Message):
    __slots__ = ("candidates",)
    CANDIDATES_FIELD_NUMBER: _ClassVar[int]
    candidates: _containers.RepeatedCompositeFieldContainer[Candidate]
    def __init__(self, candidates: _Optional[_Iterable[_Union[Candidate, _Mapping]]] = ...) -> None: ...

class LocateBatchRequest(_message.Message):
    __slots__ = ("keys",)
    KEYS_FIELD_NUMBER: _ClassVar[int]
    keys: _containers.RepeatedScalarFieldContainer[bytes]
    def __init__(self, keys: _Optional[_Iterable[bytes]] = ...) -> None: ...

class LocateBatchReply(_message.Message):
    __slots__ = ("results",)
    RESULTS_FIELD_NUMBER: _ClassVar[int]
    results: _containers.RepeatedCompositeFieldContainer[LocateReply]
    def __init__(self, results: _Optional[_Iterable[_Union[LocateReply, _Mapping]]] = ...) -> None: ...

class ReadRequest(_message.Message):
    __slots__ = ("key", "deadline_ms")
    KEY_FIELD_NUMBER: _ClassVar[int]
    DEADLINE_MS_FIELD_NUMBER: _ClassVar[int]
    key: bytes
    deadline_ms: int
    def __init__(self, key: _Optional[bytes] = ..., deadline_ms: _Optional[int] = ...) -> None: ...

class ReadReply(_message.Message):
    __slots__ = ("found", "value", "node_id", "probes", "wasted_probes", "candidates")
    FOUND_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    PROBES_FIELD_NUMBER: _ClassVar[int]
    WASTED_PROBES_FIELD_NUMBER: _ClassVar[int]
    CANDIDATES_FIELD_NUMBER: _ClassVar[int]
    found: bool
    value: bytes
    node_id: str
    probes: int
    wasted_probes: int
    candidates: int
    def __init__(self, found: _Optional[bool] = ..., value: _Optional[bytes] = ..., node_id: _Optional[str] = ..., probes: _Optional[int] = ..., wasted_probes: _Optional[int] = ..., candidates: _Optional[int] = ...) -> None: ...

class WriteRequest(_message.Message):
    __slots__ = ("key", "value", "node_id", "move")
    KEY_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    MOVE_FIELD_NUMBER: _ClassVar[int]
    key: bytes
    value: bytes
    node_id: str
    move: bool
    def __init__(self, key: _Optional[bytes] = ..., value: _Optional[bytes] = ..., node_id: _Optional[str] = ..., move: _Optional[bool] = ...) -> None: ...

class WriteReply(_message.Message):
    __slots__ = ("node_id", "created", "epoch", "sequence", "moved_from")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    CREATED_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    MOVED_FROM_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    created: bool
    epoch: int
    sequence: int
    moved_from: _containers.RepeatedScalarFieldContainer[str]
    def __init__(self, node_id: _Optional[str] = ..., created: _Optional[bool] = ..., epoch: _Optional[int] = ..., sequence: _Optional[int] = ..., moved_from: _Optional[_Iterable[str]] = ...) -> None: ...

class RemoveRequest(_message.Message):
    __slots__ = ("key",)
    KEY_FIELD_NUMBER: _ClassVar[int]
    key: bytes
    def __init__(self, key: _Optional[bytes] = ...) -> None: ...

class RemoveReply(_message.Message):
    __slots__ = ("node_ids",)
    NODE_IDS_FIELD_NUMBER: _ClassVar[int]
    node_ids: _containers.RepeatedScalarFieldContainer[str]
    def __init__(self, node_ids: _Optional[_Iterable[str]] = ...) -> None: ...

class NodeFailure(_message.Message):
    __slots__ = ("node_id", "address", "code", "detail")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    ADDRESS_FIELD_NUMBER: _ClassVar[int]
    CODE_FIELD_NUMBER: _ClassVar[int]
    DETAIL_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    address: str
    code: int
    detail: str
    def __init__(self, node_id: _Optional[str] = ..., address: _Optional[str] = ..., code: _Optional[int] = ..., detail: _Optional[str] = ...) -> None: ...

class ErrorDetail(_message.Message):
    __slots__ = ("reason", "key", "nodes", "setting", "effect", "done_on", "holders")
    REASON_FIELD_NUMBER: _ClassVar[int]
    KEY_FIELD_NUMBER: _ClassVar[int]
    NODES_FIELD_NUMBER: _ClassVar[int]
    SETTING_FIELD_NUMBER: _ClassVar[int]
    EFFECT_FIELD_NUMBER: _ClassVar[int]
    DONE_ON_FIELD_NUMBER: _ClassVar[int]
    HOLDERS_FIELD_NUMBER: _ClassVar[int]
    reason: ErrorReason
    key: bytes
    nodes: _containers.RepeatedCompositeFieldContainer[NodeFailure]
    setting: str
    effect: WriteEffect
    done_on: _containers.RepeatedScalarFieldContainer[str]
    holders: _containers.RepeatedScalarFieldContainer[str]
    def __init__(self, reason: _Optional[_Union[ErrorReason, str]] = ..., key: _Optional[bytes] = ..., nodes: _Optional[_Iterable[_Union[NodeFailure, _Mapping]]] = ..., setting: _Optional[str] = ..., effect: _Optional[_Union[WriteEffect, str]] = ..., done_on: _Optional[_Iterable[str]] = ..., holders: _Optional[_Iterable[str]] = ...) -> None: ...

class KeyError(_message.Message):
    __slots__ = ("code", "message", "detail")
    CODE_FIELD_NUMBER: _ClassVar[int]
    MESSAGE_FIELD_NUMBER: _ClassVar[int]
    DETAIL_FIELD_NUMBER: _ClassVar[int]
    code: int
    message: str
    detail: ErrorDetail
    def __init__(self, code: _Optional[int] = ..., message: _Optional[str] = ..., detail: _Optional[_Union[ErrorDetail, _Mapping]] = ...) -> None: ...

class ReadBatchRequest(_message.Message):
    __slots__ = ("keys", "deadline_ms")
    KEYS_FIELD_NUMBER: _ClassVar[int]
    DEADLINE_MS_FIELD_NUMBER: _ClassVar[int]
    keys: _containers.RepeatedScalarFieldContainer[bytes]
    deadline_ms: int
    def __init__(self, keys: _Optional[_Iterable[bytes]] = ..., deadline_ms: _Optional[int] = ...) -> None: ...

class ReadResult(_message.Message):
    __slots__ = ("found", "value", "node_id", "candidates", "wasted_probes", "error")
    FOUND_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    CANDIDATES_FIELD_NUMBER: _ClassVar[int]
    WASTED_PROBES_FIELD_NUMBER: _ClassVar[int]
    ERROR_FIELD_NUMBER: _ClassVar[int]
    found: bool
    value: bytes
    node_id: str
    candidates: int
    wasted_probes: int
    error: KeyError
    def __init__(self, found: _Optional[bool] = ..., value: _Optional[bytes] = ..., node_id: _Optional[str] = ..., candidates: _Optional[int] = ..., wasted_probes: _Optional[int] = ..., error: _Optional[_Union[KeyError, _Mapping]] = ...) -> None: ...

class ReadBatchReply(_message.Message):
    __slots__ = ("results", "node_calls")
    RESULTS_FIELD_NUMBER: _ClassVar[int]
    NODE_CALLS_FIELD_NUMBER: _ClassVar[int]
    results: _containers.RepeatedCompositeFieldContainer[ReadResult]
    node_calls: int
    def __init__(self, results: _Optional[_Iterable[_Union[ReadResult, _Mapping]]] = ..., node_calls: _Optional[int] = ...) -> None: ...

class WriteBatchRequest(_message.Message):
    __slots__ = ("items",)
    ITEMS_FIELD_NUMBER: _ClassVar[int]
    items: _containers.RepeatedCompositeFieldContainer[WriteRequest]
    def __init__(self, items: _Optional[_Iterable[_Union[WriteRequest, _Mapping]]] = ...) -> None: ...

class WriteResult(_message.Message):
    __slots__ = ("reply", "error")
    REPLY_FIELD_NUMBER: _ClassVar[int]
    ERROR_FIELD_NUMBER: _ClassVar[int]
    reply: WriteReply
    error: KeyError
    def __init__(self, reply: _Optional[_Union[WriteReply, _Mapping]] = ..., error: _Optional[_Union[KeyError, _Mapping]] = ...) -> None: ...

class WriteBatchReply(_message.Message):
    __slots__ = ("results", "node_calls")
    RESULTS_FIELD_NUMBER: _ClassVar[int]
    NODE_CALLS_FIELD_NUMBER: _ClassVar[int]
    results: _containers.RepeatedCompositeFieldContainer[WriteResult]
    node_calls: int
    def __init__(self, results: _Optional[_Iterable[_Union[WriteResult, _Mapping]]] = ..., node_calls: _Optional[int] = ...) -> None: ...

class RemoveBatchRequest(_message.Message):
    __slots__ = ("keys",)
    KEYS_FIELD_NUMBER: _ClassVar[int]
    keys: _containers.RepeatedScalarFieldContainer[bytes]
    def __init__(self, keys: _Optional[_Iterable[bytes]] = ...) -> None: ...

class RemoveResult(_message.Message):
    __slots__ = ("node_ids", "error")
    NODE_IDS_FIELD_NUMBER: _ClassVar[int]
    ERROR_FIELD_NUMBER: _ClassVar[int]
    node_ids: _containers.RepeatedScalarFieldContainer[str]
    error: KeyError
    def __init__(self, node_ids: _Optional[_Iterable[str]] = ..., error: _Optional[_Union[KeyError, _Mapping]] = ...) -> None: ...

class RemoveBatchReply(_message.Message):
    __slots__ = ("results", "node_calls")
    RESULTS_FIELD_NUMBER: _ClassVar[int]
    NODE_CALLS_FIELD_NUMBER: _ClassVar[int]
    results: _containers.RepeatedCompositeFieldContainer[RemoveResult]
    node_calls: int
    def __init__(self, results: _Optional[_Iterable[_Union[RemoveResult, _Mapping]]] = ..., node_calls: _Optional[int] = ...) -> None: ...

class WatchReplicasRequest(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class NodeUpdate(_message.Message):
    __slots__ = ("node_id", "hello", "snapshot_chunk", "delta", "unlisted")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    HELLO_FIELD_NUMBER: _ClassVar[int]
    SNAPSHOT_CHUNK_FIELD_NUMBER: _ClassVar[int]
    DELTA_FIELD_NUMBER: _ClassVar[int]
    UNLISTED_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    hello: _sync_pb2.Hello
    snapshot_chunk: _filter_pb2.SnapshotChunk
    delta: _filter_pb2.Delta
    unlisted: bool
    def __init__(self, node_id: _Optional[str] = ..., hello: _Optional[_Union[_sync_pb2.Hello, _Mapping]] = ..., snapshot_chunk: _Optional[_Union[_filter_pb2.SnapshotChunk, _Mapping]] = ..., delta: _Optional[_Union[_filter_pb2.Delta, _Mapping]] = ..., unlisted: _Optional[bool] = ...) -> None: ...

class NodeMark(_message.Message):
    __slots__ = ("node_id", "address", "fresh", "state", "epoch", "sequence", "has_replica")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    ADDRESS_FIELD_NUMBER: _ClassVar[int]
    FRESH_FIELD_NUMBER: _ClassVar[int]
    STATE_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    HAS_REPLICA_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    address: str
    fresh: bool
    state: str
    epoch: int
    sequence: int
    has_replica: bool
    def __init__(self, node_id: _Optional[str] = ..., address: _Optional[str] = ..., fresh: _Optional[bool] = ..., state: _Optional[str] = ..., epoch: _Optional[int] = ..., sequence: _Optional[int] = ..., has_replica: _Optional[bool] = ...) -> None: ...

class FleetMarks(_message.Message):
    __slots__ = ("mode", "stale_after_s", "nodes")
    MODE_FIELD_NUMBER: _ClassVar[int]
    STALE_AFTER_S_FIELD_NUMBER: _ClassVar[int]
    NODES_FIELD_NUMBER: _ClassVar[int]
    mode: str
    stale_after_s: float
    nodes: _containers.RepeatedCompositeFieldContainer[NodeMark]
    def __init__(self, mode: _Optional[str] = ..., stale_after_s: _Optional[float] = ..., nodes: _Optional[_Iterable[_Union[NodeMark, _Mapping]]] = ...) -> None: ...

class ReplicaFeed(_message.Message):
    __slots__ = ("reset", "updates", "marks")
    RESET_FIELD_NUMBER: _ClassVar[int]
    UPDATES_FIELD_NUMBER: _ClassVar[int]
    MARKS_FIELD_NUMBER: _ClassVar[int]
    reset: bool
    updates: _containers.RepeatedCompositeFieldContainer[NodeUpdate]
    marks: FleetMarks
    def __init__(self, reset: _Optional[bool] = ..., updates: _Optional[_Iterable[_Union[NodeUpdate, _Mapping]]] = ..., marks: _Optional[_Union[FleetMarks, _Mapping]] = ...) -> None: ...
