"""What the client's calls return: plain frozen records, one per key."""

from __future__ import annotations

from dataclasses import dataclass

from shardsieve.client.errors import ShardsieveError

COORDINATOR = "coordinator"   # the call went through a coordinator's Router
LOCAL = "local"               # located in this process, nodes probed directly (local routing)


@dataclass(frozen=True, slots=True)
class Candidate:
    """A node that may hold a key. `stale`: listed because its replica may lag (safe mode);
    `hinted`: listed by a read-your-writes hint rather than its filter."""

    node_id: str
    address: str
    stale: bool = False
    hinted: bool = False


@dataclass(frozen=True, slots=True)
class ReadResult:
    """One key's read. `found` False means absence is proven: every candidate answered "not
    here" (a candidate that could not be asked raises CandidateUnavailable instead, or sets
    `error` in a batch). `node_id`: the node that served the value."""

    key: bytes
    found: bool
    value: bytes | None = None
    node_id: str | None = None
    candidates: int = 0
    wasted_probes: int = 0
    route: str = COORDINATOR
    error: ShardsieveError | None = None

    @property
    def ok(self) -> bool:
        return self.error is None


@dataclass(frozen=True, slots=True)
class WriteResult:
    """One key's write: the node that holds it now, whether the key was new there, the node's
    acknowledgement position (epoch, sequence) and, for a move, the nodes the old copy left."""

    key: bytes
    node_id: str = ""
    created: bool = False
    epoch: int = 0
    sequence: int = 0
    moved_from: tuple[str, ...] = ()
    error: ShardsieveError | None = None

    @property
    def ok(self) -> bool:
        return self.error is None


@dataclass(frozen=True, slots=True)
class DeleteResult:
    """One key's delete: the nodes that held and deleted it (empty: it was on no node)."""

    key: bytes
    node_ids: tuple[str, ...] = ()
    error: ShardsieveError | None = None

    @property
    def deleted(self) -> bool:
        return bool(self.node_ids)

    @property
    def ok(self) -> bool:
        return self.error is None
