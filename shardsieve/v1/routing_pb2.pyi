from google.protobuf.internal import containers as _containers
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Iterable as _Iterable, Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

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
