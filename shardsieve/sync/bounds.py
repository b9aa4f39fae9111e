"""The largest epoch and sequence a position (epoch, sequence) may carry.

Both are uint64 on the wire (proto/shardsieve/v1/sync.proto, filter.proto), and a node moves on
by adding one: to the sequence for every delta, to the highest epoch for every start, rebuild
and abandoned rebuild. A position at 2^64 - 1 could never be followed, so a coordinator holding
it would freeze while the node still showed as in sync. The bound is the largest signed 64-bit
integer instead: one more always fits the wire field, every number also fits a signed 64-bit
store (SQLite INTEGER, sqlite.org/datatype3.html), and an honest node never gets near it (a
delta every millisecond reaches 2^63 after about 292 million years). docs/sync-protocol.md,
"Positions that cannot follow", has the rules that use it.
"""

from __future__ import annotations

MAX_EPOCH = 2**63 - 1
MAX_SEQUENCE = 2**63 - 1
