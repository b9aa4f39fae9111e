from shardsieve.v1 import filter_pb2 as _filter_pb2
from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class SnapshotReason(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    SNAPSHOT_REASON_UNSPECIFIED: _ClassVar[SnapshotReason]
    SNAPSHOT_REASON_NO_REPLICA: _ClassVar[SnapshotReason]
    SNAPSHOT_REASON_GAP: _ClassVar[SnapshotReason]
    SNAPSHOT_REASON_UNKNOWN_EPOCH: _ClassVar[SnapshotReason]
    SNAPSHOT_REASON_CHECKSUM_MISMATCH: _ClassVar[SnapshotReason]
    SNAPSHOT_REASON_BAD_PAYLOAD: _ClassVar[SnapshotReason]
    SNAPSHOT_REASON_BEHIND_HISTORY: _ClassVar[SnapshotReason]
SNAPSHOT_REASON_UNSPECIFIED: SnapshotReason
SNAPSHOT_REASON_NO_REPLICA: SnapshotReason
SNAPSHOT_REASON_GAP: SnapshotReason
SNAPSHOT_REASON_UNKNOWN_EPOCH: SnapshotReason
SNAPSHOT_REASON_CHECKSUM_MISMATCH: SnapshotReason
SNAPSHOT_REASON_BAD_PAYLOAD: SnapshotReason
SNAPSHOT_REASON_BEHIND_HISTORY: SnapshotReason

class NodeStats(_message.Message):
    __slots__ = ("key_count", "capacity", "geometry", "fill", "predicted_fpr", "reads", "reads_missed", "writes", "deletes", "bytes_pushed", "epoch", "sequence", "target_fpr", "rebuild_epoch", "rebuild_progress", "rebuild_phase", "saturated_counters")
    KEY_COUNT_FIELD_NUMBER: _ClassVar[int]
    CAPACITY_FIELD_NUMBER: _ClassVar[int]
    GEOMETRY_FIELD_NUMBER: _ClassVar[int]
    FILL_FIELD_NUMBER: _ClassVar[int]
    PREDICTED_FPR_FIELD_NUMBER: _ClassVar[int]
    READS_FIELD_NUMBER: _ClassVar[int]
    READS_MISSED_FIELD_NUMBER: _ClassVar[int]
    WRITES_FIELD_NUMBER: _ClassVar[int]
    DELETES_FIELD_NUMBER: _ClassVar[int]
    BYTES_PUSHED_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    TARGET_FPR_FIELD_NUMBER: _ClassVar[int]
    REBUILD_EPOCH_FIELD_NUMBER: _ClassVar[int]
    REBUILD_PROGRESS_FIELD_NUMBER: _ClassVar[int]
    REBUILD_PHASE_FIELD_NUMBER: _ClassVar[int]
    SATURATED_COUNTERS_FIELD_NUMBER: _ClassVar[int]
    key_count: int
    capacity: int
    geometry: _filter_pb2.Geometry
    fill: float
    predicted_fpr: float
    reads: int
    reads_missed: int
    writes: int
    deletes: int
    bytes_pushed: int
    epoch: int
    sequence: int
    target_fpr: float
    rebuild_epoch: int
    rebuild_progress: float
    rebuild_phase: str
    saturated_counters: int
    def __init__(self, key_count: _Optional[int] = ..., capacity: _Optional[int] = ..., geometry: _Optional[_Union[_filter_pb2.Geometry, _Mapping]] = ..., fill: _Optional[float] = ..., predicted_fpr: _Optional[float] = ..., reads: _Optional[int] = ..., reads_missed: _Optional[int] = ..., writes: _Optional[int] = ..., deletes: _Optional[int] = ..., bytes_pushed: _Optional[int] = ..., epoch: _Optional[int] = ..., sequence: _Optional[int] = ..., target_fpr: _Optional[float] = ..., rebuild_epoch: _Optional[int] = ..., rebuild_progress: _Optional[float] = ..., rebuild_phase: _Optional[str] = ..., saturated_counters: _Optional[int] = ...) -> None: ...

class Hello(_message.Message):
    __slots__ = ("node_id", "storage_address", "geometry", "epoch", "sequence", "checksum", "key_count", "capacity", "target_fpr", "push_interval_ms", "protocol_version", "history_floor")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    STORAGE_ADDRESS_FIELD_NUMBER: _ClassVar[int]
    GEOMETRY_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    CHECKSUM_FIELD_NUMBER: _ClassVar[int]
    KEY_COUNT_FIELD_NUMBER: _ClassVar[int]
    CAPACITY_FIELD_NUMBER: _ClassVar[int]
    TARGET_FPR_FIELD_NUMBER: _ClassVar[int]
    PUSH_INTERVAL_MS_FIELD_NUMBER: _ClassVar[int]
    PROTOCOL_VERSION_FIELD_NUMBER: _ClassVar[int]
    HISTORY_FLOOR_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    storage_address: str
    geometry: _filter_pb2.Geometry
    epoch: int
    sequence: int
    checksum: int
    key_count: int
    capacity: int
    target_fpr: float
    push_interval_ms: int
    protocol_version: int
    history_floor: int
    def __init__(self, node_id: _Optional[str] = ..., storage_address: _Optional[str] = ..., geometry: _Optional[_Union[_filter_pb2.Geometry, _Mapping]] = ..., epoch: _Optional[int] = ..., sequence: _Optional[int] = ..., checksum: _Optional[int] = ..., key_count: _Optional[int] = ..., capacity: _Optional[int] = ..., target_fpr: _Optional[float] = ..., push_interval_ms: _Optional[int] = ..., protocol_version: _Optional[int] = ..., history_floor: _Optional[int] = ...) -> None: ...

class Heartbeat(_message.Message):
    __slots__ = ("stats",)
    STATS_FIELD_NUMBER: _ClassVar[int]
    stats: NodeStats
    def __init__(self, stats: _Optional[_Union[NodeStats, _Mapping]] = ...) -> None: ...

class NodeMessage(_message.Message):
    __slots__ = ("hello", "delta", "snapshot_chunk", "heartbeat")
    HELLO_FIELD_NUMBER: _ClassVar[int]
    DELTA_FIELD_NUMBER: _ClassVar[int]
    SNAPSHOT_CHUNK_FIELD_NUMBER: _ClassVar[int]
    HEARTBEAT_FIELD_NUMBER: _ClassVar[int]
    hello: Hello
    delta: _filter_pb2.Delta
    snapshot_chunk: _filter_pb2.SnapshotChunk
    heartbeat: Heartbeat
    def __init__(self, hello: _Optional[_Union[Hello, _Mapping]] = ..., delta: _Optional[_Union[_filter_pb2.Delta, _Mapping]] = ..., snapshot_chunk: _Optional[_Union[_filter_pb2.SnapshotChunk, _Mapping]] = ..., heartbeat: _Optional[_Union[Heartbeat, _Mapping]] = ...) -> None: ...

class Ack(_message.Message):
    __slots__ = ("epoch", "sequence", "geometry")
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    GEOMETRY_FIELD_NUMBER: _ClassVar[int]
    epoch: int
    sequence: int
    geometry: _filter_pb2.Geometry
    def __init__(self, epoch: _Optional[int] = ..., sequence: _Optional[int] = ..., geometry: _Optional[_Union[_filter_pb2.Geometry, _Mapping]] = ...) -> None: ...

class NeedSnapshot(_message.Message):
    __slots__ = ("reason", "have_epoch", "have_sequence", "detail")
    REASON_FIELD_NUMBER: _ClassVar[int]
    HAVE_EPOCH_FIELD_NUMBER: _ClassVar[int]
    HAVE_SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    DETAIL_FIELD_NUMBER: _ClassVar[int]
    reason: SnapshotReason
    have_epoch: int
    have_sequence: int
    detail: str
    def __init__(self, reason: _Optional[_Union[SnapshotReason, str]] = ..., have_epoch: _Optional[int] = ..., have_sequence: _Optional[int] = ..., detail: _Optional[str] = ...) -> None: ...

class RebuildRequest(_message.Message):
    __slots__ = ("request_id", "capacity", "target_fpr", "reason")
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    CAPACITY_FIELD_NUMBER: _ClassVar[int]
    TARGET_FPR_FIELD_NUMBER: _ClassVar[int]
    REASON_FIELD_NUMBER: _ClassVar[int]
    request_id: int
    capacity: int
    target_fpr: float
    reason: str
    def __init__(self, request_id: _Optional[int] = ..., capacity: _Optional[int] = ..., target_fpr: _Optional[float] = ..., reason: _Optional[str] = ...) -> None: ...

class SnapshotVerified(_message.Message):
    __slots__ = ("snapshot_id", "epoch", "sequence")
    SNAPSHOT_ID_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    snapshot_id: int
    epoch: int
    sequence: int
    def __init__(self, snapshot_id: _Optional[int] = ..., epoch: _Optional[int] = ..., sequence: _Optional[int] = ...) -> None: ...

class SnapshotRejected(_message.Message):
    __slots__ = ("snapshot_id", "detail")
    SNAPSHOT_ID_FIELD_NUMBER: _ClassVar[int]
    DETAIL_FIELD_NUMBER: _ClassVar[int]
    snapshot_id: int
    detail: str
    def __init__(self, snapshot_id: _Optional[int] = ..., detail: _Optional[str] = ...) -> None: ...

class CoordinatorMessage(_message.Message):
    __slots__ = ("ack", "need_snapshot", "rebuild", "snapshot_verified", "snapshot_rejected", "node_id")
    ACK_FIELD_NUMBER: _ClassVar[int]
    NEED_SNAPSHOT_FIELD_NUMBER: _ClassVar[int]
    REBUILD_FIELD_NUMBER: _ClassVar[int]
    SNAPSHOT_VERIFIED_FIELD_NUMBER: _ClassVar[int]
    SNAPSHOT_REJECTED_FIELD_NUMBER: _ClassVar[int]
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    ack: Ack
    need_snapshot: NeedSnapshot
    rebuild: RebuildRequest
    snapshot_verified: SnapshotVerified
    snapshot_rejected: SnapshotRejected
    node_id: str
    def __init__(self, ack: _Optional[_Union[Ack, _Mapping]] = ..., need_snapshot: _Optional[_Union[NeedSnapshot, _Mapping]] = ..., rebuild: _Optional[_Union[RebuildRequest, _Mapping]] = ..., snapshot_verified: _Optional[_Union[SnapshotVerified, _Mapping]] = ..., snapshot_rejected: _Optional[_Union[SnapshotRejected, _Mapping]] = ..., node_id: _Optional[str] = ...) -> None: ...
