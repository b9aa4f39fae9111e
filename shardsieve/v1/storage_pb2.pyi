from shardsieve.v1 import sync_pb2 as _sync_pb2
from google.protobuf.internal import containers as _containers
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Iterable as _Iterable, Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class PutRequest(_message.Message):
    __slots__ = ("key", "value")
    KEY_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    key: bytes
    value: bytes
    def __init__(self, key: _Optional[bytes] = ..., value: _Optional[bytes] = ...) -> None: ...

class FilterPosition(_message.Message):
    __slots__ = ("epoch", "sequence")
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    epoch: int
    sequence: int
    def __init__(self, epoch: _Optional[int] = ..., sequence: _Optional[int] = ...) -> None: ...

class WriteAck(_message.Message):
    __slots__ = ("created", "epoch", "sequence", "old_position")
    CREATED_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    OLD_POSITION_FIELD_NUMBER: _ClassVar[int]
    created: bool
    epoch: int
    sequence: int
    old_position: FilterPosition
    def __init__(self, created: _Optional[bool] = ..., epoch: _Optional[int] = ..., sequence: _Optional[int] = ..., old_position: _Optional[_Union[FilterPosition, _Mapping]] = ...) -> None: ...

class GetRequest(_message.Message):
    __slots__ = ("key",)
    KEY_FIELD_NUMBER: _ClassVar[int]
    key: bytes
    def __init__(self, key: _Optional[bytes] = ...) -> None: ...

class GetReply(_message.Message):
    __slots__ = ("found", "value")
    FOUND_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    found: bool
    value: bytes
    def __init__(self, found: _Optional[bool] = ..., value: _Optional[bytes] = ...) -> None: ...

class DeleteRequest(_message.Message):
    __slots__ = ("key",)
    KEY_FIELD_NUMBER: _ClassVar[int]
    key: bytes
    def __init__(self, key: _Optional[bytes] = ...) -> None: ...

class BatchPutRequest(_message.Message):
    __slots__ = ("items",)
    ITEMS_FIELD_NUMBER: _ClassVar[int]
    items: _containers.RepeatedCompositeFieldContainer[PutRequest]
    def __init__(self, items: _Optional[_Iterable[_Union[PutRequest, _Mapping]]] = ...) -> None: ...

class BatchWriteAck(_message.Message):
    __slots__ = ("acks",)
    ACKS_FIELD_NUMBER: _ClassVar[int]
    acks: _containers.RepeatedCompositeFieldContainer[WriteAck]
    def __init__(self, acks: _Optional[_Iterable[_Union[WriteAck, _Mapping]]] = ...) -> None: ...

class BatchGetRequest(_message.Message):
    __slots__ = ("keys",)
    KEYS_FIELD_NUMBER: _ClassVar[int]
    keys: _containers.RepeatedScalarFieldContainer[bytes]
    def __init__(self, keys: _Optional[_Iterable[bytes]] = ...) -> None: ...

class BatchGetReply(_message.Message):
    __slots__ = ("items",)
    ITEMS_FIELD_NUMBER: _ClassVar[int]
    items: _containers.RepeatedCompositeFieldContainer[GetReply]
    def __init__(self, items: _Optional[_Iterable[_Union[GetReply, _Mapping]]] = ...) -> None: ...

class BatchDeleteRequest(_message.Message):
    __slots__ = ("keys",)
    KEYS_FIELD_NUMBER: _ClassVar[int]
    keys: _containers.RepeatedScalarFieldContainer[bytes]
    def __init__(self, keys: _Optional[_Iterable[bytes]] = ...) -> None: ...

class NodeStatsRequest(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class NodeStatsReply(_message.Message):
    __slots__ = ("node_id", "stats")
    NODE_ID_FIELD_NUMBER: _ClassVar[int]
    STATS_FIELD_NUMBER: _ClassVar[int]
    node_id: str
    stats: _sync_pb2.NodeStats
    def __init__(self, node_id: _Optional[str] = ..., stats: _Optional[_Union[_sync_pb2.NodeStats, _Mapping]] = ...) -> None: ...

class ScanKeysRequest(_message.Message):
    __slots__ = ("limit", "after")
    LIMIT_FIELD_NUMBER: _ClassVar[int]
    AFTER_FIELD_NUMBER: _ClassVar[int]
    limit: int
    after: bytes
    def __init__(self, limit: _Optional[int] = ..., after: _Optional[bytes] = ...) -> None: ...

class ScanKeysReply(_message.Message):
    __slots__ = ("keys", "done")
    KEYS_FIELD_NUMBER: _ClassVar[int]
    DONE_FIELD_NUMBER: _ClassVar[int]
    keys: _containers.RepeatedScalarFieldContainer[bytes]
    done: bool
    def __init__(self, keys: _Optional[_Iterable[bytes]] = ..., done: _Optional[bool] = ...) -> None: ...
