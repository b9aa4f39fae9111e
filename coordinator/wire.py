"""LocateReply / LocateBatchReply in protobuf wire format, straight from CandidateLists.

Locate and LocateBatch answer with bytes the router service's serializer passes through, so
a batch costs no message object per candidate. The bytes are what the generated classes
would produce for the same lists (tests/unit/test_coordinator_candidates.py decodes them with
the protobuf library): a LocateReply is its `candidates` (field 1) entries, each a
length-delimited Candidate; a LocateBatchReply is its `results` (field 1) entries, each a
length-delimited LocateReply (protobuf encoding guide, "Length-Delimited Records").
"""

from __future__ import annotations

import numpy as np

from shardsieve.codec import write_varint
from shardsieve.coordinator.candidates import CandidateLists
from shardsieve.v1 import routing_pb2

FIELD_1_LEN = b"\x0a"          # tag of field 1, wire type 2 (length-delimited)
EMPTY_RESULT = b"\x0a\x00"     # a LocateBatchReply entry holding an empty LocateReply


def varint(value: int) -> bytes:
    """Protobuf base-128 varint (protobuf encoding guide, "Base 128 Varints"): unsigned LEB128."""
    out = bytearray()
    write_varint(out, value)
    return bytes(out)


def framed(body: bytes) -> bytes:
    """`body` as a length-delimited field 1."""
    return FIELD_1_LEN + varint(len(body)) + body


class ReplyEncoder:
    """Encodes candidate lists; the field of each distinct (node, address, stale, hinted) is
    built once and cached (bounded: a fleet has few nodes, addresses change rarely). The cache
    only holds what its key determines, so concurrent calls may share it without a lock: at
    worst an entry is built twice."""

    def __init__(self, max_cached: int = 4096) -> None:
        self._fields: dict[tuple[str, str, bool, bool], bytes] = {}
        self._max_cached = max_cached

    def _field(self, node_id: str, address: str, stale: bool, hinted: bool) -> bytes:
        """The `candidates` entry (field 1 of LocateReply) of one Candidate."""
        key = (node_id, address, stale, hinted)
        field = self._fields.get(key)
        if field is None:
            if len(self._fields) >= self._max_cached:
                self._fields = {}
            body = routing_pb2.Candidate(node_id=node_id, address=address, stale=stale,
                                         hinted=hinted).SerializeToString()
            field = self._fields[key] = framed(body)
        return field

    def _entry(self, lists: CandidateLists, node_id: str, hinted: bool) -> bytes:
        return self._field(node_id, lists.addresses.get(node_id, ""), node_id not in lists.fresh, hinted)

    def _tail(self, lists: CandidateLists, nodes: tuple[str, ...]) -> bytes:
        return b"".join(self._field(n, lists.addresses.get(n, ""), True, False) for n in nodes)

    def _reply(self, lists: CandidateLists, i: int, tail: bytes) -> bytes:
        """Key i's LocateReply; `tail` is the encoded stale_tail."""
        entry = self._entry
        a, b = int(lists.offsets[i]), int(lists.offsets[i + 1])
        if lists.plain and b - a == 1:
            return entry(lists, lists.matched[a], False)
        parts = [entry(lists, n, False) for n in lists.matched[a:b]]
        if lists.hinted is not None:
            parts += [entry(lists, n, True) for n in lists.hinted[i]]
        if lists.stale_tail:
            own = lists.tails.get(i)
            parts.append(tail if own is None else self._tail(lists, own))
        return b"".join(parts)

    def locate_reply(self, lists: CandidateLists, i: int = 0) -> bytes:
        """Key i's candidates as a LocateReply message."""
        return self._reply(lists, i, self._tail(lists, lists.stale_tail))

    def locate_batch_reply(self, lists: CandidateLists) -> bytes:
        """Every key's candidates as one LocateBatchReply message."""
        if not lists.plain:
            tail = self._tail(lists, lists.stale_tail)
            return b"".join(framed(self._reply(lists, i, tail)) for i in range(len(lists)))
        # The common case: filter matches only; frame each node's entry once per call.
        names = lists.matched
        addresses, fresh, field = lists.addresses, lists.fresh, self._field
        entry = {n: framed(field(n, addresses.get(n, ""), n not in fresh, False)) for n in set(names)}
        counts = np.diff(lists.offsets)
        if counts.size and int(counts.max()) <= 1:
            parts = [EMPTY_RESULT] * len(lists)
            for i, n in zip(np.flatnonzero(counts).tolist(), names):
                parts[i] = entry[n]
            return b"".join(parts)
        offsets = lists.offsets.tolist()
        parts = []
        for i in range(len(lists)):
            a, b = offsets[i], offsets[i + 1]
            if b - a == 1:
                parts.append(entry[names[a]])
            else:
                parts.append(framed(b"".join(self._entry(lists, n, False) for n in names[a:b])))
        return b"".join(parts)
