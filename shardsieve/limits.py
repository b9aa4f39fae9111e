"""Limits on what a sync peer may send, and the plausibility of a filter's fill (no I/O).

Why: whoever pushes a node's filter decides where its keys can be found, and a peer that
declares a huge geometry or snapshot could make the coordinator hold gigabytes. These
checks run on every NodeMessage *before* the protocol object sees it, so a message past a
limit ends the stream (RESOURCE_EXHAUSTED / INVALID_ARGUMENT) with nothing changed.

A filter within the limits can still be hostile: an all-ones filter draws a probe for every
key, an all-zero one hides the node's keys. `fill_implausibility` compares the fill with
what the declared key count can produce; such a filter is applied (the node may be right
about its own keys) but flagged in status and metrics.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from shardsieve.geometry import MAX_BITS, MAX_HASHES, MIN_BITS
from shardsieve.sizing import expected_fill
from shardsieve.snapshot import MAX_CHUNK_BYTES
from shardsieve.sync.errors import InvalidHello, MalformedMessage, SyncError
from shardsieve.v1 import filter_pb2, sync_pb2

MAX_ADDRESS_CHARS = 256
MAX_REASON_CHARS = 1024


#: Trailing metadata key that names the coordinator setting a refused stream broke, so a node
#: can act on the refusal without reading message text (e.g. give up a rebuild whose filter size
#: the coordinator refuses, docs/node.md, "Rebuild").
LIMIT_METADATA_KEY = "shardsieve-limit"
FILTER_SIZE_LIMIT = "max-filter-bits"


class LimitExceeded(SyncError):
    """A message is larger than this coordinator accepts; the stream ends, nothing changed.
    `setting` names the coordinator setting that was broken ("" for fixed limits)."""

    grpc_status_name = "RESOURCE_EXHAUSTED"

    def __init__(self, message: str, setting: str = "") -> None:
        super().__init__(message)
        self.setting = setting


@dataclass(frozen=True)
class SyncLimits:
    """What a coordinator accepts on a sync stream (settings max-filter-bits, ...)."""

    max_filter_bits: int = 1 << 34         # 2 GiB of replica per node
    max_snapshot_chunks: int = 4096        # of at most 1 MiB each
    max_delta_bytes: int = 16 << 20

    def validate(self) -> None:
        if not MIN_BITS <= self.max_filter_bits <= MAX_BITS:
            raise ValueError(f"max-filter-bits must be between {MIN_BITS} and {MAX_BITS}, got {self.max_filter_bits}")
        if self.max_snapshot_chunks < 1:
            raise ValueError(f"max-snapshot-chunks must be at least 1, got {self.max_snapshot_chunks}")
        if self.max_delta_bytes < 1:
            raise ValueError(f"max-delta-bytes must be at least 1, got {self.max_delta_bytes}")

    @property
    def max_snapshot_bytes(self) -> int:
        """The largest encoded snapshot: the raw bytes of the largest accepted filter."""
        return min((self.max_filter_bits + 7) // 8, self.max_snapshot_chunks * MAX_CHUNK_BYTES)


# --------------------------------------------------------------------------- node ids

#: Longest node id: a node id is the common name of the node's certificate, and X.509 bounds a
#: common name at 64 characters (RFC 5280, Appendix A.1, ub-common-name).
MAX_NODE_ID_CHARS = 64
NODE_ID_PATTERN = re.compile(r"[a-z0-9][a-z0-9._-]{0,63}")
#: The node id rule in words, for every error message that refuses an id (docs/node.md, "Node ids").
NODE_ID_RULE = (f"1 to {MAX_NODE_ID_CHARS} characters from a-z, 0-9, '.', '_' and '-', starting with a "
                "letter or digit")


def node_id_problem(node_id: object) -> str:
    """'' when `node_id` is a valid node id, else what is wrong with it, naming the rule.

    The one statement of the node id alphabet (docs/node.md, "Node ids"). Why so narrow: a node
    id names a file (certificates, tokens), a certificate's common name, a metrics label and a
    routing entry, and operators type it. Lower-case ASCII only, so two ids never differ by case
    alone or by a look-alike letter from another script (Cyrillic 'о' beside Latin 'o'); the
    first character is a letter or digit, so '.', '..' and '-flag' are not ids; no '/' and no
    control characters."""
    if not isinstance(node_id, str):
        return f"a node id is text, got {type(node_id).__name__}: a node id is {NODE_ID_RULE}"
    if NODE_ID_PATTERN.fullmatch(node_id):
        return ""
    shown = repr(node_id[:MAX_NODE_ID_CHARS]) + ("..." if len(node_id) > MAX_NODE_ID_CHARS else "")
    if not node_id:
        what = "is empty"
    elif len(node_id) > MAX_NODE_ID_CHARS:
        what = f"has {len(node_id)} characters"
    else:
        index, char = next((i, c) for i, c in enumerate(node_id)
                           if not NODE_ID_PATTERN.fullmatch(c if i == 0 else "a" + c))
        where = "at the start" if index == 0 else f"at position {index}"
        what = f"has {char!r} (U+{ord(char):04X}) {where}"
    return f"node id {shown} {what}: a node id is {NODE_ID_RULE}"


def valid_node_id(node_id: object) -> bool:
    """Whether `node_id` follows the node id alphabet (`node_id_problem` says why not)."""
    return not node_id_problem(node_id)


def _check_geometry(g: filter_pb2.Geometry, limits: SyncLimits, where: str) -> None:
    if g.bits > limits.max_filter_bits:
        raise LimitExceeded(f"{where} declares a filter of {g.bits} bits; this coordinator accepts at most "
                            f"{limits.max_filter_bits} (setting max-filter-bits)", FILTER_SIZE_LIMIT)
    if g.hashes > MAX_HASHES:
        raise LimitExceeded(f"{where} declares {g.hashes} hash functions; at most {MAX_HASHES} are accepted")


def check_node_message(msg: sync_pb2.NodeMessage, limits: SyncLimits) -> None:
    """Raise LimitExceeded / InvalidHello / MalformedMessage when msg breaks a limit."""
    if not isinstance(msg, sync_pb2.NodeMessage):
        raise MalformedMessage(f"the sync stream carried bytes that are not a NodeMessage "
                               f"({getattr(msg, 'error', type(msg).__name__)[:200]})")
    kind = msg.WhichOneof("body")
    if kind is None:
        raise MalformedMessage("a sync message with no body (or a body this coordinator does not know)")
    if kind == "hello":
        h = msg.hello
        problem = node_id_problem(h.node_id)
        if problem:
            raise InvalidHello(f"Hello.node_id: {problem}")
        if len(h.storage_address) > MAX_ADDRESS_CHARS:
            raise InvalidHello(f"Hello.storage_address has {len(h.storage_address)} characters; "
                               f"at most {MAX_ADDRESS_CHARS}")
        if h.HasField("geometry"):
            _check_geometry(h.geometry, limits, "Hello")
    elif kind == "delta":
        if len(msg.delta.payload) > limits.max_delta_bytes:
            raise LimitExceeded(f"delta {msg.delta.sequence} carries {len(msg.delta.payload)} bytes; at most "
                                f"{limits.max_delta_bytes} are accepted (setting max-delta-bytes)", "max-delta-bytes")
    elif kind == "snapshot_chunk":
        c = msg.snapshot_chunk
        if c.HasField("geometry"):
            _check_geometry(c.geometry, limits, f"snapshot {c.snapshot_id}")
        if c.chunk_count > limits.max_snapshot_chunks:
            raise LimitExceeded(f"snapshot {c.snapshot_id} declares {c.chunk_count} chunks; at most "
                                f"{limits.max_snapshot_chunks} are accepted (setting max-snapshot-chunks)",
                                "max-snapshot-chunks")
        if c.total_bytes > limits.max_snapshot_bytes:
            raise LimitExceeded(f"snapshot {c.snapshot_id} declares {c.total_bytes} bytes; at most "
                                f"{limits.max_snapshot_bytes} are accepted")
        if c.HasField("geometry") and c.total_bytes > (c.geometry.bits + 7) // 8:
            raise LimitExceeded(f"snapshot {c.snapshot_id} declares {c.total_bytes} bytes, more than the "
                                f"{(c.geometry.bits + 7) // 8} raw bytes of its own {c.geometry.bits}-bit geometry")
        if len(c.data) > MAX_CHUNK_BYTES:
            raise LimitExceeded(f"snapshot {c.snapshot_id} chunk {c.chunk_index} is {len(c.data)} bytes; "
                                f"chunks are at most {MAX_CHUNK_BYTES}")
    elif kind == "heartbeat":
        if len(msg.heartbeat.stats.rebuild_phase) > MAX_REASON_CHARS:
            raise LimitExceeded(f"heartbeat rebuild_phase has {len(msg.heartbeat.stats.rebuild_phase)} characters")


# --------------------------------------------------------------------------- plausibility

#: Chance, per check, that an honest filter is flagged (the Hoeffding tail bound below).
FALSE_ALARM = 1e-12


def fill_tolerance(bits: int) -> float:
    """Deviation of the fill beyond which an honest filter is flagged with chance < FALSE_ALARM.

    The bit indicators of a Bloom filter are negatively associated (Dubhashi & Ranjan,
    "Balls and Bins: A Study in Negative Dependence", 1998), so Hoeffding's bound for m
    independent indicators holds: P(|fill - E| >= eps) <= 2 exp(-2 m eps^2); solved for eps."""
    return math.sqrt(math.log(2.0 / FALSE_ALARM) / (2.0 * max(bits, 1)))


def fill_implausibility(set_bits: int, bits: int, hashes: int, key_count: int) -> str:
    """'' when set_bits is plausible for key_count keys in an (m, k) filter, else the reason.

    Hard bound: n keys set at most k n bits. Statistical bound: fill within fill_tolerance of
    expected_fill (both directions: too full draws probes for every key, too empty hides keys)."""
    if bits <= 0 or hashes <= 0:
        return ""
    fill = set_bits / bits
    if set_bits > hashes * key_count:
        return (f"{set_bits} bits set but {key_count} keys x {hashes} hashes can set at most "
                f"{hashes * key_count}")
    expected = expected_fill(bits, hashes, key_count)
    tol = fill_tolerance(bits)
    if fill > expected + tol:
        return f"fill {fill:.4f} is far above the {expected:.4f} expected for {key_count} keys (tolerance {tol:.4f})"
    if fill < expected - tol:
        return f"fill {fill:.4f} is far below the {expected:.4f} expected for {key_count} keys (tolerance {tol:.4f})"
    return ""
