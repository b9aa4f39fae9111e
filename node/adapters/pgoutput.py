"""Decoder of the pgoutput logical replication messages (protocol version 1), no I/O.

Layout per PostgreSQL docs, "Logical Replication Message Formats" (Int8/16/32/64 are
big-endian, String is NUL-terminated). Only what the agent reads is decoded: Begin, Commit,
Relation, Insert, Update, Delete, Truncate and Message; Origin and Type messages are
recognised and skipped. Tuple columns come in text form ('t'), as null ('n') or as an
unchanged TOASTed value ('u', UNCHANGED here).
"""

from __future__ import annotations

import struct
from dataclasses import dataclass
from typing import Union


class PgOutputError(ValueError):
    """A message is truncated or of an unknown kind (the stream is not what we asked for)."""


class _Unchanged:
    def __repr__(self) -> str:
        return "UNCHANGED"


UNCHANGED = _Unchanged()
Value = Union[bytes, None, _Unchanged]


@dataclass(frozen=True)
class Column:
    name: str
    type_oid: int
    is_key: bool   # part of the replica identity


@dataclass(frozen=True)
class Relation:
    relid: int
    namespace: str
    name: str
    replica_identity: str   # 'd' default (primary key), 'n' nothing, 'f' full, 'i' index
    columns: tuple[Column, ...]


@dataclass(frozen=True)
class Begin:
    final_lsn: int
    xid: int


@dataclass(frozen=True)
class Commit:
    commit_lsn: int
    end_lsn: int


@dataclass(frozen=True)
class Insert:
    relid: int
    new: tuple[Value, ...]


@dataclass(frozen=True)
class Update:
    relid: int
    old: tuple[Value, ...] | None   # 'K' (identity columns) or 'O' (full row); None: identity unchanged
    new: tuple[Value, ...]


@dataclass(frozen=True)
class Delete:
    relid: int
    old: tuple[Value, ...]


@dataclass(frozen=True)
class Truncate:
    relids: tuple[int, ...]


@dataclass(frozen=True)
class LogicalMessage:
    transactional: bool
    lsn: int
    prefix: str
    content: bytes


@dataclass(frozen=True)
class Skipped:
    kind: str


PgMessage = Union[Begin, Commit, Relation, Insert, Update, Delete, Truncate, LogicalMessage, Skipped]


class _Reader:
    def __init__(self, data: bytes) -> None:
        self.data = data
        self.pos = 0

    def take(self, n: int) -> bytes:
        if self.pos + n > len(self.data):
            raise PgOutputError(f"message truncated: wanted {n} bytes at offset {self.pos} of {len(self.data)}")
        out = self.data[self.pos:self.pos + n]
        self.pos += n
        return out

    def int8(self) -> int:
        return self.take(1)[0]

    def int16(self) -> int:
        return struct.unpack(">h", self.take(2))[0]

    def int32(self) -> int:
        return struct.unpack(">i", self.take(4))[0]

    def uint32(self) -> int:
        return struct.unpack(">I", self.take(4))[0]

    def int64(self) -> int:
        return struct.unpack(">q", self.take(8))[0]

    def string(self) -> str:
        end = self.data.find(b"\x00", self.pos)
        if end < 0:
            raise PgOutputError(f"unterminated string at offset {self.pos}")
        out = self.data[self.pos:end].decode("utf-8")
        self.pos = end + 1
        return out

    def tuple(self) -> tuple[Value, ...]:
        values: list[Value] = []
        for _ in range(self.int16()):
            kind = chr(self.int8())
            if kind == "n":
                values.append(None)
            elif kind == "u":
                values.append(UNCHANGED)
            elif kind in ("t", "b"):
                values.append(self.take(self.int32()))
            else:
                raise PgOutputError(f"unknown tuple column kind {kind!r}")
        return tuple(values)


_U32 = struct.Struct(">I")
_I16 = struct.Struct(">h")
_I32 = struct.Struct(">i")
NOT_THIS = Skipped("not an insert of the relation asked for")


def insert_value(payload: bytes, relid: int, index: int) -> Value | Skipped:
    """The feed's fast path: for an Insert into relation `relid`, column `index` of its new
    tuple, read without decoding the other columns (the agent needs the key only). NOT_THIS
    for any other message: decode() it. Same layout and errors as decode()."""
    if payload[:1] != b"I" or len(payload) < 8 or _U32.unpack_from(payload, 1)[0] != relid:
        return NOT_THIS
    if payload[5] != 78:                          # 'N'
        raise PgOutputError("Insert without a new tuple")
    (count,) = _I16.unpack_from(payload, 6)
    if not 0 <= index < count:
        raise PgOutputError(f"Insert has {count} columns, the key is column {index}")
    pos = 8
    for i in range(index + 1):
        if pos >= len(payload):
            raise PgOutputError(f"message truncated at offset {pos} of {len(payload)}")
        kind = payload[pos]
        pos += 1
        if kind == 116 or kind == 98:             # 't' text, 'b' binary
            if pos + 4 > len(payload):
                raise PgOutputError(f"message truncated at offset {pos} of {len(payload)}")
            (length,) = _I32.unpack_from(payload, pos)
            pos += 4
            if pos + length > len(payload):
                raise PgOutputError(f"message truncated: wanted {length} bytes at offset {pos} of {len(payload)}")
            if i == index:
                return payload[pos:pos + length]
            pos += length
        elif kind == 110:                         # 'n' null
            if i == index:
                return None
        elif kind == 117:                         # 'u' unchanged TOASTed value
            if i == index:
                return UNCHANGED
        else:
            raise PgOutputError(f"unknown tuple column kind {chr(kind)!r}")
    raise AssertionError("unreachable")


def decode(payload: bytes) -> PgMessage:
    """One pgoutput message (the payload of an XLogData frame)."""
    r = _Reader(bytes(payload))
    kind = chr(r.int8())
    if kind == "B":
        final_lsn = r.int64()
        r.int64()   # commit timestamp
        return Begin(final_lsn, r.uint32())
    if kind == "C":
        r.int8()    # flags
        commit_lsn = r.int64()
        end_lsn = r.int64()
        r.int64()   # commit timestamp
        return Commit(commit_lsn, end_lsn)
    if kind == "R":
        relid = r.uint32()
        namespace = r.string()
        name = r.string()
        identity = chr(r.int8())
        columns = []
        for _ in range(r.int16()):
            flags = r.int8()
            col_name = r.string()
            type_oid = r.uint32()
            r.int32()   # type modifier
            columns.append(Column(col_name, type_oid, bool(flags & 1)))
        return Relation(relid, namespace, name, identity, tuple(columns))
    if kind == "I":
        relid = r.uint32()
        if chr(r.int8()) != "N":
            raise PgOutputError("Insert without a new tuple")
        return Insert(relid, r.tuple())
    if kind == "U":
        relid = r.uint32()
        marker = chr(r.int8())
        old = None
        if marker in ("K", "O"):
            old = r.tuple()
            marker = chr(r.int8())
        if marker != "N":
            raise PgOutputError(f"Update without a new tuple (got {marker!r})")
        return Update(relid, old, r.tuple())
    if kind == "D":
        relid = r.uint32()
        marker = chr(r.int8())
        if marker not in ("K", "O"):
            raise PgOutputError(f"Delete without an old tuple (got {marker!r})")
        return Delete(relid, r.tuple())
    if kind == "T":
        count = r.int32()
        r.int8()    # options (CASCADE, RESTART IDENTITY)
        return Truncate(tuple(r.uint32() for _ in range(count)))
    if kind == "M":
        flags = r.int8()
        lsn = r.int64()
        prefix = r.string()
        return LogicalMessage(bool(flags & 1), lsn, prefix, r.take(r.int32()))
    if kind in ("O", "Y"):
        return Skipped(kind)
    raise PgOutputError(f"unknown pgoutput message kind {kind!r}")
