from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from collections.abc import Mapping as _Mapping
from typing import ClassVar as _ClassVar, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class HashScheme(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    HASH_SCHEME_UNSPECIFIED: _ClassVar[HashScheme]
    HASH_SCHEME_MMH3_KM_V1: _ClassVar[HashScheme]

class SnapshotEncoding(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    SNAPSHOT_ENCODING_UNSPECIFIED: _ClassVar[SnapshotEncoding]
    SNAPSHOT_ENCODING_RAW: _ClassVar[SnapshotEncoding]
    SNAPSHOT_ENCODING_ZLIB: _ClassVar[SnapshotEncoding]
    SNAPSHOT_ENCODING_POSITIONS: _ClassVar[SnapshotEncoding]

class SnapshotPurpose(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    SNAPSHOT_PURPOSE_UNSPECIFIED: _ClassVar[SnapshotPurpose]
    SNAPSHOT_PURPOSE_RESYNC: _ClassVar[SnapshotPurpose]
    SNAPSHOT_PURPOSE_REBUILD: _ClassVar[SnapshotPurpose]
HASH_SCHEME_UNSPECIFIED: HashScheme
HASH_SCHEME_MMH3_KM_V1: HashScheme
SNAPSHOT_ENCODING_UNSPECIFIED: SnapshotEncoding
SNAPSHOT_ENCODING_RAW: SnapshotEncoding
SNAPSHOT_ENCODING_ZLIB: SnapshotEncoding
SNAPSHOT_ENCODING_POSITIONS: SnapshotEncoding
SNAPSHOT_PURPOSE_UNSPECIFIED: SnapshotPurpose
SNAPSHOT_PURPOSE_RESYNC: SnapshotPurpose
SNAPSHOT_PURPOSE_REBUILD: SnapshotPurpose

class Geometry(_message.Message):
    __slots__ = ("bits", "hashes", "scheme", "seed")
    BITS_FIELD_NUMBER: _ClassVar[int]
    HASHES_FIELD_NUMBER: _ClassVar[int]
    SCHEME_FIELD_NUMBER: _ClassVar[int]
    SEED_FIELD_NUMBER: _ClassVar[int]
    bits: int
    hashes: int
    scheme: HashScheme
    seed: int
    def __init__(self, bits: _Optional[int] = ..., hashes: _Optional[int] = ..., scheme: _Optional[_Union[HashScheme, str]] = ..., seed: _Optional[int] = ...) -> None: ...

class Delta(_message.Message):
    __slots__ = ("epoch", "sequence", "payload", "checksum", "key_count")
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    PAYLOAD_FIELD_NUMBER: _ClassVar[int]
    CHECKSUM_FIELD_NUMBER: _ClassVar[int]
    KEY_COUNT_FIELD_NUMBER: _ClassVar[int]
    epoch: int
    sequence: int
    payload: bytes
    checksum: int
    key_count: int
    def __init__(self, epoch: _Optional[int] = ..., sequence: _Optional[int] = ..., payload: _Optional[bytes] = ..., checksum: _Optional[int] = ..., key_count: _Optional[int] = ...) -> None: ...

class SnapshotChunk(_message.Message):
    __slots__ = ("snapshot_id", "epoch", "sequence", "geometry", "encoding", "purpose", "chunk_index", "chunk_count", "total_bytes", "data", "checksum", "key_count", "capacity")
    SNAPSHOT_ID_FIELD_NUMBER: _ClassVar[int]
    EPOCH_FIELD_NUMBER: _ClassVar[int]
    SEQUENCE_FIELD_NUMBER: _ClassVar[int]
    GEOMETRY_FIELD_NUMBER: _ClassVar[int]
    ENCODING_FIELD_NUMBER: _ClassVar[int]
    PURPOSE_FIELD_NUMBER: _ClassVar[int]
    CHUNK_INDEX_FIELD_NUMBER: _ClassVar[int]
    CHUNK_COUNT_FIELD_NUMBER: _ClassVar[int]
    TOTAL_BYTES_FIELD_NUMBER: _ClassVar[int]
    DATA_FIELD_NUMBER: _ClassVar[int]
    CHECKSUM_FIELD_NUMBER: _ClassVar[int]
    KEY_COUNT_FIELD_NUMBER: _ClassVar[int]
    CAPACITY_FIELD_NUMBER: _ClassVar[int]
    snapshot_id: int
    epoch: int
    sequence: int
    geometry: Geometry
    encoding: SnapshotEncoding
    purpose: SnapshotPurpose
    chunk_index: int
    chunk_count: int
    total_bytes: int
    data: bytes
    checksum: int
    key_count: int
    capacity: int
    def __init__(self, snapshot_id: _Optional[int] = ..., epoch: _Optional[int] = ..., sequence: _Optional[int] = ..., geometry: _Optional[_Union[Geometry, _Mapping]] = ..., encoding: _Optional[_Union[SnapshotEncoding, str]] = ..., purpose: _Optional[_Union[SnapshotPurpose, str]] = ..., chunk_index: _Optional[int] = ..., chunk_count: _Optional[int] = ..., total_bytes: _Optional[int] = ..., data: _Optional[bytes] = ..., checksum: _Optional[int] = ..., key_count: _Optional[int] = ..., capacity: _Optional[int] = ...) -> None: ...
