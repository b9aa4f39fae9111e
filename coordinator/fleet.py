"""What a coordinator knows about its fleet: node records, filter replicas (the routing index),
read-your-writes hints, accounting, policy and the monitor's decisions.

This is the one shared state object; the gRPC servicers are thin adapters over it. It takes the
current time as an argument (no clock inside) so the freshness rules are testable.

Candidates of a key (the freshness contract, README "Freshness contract"):
  (a) every node whose replica filter has all k bits of the key set;
  (b) every node holding a read-your-writes hint for the key;
  (c) in safe mode, every stale node (stream down, no replica yet, or no applied change or
      heartbeat for stale-after seconds), marked stale; fast mode leaves them out.
"""

from __future__ import annotations

import collections
import json
import logging
import os
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from shardsieve.coordinator.accounting import Accounting, ProbeOutcome
from shardsieve.coordinator.hints import Hint, HintTable
from shardsieve.coordinator.policy import Policy
from shardsieve.coordinator.routing_index import RoutingIndex
from shardsieve.coordinator.saturation import Decision, NodeView, SaturationMonitor
from shardsieve.changeset import ChangeSet
from shardsieve.codec import write_varint
from shardsieve.geometry import Geometry
from shardsieve.hashing import positions as hash_positions
from shardsieve.sizing import fill_fpr

log = logging.getLogger("shardsieve.coordinator.fleet")


@dataclass
class NodeRecord:
    """Everything known about one node; mutated only under Fleet's lock."""

    node_id: str
    address: str = ""
    connected: bool = False
    stream_id: int | None = None
    synced: bool = False                 # a verified replica is in the index
    geometry: Geometry | None = None
    epoch: int = 0
    sequence: int = 0
    checksum: int = 0                    # of the replica at (epoch, sequence)
    set_bits: int = 0
    key_count: int = 0
    capacity: int = 0
    target_fpr: float = 0.0
    push_interval_ms: int = 0
    last_progress: float = float("-inf")  # time of the last applied change, snapshot or heartbeat
    delta_bytes: int = 0
    deltas: int = 0
    snapshots: int = 0
    stats: dict[str, Any] = field(default_factory=dict)   # last heartbeat's NodeStats fields
    awaiting: str | None = None          # reason of an outstanding NeedSnapshot (replica may lack changes)
    rebuild_phase: str = ""
    rebuild_progress: float = 0.0

    @property
    def fill(self) -> float:
        return self.set_bits / self.geometry.bits if self.geometry else 0.0

    @property
    def predicted_fpr(self) -> float:
        return fill_fpr(self.fill, self.geometry.hashes) if self.geometry else 0.0


def varint(value: int) -> bytes:
    """Protobuf base-128 varint (protobuf encoding guide, "Base 128 Varints"): unsigned LEB128."""
    out = bytearray()
    write_varint(out, value)
    return bytes(out)


def _cand_field(cache: dict[tuple[str, str, bool, bool], bytes], node_id: str, address: str, stale: bool,
                hinted: bool) -> bytes:
    """`candidates` field (number 1, length-delimited) of a LocateReply holding one Candidate."""
    key = (node_id, address, stale, hinted)
    field_bytes = cache.get(key)
    if field_bytes is None:
        from shardsieve.v1 import routing_pb2

        body = routing_pb2.Candidate(node_id=node_id, address=address, stale=stale, hinted=hinted).SerializeToString()
        field_bytes = cache[key] = b"\x0a" + varint(len(body)) + body
    return field_bytes


@dataclass(frozen=True)
class Candidate:
    node_id: str
    address: str
    stale: bool
    hinted: bool
    listed_by_filter: bool


class Fleet:
    """Node records + routing index + hints + accounting + policy + decisions; thread-safe."""

    def __init__(self, policy: Policy, *, state_dir: Path | None = None,
                 expected: dict[str, str] | None = None, monitor: SaturationMonitor | None = None,
                 max_hints: int = 1_000_000, max_decisions: int = 1000, hint_max_age_s: float = 300.0,
                 locate_threads: int = 0) -> None:
        self._lock = threading.RLock()
        self.policy = policy
        self.index = RoutingIndex(locate_threads)
        self.hints = HintTable(max_hints)
        self.hint_max_age_s = hint_max_age_s
        self.hints_expired = 0               # hints dropped by age while their write was not applied
        self.accounting = Accounting()
        self.monitor = monitor or SaturationMonitor()
        self.decisions: collections.deque[Decision] = collections.deque(maxlen=max_decisions)
        self.nodes: dict[str, NodeRecord] = {}
        self.state_dir = state_dir
        self._wire_cache: dict[tuple[str, str, bool, bool], bytes] = {}
        for node_id, address in (expected or {}).items():
            self.nodes[node_id] = NodeRecord(node_id, address)
        if state_dir is not None:
            for node_id, address in self._load_membership().items():
                self.nodes.setdefault(node_id, NodeRecord(node_id, address))

    # -- membership file ------------------------------------------------------------------------
    def _membership_path(self) -> Path | None:
        return None if self.state_dir is None else self.state_dir / "nodes.json"

    def _load_membership(self) -> dict[str, str]:
        path = self._membership_path()
        if path is None or not path.exists():
            return {}
        try:
            data = json.loads(path.read_text())
            return {str(k): str(v) for k, v in data.get("nodes", {}).items()}
        except (OSError, ValueError, AttributeError) as exc:
            log.warning("membership file unreadable; starting without it",
                        extra={"path": str(path), "error": str(exc)})
            return {}

    def _save_membership(self) -> None:
        path = self._membership_path()
        if path is None:
            return
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_suffix(".tmp")
        tmp.write_text(json.dumps({"nodes": {n: r.address for n, r in sorted(self.nodes.items())}}, indent=1))
        os.replace(tmp, path)

    # -- replica sink (the coordinator-side sync object applies into these) -------------------------
    def install(self, node_id: str, bloom: Any) -> None:
        """Swap in a whole verified filter (a shardsieve.bloom.BloomFilter) for node_id."""
        column = bloom.to_bytes()
        self.index.install(node_id, bloom.geometry, column)
        set_bits = int(np.unpackbits(np.frombuffer(column, dtype=np.uint8)).sum())
        with self._lock:
            rec = self.nodes.setdefault(node_id, NodeRecord(node_id))
            rec.geometry, rec.set_bits = bloom.geometry, set_bits

    def apply(self, node_id: str, changes: ChangeSet) -> None:
        """Apply one verified change set to node_id's replica in place (FilterDivergedError: nothing changed)."""
        self.index.apply(node_id, changes.set_positions, changes.cleared_positions)
        with self._lock:
            rec = self.nodes.setdefault(node_id, NodeRecord(node_id))
            rec.set_bits += int(changes.set_positions.size) - int(changes.cleared_positions.size)

    def remove(self, node_id: str) -> None:
        """Drop node_id's replica (it stays known, and stale, until it resyncs)."""
        self.index.remove(node_id)
        with self._lock:
            rec = self.nodes.get(node_id)
            if rec is not None:
                rec.synced = False

    # -- protocol state (copied from the coordinator-side sync object after each message) ------------
    def observe(self, view: Any) -> None:
        """Refresh a node record from a shardsieve.sync.coordinator_side.NodeView; drop covered hints."""
        with self._lock:
            rec = self.nodes.get(view.node_id)
            if rec is None:
                rec = self.nodes[view.node_id] = NodeRecord(view.node_id)
            moved = bool(view.storage_address) and rec.address != view.storage_address
            if view.storage_address:
                rec.address = view.storage_address
            rec.connected = view.connected
            rec.synced = view.has_replica
            rec.awaiting = view.awaiting_snapshot
            if view.epoch != rec.epoch and view.has_replica:
                self.accounting.new_epoch(view.node_id, view.epoch)
            rec.epoch, rec.sequence, rec.checksum = view.epoch, view.sequence, view.checksum
            if view.geometry is not None:
                rec.geometry = view.geometry
            rec.key_count, rec.capacity = view.key_count, view.capacity
            rec.target_fpr, rec.push_interval_ms = view.target_fpr, view.push_interval_ms
            if view.last_heard_at is not None:
                rec.last_progress = view.last_heard_at
            if view.stats is not None:
                st = view.stats
                rec.stats = {"reads": st.reads, "reads_missed": st.reads_missed, "writes": st.writes,
                             "deletes": st.deletes, "key_count": st.key_count, "capacity": st.capacity,
                             "rebuild_phase": st.rebuild_phase, "rebuild_progress": st.rebuild_progress,
                             "rebuild_epoch": st.rebuild_epoch, "epoch": st.epoch, "sequence": st.sequence}
            rec.rebuild_phase = view.rebuild.phase
            rec.rebuild_progress = view.rebuild.progress
            rec.delta_bytes = view.counters.delta_bytes
            rec.deltas = view.counters.deltas_applied
            rec.snapshots = view.counters.snapshots_installed
            if moved:
                self._save_membership()
        if view.has_replica:
            self.hints.applied(view.node_id, view.epoch, view.sequence)

    # -- freshness ---------------------------------------------------------------------------------
    def is_stale(self, rec: NodeRecord, now: float, policy: Policy | None = None) -> bool:
        policy = policy or self.policy
        return (not rec.connected or not rec.synced or rec.awaiting is not None
                or now - rec.last_progress > policy.stale_after_s)

    def state_of(self, rec: NodeRecord, now: float) -> str:
        if not rec.connected:
            return "disconnected"
        if not rec.synced:
            return "syncing"
        if rec.awaiting is not None:
            return "syncing"
        # The node's latest heartbeat says whether it is rebuilding ("" when idle).
        if rec.node_id in self.monitor.in_flight or rec.stats.get("rebuild_phase"):
            return "rebuilding"
        if now - rec.last_progress > self.policy.stale_after_s:
            return "stale"
        return "in-sync"

    # -- lookups -----------------------------------------------------------------------------------
    def _lookup(self, keys: Sequence[bytes], now: float, mode: str | None) -> tuple[Any, Any, set[str], list[str], dict[str, str]]:
        found = self.index.locate(keys, hash_positions)
        hinted = self.hints.lookup_many(keys)
        with self._lock:
            policy = self.policy
            mode = mode or policy.mode
            stale_ids = {n for n, r in self.nodes.items() if self.is_stale(r, now, policy)}
            addresses = {n: r.address for n, r in self.nodes.items()}
        stale_list = sorted(stale_ids) if mode == "safe" else []
        return found, hinted, stale_ids, stale_list, addresses

    def candidates(self, keys: Sequence[bytes], now: float, mode: str | None = None) -> list[list[Candidate]]:
        """Candidates per key under the freshness contract (see module docstring)."""
        found, hinted, stale_ids, stale_list, addresses = self._lookup(keys, now, mode)
        out: list[list[Candidate]] = []
        offsets = found.offsets.tolist()
        names = found.nodes
        for i in range(len(keys)):
            listed = names[offsets[i]:offsets[i + 1]]
            row = [Candidate(n, addresses.get(n, ""), n in stale_ids, False, True) for n in listed]
            if hinted is not None and hinted[i]:
                seen = set(listed)
                for n in hinted[i]:
                    if n not in seen:
                        row.append(Candidate(n, addresses.get(n, ""), n in stale_ids, True, False))
                        seen.add(n)
            if stale_list:
                seen = {c.node_id for c in row}
                row.extend(Candidate(n, addresses.get(n, ""), True, False, False) for n in stale_list if n not in seen)
            out.append(row)
        return out

    def candidates_wire(self, keys: Sequence[bytes], now: float, mode: str | None = None) -> tuple[list[bytes], int]:
        """The same candidate lists, each already encoded as a LocateReply message (protobuf wire
        format), plus the total number of candidates. Saves building a Python object per
        candidate on the LocateBatch path; the encoding of each distinct Candidate is cached."""
        found, hinted, stale_ids, stale_list, addresses = self._lookup(keys, now, mode)
        enc = self._wire_cache
        offsets = found.offsets.tolist()
        names = found.nodes
        out: list[bytes] = []
        total = 0
        extras_enc = b"".join(_cand_field(enc, n, addresses.get(n, ""), True, False) for n in stale_list)
        stale_set = set(stale_list)
        for i in range(len(keys)):
            a, b = offsets[i], offsets[i + 1]
            hint_row = hinted[i] if hinted is not None else None
            if not stale_list and not hint_row:
                if b - a == 1:
                    n = names[a]
                    out.append(_cand_field(enc, n, addresses.get(n, ""), n in stale_ids, False))
                else:
                    out.append(b"".join(_cand_field(enc, n, addresses.get(n, ""), n in stale_ids, False)
                                        for n in names[a:b]))
                total += b - a
                continue
            listed = names[a:b]
            seen = set(listed)
            parts = [_cand_field(enc, n, addresses.get(n, ""), n in stale_ids, False) for n in listed]
            for n in hint_row or ():
                if n not in seen:
                    parts.append(_cand_field(enc, n, addresses.get(n, ""), n in stale_ids, True))
                    seen.add(n)
            if stale_list:
                if seen & stale_set:
                    parts.extend(_cand_field(enc, n, addresses.get(n, ""), True, False)
                                 for n in stale_list if n not in seen)
                    seen |= stale_set
                else:
                    parts.append(extras_enc)
                    seen |= stale_set
            total += len(seen)
            out.append(b"".join(parts))
        return out, total

    def locate_batch_wire(self, keys: Sequence[bytes], now: float, mode: str | None = None) -> tuple[bytes, int]:
        """A whole LocateBatchReply in protobuf wire format, and the number of candidates.

        Fast path for the common case (no stale node listed, no hints): each key's reply is the
        framed field of its one candidate, looked up from a per-call table of the nodes.
        """
        found, hinted, stale_ids, stale_list, addresses = self._lookup(keys, now, mode)
        if stale_list or hinted is not None:
            replies, total = self.candidates_wire(keys, now, mode)
            return b"".join(b"\x0a" + varint(len(r)) + r for r in replies), total
        enc = self._wire_cache
        framed: dict[str, bytes] = {}
        for n in set(found.nodes):
            f = _cand_field(enc, n, addresses.get(n, ""), n in stale_ids, False)
            framed[n] = b"\x0a" + varint(len(f)) + f
        counts = np.diff(found.offsets)
        names = found.nodes
        if counts.size and int(counts.max()) <= 1:
            parts = [b"\x0a\x00"] * len(keys)
            where = np.flatnonzero(counts).tolist()
            for i, n in zip(where, names):
                parts[i] = framed[n]
            return b"".join(parts), len(names)
        offsets = found.offsets.tolist()
        parts = []
        for i in range(len(keys)):
            a, b = offsets[i], offsets[i + 1]
            if b - a == 1:
                parts.append(framed[names[a]])
            else:
                body = b"".join(_cand_field(enc, n, addresses.get(n, ""), n in stale_ids, False) for n in names[a:b])
                parts.append(b"\x0a" + varint(len(body)) + body)
        return b"".join(parts), len(names)

    def indexed_nodes(self) -> list[str]:
        return self.index.nodes()

    def address_of(self, node_id: str) -> str | None:
        with self._lock:
            rec = self.nodes.get(node_id)
            return rec.address if rec else None

    def applied(self, node_id: str) -> tuple[int, int] | None:
        with self._lock:
            rec = self.nodes.get(node_id)
            return (rec.epoch, rec.sequence) if rec is not None and rec.synced else None

    # -- read-your-writes hints ----------------------------------------------------------------------
    def add_hint(self, key: bytes, node_id: str, epoch: int, sequence: int, now: float,
                 old: tuple[int, int] | None = None) -> bool:
        """Hold a hint for a write node_id acknowledged at (epoch, sequence) (and `old` during a
        hand-over) unless its replica already holds it; a node forgotten meanwhile gets none."""
        with self._lock:
            if node_id not in self.nodes:
                return False
            return self.hints.add(key, node_id, epoch, sequence, applied=self.applied(node_id), old=old, now=now)

    def expire_hints(self, now: float) -> list[Hint]:
        """Drop hints older than hint-max-age-s (last resort: their change never arrived, e.g.
        the node's sync stalls). Each one whose write the replica still lacks is logged with its
        numbers; in safe mode that node is listed anyway while it is stale. Returns them."""
        expired = self.hints.expire(now, self.hint_max_age_s)
        lacking = []
        for hint in expired:
            replica = self.applied(hint.node_id)
            if replica is not None and hint.covered_by(replica):
                continue   # applied; the drop just had not happened yet
            lacking.append(hint)
            with self._lock:
                rec = self.nodes.get(hint.node_id)
                stale = rec is None or self.is_stale(rec, now)
                mode = self.policy.mode
            log.warning("read-your-writes hint expired before the replica held the write", extra={
                "node_id": hint.node_id, "key": hint.key[:64].hex(), "key_bytes": len(hint.key),
                "hint_epoch": hint.position[0], "hint_sequence": hint.position[1],
                "old_epoch": hint.old[0] if hint.old else None, "old_sequence": hint.old[1] if hint.old else None,
                "replica_epoch": replica[0] if replica else None,
                "replica_sequence": replica[1] if replica else None,
                "age_s": round(now - (hint.added_at or now), 3), "max_age_s": self.hint_max_age_s,
                "node_stale": stale, "mode": mode,
                "still_listed": stale and mode == "safe"})
        self.hints_expired += len(lacking)
        return lacking

    # -- decommission -------------------------------------------------------------------------------
    def forget(self, node_id: str) -> dict[str, Any] | None:
        """Stop tracking node_id for good: record, replica column, hints, accounting, monitor
        state, and the state dir's membership entry. Returns what it had (None: unknown).
        The caller removes it from the sync protocol object first (SyncService.forget)."""
        with self._lock:
            rec = self.nodes.pop(node_id, None)
            if rec is None:
                return None
            had_replica = self.index.remove(node_id)
            hints = self.hints.drop_node(node_id)
            self.accounting.forget(node_id)
            self.monitor.forget(node_id)
            for k in [k for k in self._wire_cache if k[0] == node_id]:
                del self._wire_cache[k]
            self._save_membership()
        log.info("node forgotten", extra={"node_id": node_id, "address": rec.address, "was_connected": rec.connected,
                                          "had_replica": had_replica, "hints_dropped": hints,
                                          "key_count": rec.key_count})
        return {"node_id": node_id, "address": rec.address, "was_connected": rec.connected,
                "had_replica": bool(had_replica), "hints_dropped": hints, "key_count": rec.key_count}

    def placement(self, now: float, exclude: set[str] = frozenset()) -> str | None:  # type: ignore[assignment]
        """The connected, fresh node with the most free capacity (capacity - keys)."""
        with self._lock:
            live = [r for r in self.nodes.values() if r.node_id not in exclude and not self.is_stale(r, now)]
            if not live:
                live = [r for r in self.nodes.values() if r.node_id not in exclude and r.connected]
            if not live:
                return None
            return max(live, key=lambda r: (r.capacity - r.key_count, r.node_id)).node_id

    # -- accounting --------------------------------------------------------------------------------
    def record_read(self, outcomes: list[ProbeOutcome]) -> None:
        self.accounting.record_read(outcomes)

    # -- policy and monitor --------------------------------------------------------------------------
    def set_policy(self, policy: Policy) -> None:
        with self._lock:
            self.policy = policy

    def views(self, now: float) -> list[NodeView]:
        counters, _ = self.accounting.snapshot()
        with self._lock:
            out = []
            for rec in self.nodes.values():
                if not rec.synced or rec.geometry is None:
                    continue
                c = counters.get(rec.node_id)
                out.append(NodeView(rec.node_id, rec.epoch, rec.key_count, max(1, rec.capacity), rec.fill,
                                    rec.geometry.hashes, rec.geometry.bits,
                                    c.lookups_checked if c else 0, c.false_positives if c else 0,
                                    in_sync=not self.is_stale(rec, now)))
            return out

    def record_decisions(self, decisions: list[Decision]) -> None:
        for d in decisions:
            self.decisions.append(d)
            log.info("monitor decision", extra={"node_id": d.node_id, "action": d.action, "detail": d.detail})

    def records(self) -> list[NodeRecord]:
        with self._lock:
            return [NodeRecord(**{k: getattr(r, k) for k in r.__dataclass_fields__}) for r in self.nodes.values()]
