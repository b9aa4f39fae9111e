from shardsieve.v1 import filter_pb2 as _filter_pb2
from google.protobuf.internal import containers as _containers
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Iterable as _Iterable, Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class WilsonInterval(_message.Message):
    __slots__ = ("low", "high")
    LOW_FIELD_NUMBER: _ClassVar[int]
    HIGH_FIELD_NUMBER: _ClassVar[int]
    low: float
    high: float
    def __init__(self, low: _Optional[float] = ..., high: _Optional[float] = ...) -> None: ...

class NodeStatus(_message.Message):
    __slots__ = ("node_id", "address", "connected", "stale", "saturated", "saturation_reasons", "geometry", "epoch", "sequence", "key_count", "capacity", "fill", "predicted_fpr", "observed_fpr", "observed_fpr_interval", "lookups_checked", "probes", "wasted_probes", "lag_ms", "state", "rebuild_progress", "rebuild_phase", "delta_bytes", "snapshots", "reads_missed_reported", "implausible_fill", "checksum")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    ADDRESS_FIELD_NUMBER: _ClassVar[int]
    CONNECTED_FIELD_NUMBER: _ClassVar[int]
    STALE_FIELD_NUMBER: _ClassVar[int]
    SATURATED_FIELD_NUMBER: _ClassVar[int]
    SATURATION_REASONS_FIELD_NUMBER: _ClassVar[int]
    GEOMETRY_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    KEY_COUNT_FIELD_NUMBER: _ClassVar[int]
    CAPACITY_FIELD_NUMBER: _ClassVar[int]
    FILL_FIELD_NUMBER: _ClassVar[int]
    PREDICTED_FPR_FIELD_NUMBER: _ClassVar[int]
    OBSERVED_FPR_FIELD_NUMBER: _ClassVar[int]
    OBSERVED_FPR_INTERVAL_FIELD_NUMBER: _ClassVar[int]
    LOOKUPS_CHECKED_FIELD_NUMBER: _ClassVar[int]
    PROBES_FIELD_NUMBER: _ClassVar[int]
    WASTED_PROBES_FIELD_NUMBER: _ClassVar[int]
    LAG_MS_FIELD_NUMBER: _ClassVar[int]
    STATE_FIELD_NUMBER: _ClassVar[int]
    REBUILD_PROGRESS_FIELD_NUMBER: _ClassVar[int]
    REBUILD_PHASE_FIELD_NUMBER: _ClassVar[int]
    DELTA_BYTES_FIELD_NUMBER: _ClassVar[int]
    SNAPSHOTS_FIELD_NUMBER: _ClassVar[int]
    READS_MISSED_REPORTED_FIELD_NUMBER: _ClassVar[int]
    IMPLAUSIBLE_FILL_FIELD_NUMBER: _ClassVar[int]
    CHECKSUM_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    address: str
    connected: bool
    stale: bool
    saturated: bool
    saturation_reasons: _containers.RepeatedScalarFieldContainer[str]
    geometry: _filter_pb2.Geometry
    epoch: int
    sequence: int
    key_count: int
    capacity: int
    fill: float
    predicted_fpr: float
    observed_fpr: float
    observed_fpr_interval: WilsonInterval
    lookups_checked: int
    probes: int
    wasted_probes: int
    lag_ms: float
    state: str
    rebuild_progress: float
    rebuild_phase: str
    delta_bytes: int
    snapshots: int
    reads_missed_reported: int
    implausible_fill: bool
    checksum: int
    def __init__(self, node_id: _Optional[str] = ..., address: _Optional[str] = ..., connected: _Optional[bool] = ..., stale: _Optional[bool] = ..., saturated: _Optional[bool] = ..., saturation_reasons: _Optional[_Iterable[str]] = ..., geometry: _Optional[_Union[_filter_pb2.Geometry, _Mapping]] = ..., epoch: _Optional[int] = ..., sequence: _Optional[int] = ..., key_count: _Optional[int] = ..., capacity: _Optional[int] = ..., fill: _Optional[float] = ..., predicted_fpr: _Optional[float] = ..., observed_fpr: _Optional[float] = ..., observed_fpr_interval: _Optional[_Union[WilsonInterval, _Mapping]] = ..., lookups_checked: _Optional[int] = ..., probes: _Optional[int] = ..., wasted_probes: _Optional[int] = ..., lag_ms: _Optional[float] = ..., state: _Optional[str] = ..., rebuild_progress: _Optional[float] = ..., rebuild_phase: _Optional[str] = ..., delta_bytes: _Optional[int] = ..., snapshots: _Optional[int] = ..., reads_missed_reported: _Optional[int] = ..., implausible_fill: _Optional[bool] = ..., checksum: _Optional[int] = ...) -> None: ...

class FleetStatusRequest(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class FleetStatusReply(_message.Message):
    __slots__ = ("coordinator_id", "mode", "nodes", "lookups", "probes", "wasted_probes", "avoided_fanout", "observed_fpr", "observed_fpr_interval", "rebuilds_in_progress")
    COORDINATOR_ID_FIELD_NUMBER: _ClassVar[int]
    MODE_FIELD_NUMBER: _ClassVar[int]
    NODES_FIELD_NUMBER: _ClassVar[int]
    LOOKUPS_FIELD_NUMBER: _ClassVar[int]
    PROBES_FIELD_NUMBER: _ClassVar[int]
    WASTED_PROBES_FIELD_NUMBER: _ClassVar[int]
    AVOIDED_FANOUT_FIELD_NUMBER: _ClassVar[int]
    OBSERVED_FPR_FIELD_NUMBER: _ClassVar[int]
    OBSERVED_FPR_INTERVAL_FIELD_NUMBER: _ClassVar[int]
    REBUILDS_IN_PROGRESS_FIELD_NUMBER: _ClassVar[int]
    coordinator_id: str
    mode: str
    nodes: _containers.RepeatedCompositeFieldContainer[NodeStatus]
    lookups: int
    probes: int
    wasted_probes: int
    avoided_fanout: float
    observed_fpr: float
    observed_fpr_interval: WilsonInterval
    rebuilds_in_progress: int
    def __init__(self, coordinator_id: _Optional[str] = ..., mode: _Optional[str] = ..., nodes: _Optional[_Iterable[_Union[NodeStatus, _Mapping]]] = ..., lookups: _Optional[int] = ..., probes: _Optional[int] = ..., wasted_probes: _Optional[int] = ..., avoided_fanout: _Optional[float] = ..., observed_fpr: _Optional[float] = ..., observed_fpr_interval: _Optional[_Union[WilsonInterval, _Mapping]] = ..., rebuilds_in_progress: _Optional[int] = ...) -> None: ...

class NodeDetailRequest(_message.Message):
    __slots__ = ("node_id",)
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    def __init__(self, node_id: _Optional[str] = ...) -> None: ...

class NodeDetailReply(_message.Message):
    __slots__ = ("status", "recent_decisions")
    STATUS_FIELD_NUMBER: _ClassVar[int]
    RECENT_DECISIONS_FIELD_NUMBER: _ClassVar[int]
    status: NodeStatus
    recent_decisions: _containers.RepeatedCompositeFieldContainer[Decision]
    def __init__(self, status: _Optional[_Union[NodeStatus, _Mapping]] = ..., recent_decisions: _Optional[_Iterable[_Union[Decision, _Mapping]]] = ...) -> None: ...

class RebuildCommand(_message.Message):
    __slots__ = ("node_ids", "flagged", "capacity", "target_fpr", "dry_run")
    NODE_IDS_FIELD_NUMBER: _ClassVar[int]
    FLAGGED_FIELD_NUMBER: _ClassVar[int]
    CAPACITY_FIELD_NUMBER: _ClassVar[int]
    TARGET_FPR_FIELD_NUMBER: _ClassVar[int]
    DRY_RUN_FIELD_NUMBER: _ClassVar[int]
    node_ids: _containers.RepeatedScalarFieldContainer[str]
    flagged: bool
    capacity: int
    target_fpr: float
    dry_run: bool
    def __init__(self, node_ids: _Optional[_Iterable[str]] = ..., flagged: _Optional[bool] = ..., capacity: _Optional[int] = ..., target_fpr: _Optional[float] = ..., dry_run: _Optional[bool] = ...) -> None: ...

class PlannedRebuild(_message.Message):
    __slots__ = ("node_id", "capacity", "target_fpr", "geometry", "reason", "queued", "refused", "filter_bytes", "replica_bytes_after")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    CAPACITY_FIELD_NUMBER: _ClassVar[int]
    TARGET_FPR_FIELD_NUMBER: _ClassVar[int]
    GEOMETRY_FIELD_NUMBER: _ClassVar[int]
    REASON_FIELD_NUMBER: _ClassVar[int]
    QUEUED_FIELD_NUMBER: _ClassVar[int]
    REFUSED_FIELD_NUMBER: _ClassVar[int]
    FILTER_BYTES_FIELD_NUMBER: _ClassVar[int]
    REPLICA_BYTES_AFTER_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    capacity: int
    target_fpr: float
    geometry: _filter_pb2.Geometry
    reason: str
    queued: bool
    refused: str
    filter_bytes: int
    replica_bytes_after: int
    def __init__(self, node_id: _Optional[str] = ..., capacity: _Optional[int] = ..., target_fpr: _Optional[float] = ..., geometry: _Optional[_Union[_filter_pb2.Geometry, _Mapping]] = ..., reason: _Optional[str] = ..., queued: _Optional[bool] = ..., refused: _Optional[str] = ..., filter_bytes: _Optional[int] = ..., replica_bytes_after: _Optional[int] = ...) -> None: ...

class RebuildReply(_message.Message):
    __slots__ = ("plan", "dry_run")
    PLAN_FIELD_NUMBER: _ClassVar[int]
    DRY_RUN_FIELD_NUMBER: _ClassVar[int]
    plan: _containers.RepeatedCompositeFieldContainer[PlannedRebuild]
    dry_run: bool
    def __init__(self, plan: _Optional[_Iterable[_Union[PlannedRebuild, _Mapping]]] = ..., dry_run: _Optional[bool] = ...) -> None: ...

class Policy(_message.Message):
    __slots__ = ("target_fpr", "saturation_ratio", "growth", "shrink_below", "max_concurrent_rebuilds", "auto_rebuild", "stale_after_s", "mode", "min_capacity")
    TARGET_FPR_FIELD_NUMBER: _ClassVar[int]
    SATURATION_RATIO_FIELD_NUMBER: _ClassVar[int]
    GROWTH_FIELD_NUMBER: _ClassVar[int]
    SHRINK_BELOW_FIELD_NUMBER: _ClassVar[int]
    MAX_CONCURRENT_REBUILDS_FIELD_NUMBER: _ClassVar[int]
    AUTO_REBUILD_FIELD_NUMBER: _ClassVar[int]
    STALE_AFTER_S_FIELD_NUMBER: _ClassVar[int]
    MODE_FIELD_NUMBER: _ClassVar[int]
    MIN_CAPACITY_FIELD_NUMBER: _ClassVar[int]
    target_fpr: float
    saturation_ratio: float
    growth: float
    shrink_below: float
    max_concurrent_rebuilds: int
    auto_rebuild: bool
    stale_after_s: float
    mode: str
    min_capacity: int
    def __init__(self, target_fpr: _Optional[float] = ..., saturation_ratio: _Optional[float] = ..., growth: _Optional[float] = ..., shrink_below: _Optional[float] = ..., max_concurrent_rebuilds: _Optional[int] = ..., auto_rebuild: _Optional[bool] = ..., stale_after_s: _Optional[float] = ..., mode: _Optional[str] = ..., min_capacity: _Optional[int] = ...) -> None: ...

class PolicyGetRequest(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class PolicySetRequest(_message.Message):
    __slots__ = ("values",)
    class ValuesEntry(_message.Message):
        __slots__ = ("key", "value")
        KEY_FIELD_NUMBER: _ClassVar[int]
        VALUE_FIELD_NUMBER: _ClassVar[int]
        key: str
        value: str
        def __init__(self, key: _Optional[str] = ..., value: _Optional[str] = ...) -> None: ...
    VALUES_FIELD_NUMBER: _ClassVar[int]
    values: _containers.ScalarMap[str, str]
    def __init__(self, values: _Optional[_Mapping[str, str]] = ...) -> None: ...

class Decision(_message.Message):
    __slots__ = ("at_unix", "node_id", "action", "detail")
    AT_UNIX_FIELD_NUMBER: _ClassVar[int]
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    ACTION_FIELD_NUMBER: _ClassVar[int]
    DETAIL_FIELD_NUMBER: _ClassVar[int]
    at_unix: float
    node_id: str
    action: str
    detail: str
    def __init__(self, at_unix: _Optional[float] = ..., node_id: _Optional[str] = ..., action: _Optional[str] = ..., detail: _Optional[str] = ...) -> None: ...

class DecisionsRequest(_message.Message):
    __slots__ = ("limit",)
    LIMIT_FIELD_NUMBER: _ClassVar[int]
    limit: int
    def __init__(self, limit: _Optional[int] = ...) -> None: ...

class DecisionsReply(_message.Message):
    __slots__ = ("decisions",)
    DECISIONS_FIELD_NUMBER: _ClassVar[int]
    decisions: _containers.RepeatedCompositeFieldContainer[Decision]
    def __init__(self, decisions: _Optional[_Iterable[_Union[Decision, _Mapping]]] = ...) -> None: ...

class UnlistNodeRequest(_message.Message):
    __slots__ = ("node_id", "force")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    FORCE_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    force: bool
    def __init__(self, node_id: _Optional[str] = ..., force: _Optional[bool] = ...) -> None: ...

class UnlistNodeReply(_message.Message):
    __slots__ = ("node_id", "was_connected", "had_replica", "hints_dropped", "key_count", "address")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    WAS_CONNECTED_FIELD_NUMBER: _ClassVar[int]
    HAD_REPLICA_FIELD_NUMBER: _ClassVar[int]
    HINTS_DROPPED_FIELD_NUMBER: _ClassVar[int]
    KEY_COUNT_FIELD_NUMBER: _ClassVar[int]
    ADDRESS_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    was_connected: bool
    had_replica: bool
    hints_dropped: int
    key_count: int
    address: str
    def __init__(self, node_id: _Optional[str] = ..., was_connected: _Optional[bool] = ..., had_replica: _Optional[bool] = ..., hints_dropped: _Optional[int] = ..., key_count: _Optional[int] = ..., address: _Optional[str] = ...) -> None: ...
