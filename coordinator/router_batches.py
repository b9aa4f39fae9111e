"""ReadBatch / WriteBatch / RemoveBatch: many keys per call, one node batch call per node.

The single-key paths of coordinator/router_service.py, for a batch: the keys' candidates come
from one lookup (every key counts as one lookup, as a Read would), the keys are grouped by
candidate node and each node gets ONE NodeStorage batch call (BatchGet / BatchPut /
BatchDelete), all nodes at once. Results are per key, in request order; a key whose part
failed gets the KeyError (code, message, ErrorDetail) its single-key call would have failed
with, so a client treats both the same (shardsieve/error_detail.py).

Freshness and read-your-writes are the single-key paths' own: the same candidate merge
(coordinator/candidates.py: filter matches, hints, stale nodes in safe mode), every
acknowledged write held as a hint (docs/architecture.md#2-read-your-writes-through-a-coordinator),
the same false-positive accounting and probe metrics per key.

Limits: at most `max_items` keys (setting max-batch-items; the nodes' own max-batch bounds
what one node call may carry) and `max_bytes` of keys and values (setting max-batch-bytes);
a larger batch, or one with a malformed key or value, is refused whole with INVALID_ARGUMENT
naming the setting or the item, and nothing is sent to any node
(docs/architecture.md#5-bad-input-changes-nothing).
"""

from __future__ import annotations

import asyncio
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import grpc

from shardsieve import error_detail as ed
from shardsieve.coordinator.accounting import ProbeOutcome
from shardsieve.coordinator.candidates import Candidate
from shardsieve.coordinator.probes import ProbeResult
from shardsieve.coordinator.router_service import OFF_LOOP_KEYS, Router, RouterError, _check_key, batch_too_large
from shardsieve.v1 import routing_pb2, storage_pb2

DEFAULT_MAX_ITEMS = 1000
DEFAULT_MAX_BYTES = 16 << 20


@dataclass
class NodePlan:
    """The keys (request indices) one node is asked about, in one batch call."""

    address: str
    items: list[int] = field(default_factory=list)
    where: dict[int, int] = field(default_factory=dict)    # request index -> position in the node call

    def add(self, i: int) -> None:
        if i not in self.where:
            self.where[i] = len(self.items)
            self.items.append(i)


Plan = dict[str, NodePlan]


def _add(plan: Plan, node_id: str, address: str, i: int) -> None:
    entry = plan.get(node_id)
    if entry is None:
        entry = plan[node_id] = NodePlan(address)
    entry.add(i)


class BatchRouter:
    """The batch calls over a Router's state, prober and accounting."""

    def __init__(self, router: Router, *, max_items: int = DEFAULT_MAX_ITEMS,
                 max_bytes: int = DEFAULT_MAX_BYTES) -> None:
        self.router = router
        self.max_items = max_items
        self.max_bytes = max_bytes

    # -- limits ------------------------------------------------------------------------------------
    def _check(self, keys: Sequence[bytes], value_bytes: int = 0) -> None:
        if len(keys) > self.max_items:
            raise batch_too_large(len(keys), self.max_items, "max-batch-items")
        total = sum(map(len, keys)) + value_bytes
        if total > self.max_bytes:
            raise RouterError(grpc.StatusCode.INVALID_ARGUMENT,
                              f"batch of {total} bytes of keys and values exceeds the limit of {self.max_bytes} "
                              "(setting max-batch-bytes); split it",
                              ed.detail(ed.LIMIT_EXCEEDED, setting="max-batch-bytes"))
        for i, key in enumerate(keys):
            _check_key(key, f"key #{i}", self.router.max_key_bytes)

    # -- plumbing ----------------------------------------------------------------------------------
    async def _candidates(self, keys: list[bytes], kind: str) -> list[list[Candidate]]:
        return await self.router.shell.call(self.router.locate, keys, kind, off_loop=len(keys) >= OFF_LOOP_KEYS)

    async def _ask(self, plan: Plan, method: str, request: Callable[[list[int]], Any],
                   deadline_s: float) -> dict[str, ProbeResult]:
        """One `method` call per node of the plan, all at once; each node's result (a failed call
        is a result too). A reply with fewer entries than asked counts as a failed call."""
        nodes = list(plan)
        calls = [self.router.prober.call(n, plan[n].address, method, request(plan[n].items), deadline_s)
                 for n in nodes]
        results = dict(zip(nodes, await asyncio.gather(*calls)))
        for n, r in results.items():
            if r.reached and len(_entries(r.reply)) < len(plan[n].items):
                results[n] = ProbeResult(n, error=_ShortReply(n, len(plan[n].items), len(_entries(r.reply))),
                                         seconds=r.seconds)
        return results

    async def _addresses(self, node_ids: set[str]) -> dict[str, str | None]:
        def read() -> dict[str, str | None]:
            return {n: self.router._address(n)[0] for n in node_ids}
        return await self.router.shell.call(read)

    # -- ReadBatch ---------------------------------------------------------------------------------
    async def read_many(self, keys: list[bytes], deadline_ms: int = 0) -> routing_pb2.ReadBatchReply:
        self._check(keys)
        router = self.router
        rows = await self._candidates(keys, "read")
        plan: Plan = {}
        for i, cands in enumerate(rows):
            for c in cands:
                _add(plan, c.node_id, c.address, i)
        deadline_s = deadline_ms / 1000.0 if deadline_ms else router.read_deadline_s
        indexed = await router.shell.call(router._indexed)
        results = await self._ask(plan, "BatchGet", lambda items: storage_pb2.BatchGetRequest(
            keys=[keys[i] for i in items]), deadline_s)
        reply = routing_pb2.ReadBatchReply(node_calls=len(plan))
        reads: list[list[ProbeOutcome]] = []
        probes: list[ProbeResult] = []
        for i, cands in enumerate(rows):
            out = reply.results.add(candidates=len(cands))
            outcomes: list[ProbeOutcome] = []
            failed: list[ProbeResult] = []
            for c in cands:
                r = results[c.node_id]
                if not r.reached:
                    failed.append(r)
                    probes.append(r)
                    outcomes.append(ProbeOutcome(c.node_id, consulted=c.node_id in indexed,
                                                 listed_by_filter=c.listed_by_filter, probed=True, reached=False))
                    continue
                item = r.reply.items[plan[c.node_id].where[i]]
                probes.append(ProbeResult(c.node_id, reply=item, seconds=r.seconds))
                outcomes.append(ProbeOutcome(c.node_id, consulted=c.node_id in indexed,
                                             listed_by_filter=c.listed_by_filter, probed=True, found=item.found))
                if item.found and not out.found:
                    out.found, out.value, out.node_id = True, item.value, c.node_id
                elif not item.found:
                    out.wasted_probes += 1
            listed = {c.node_id for c in cands}
            outcomes += [ProbeOutcome(n, consulted=True, listed_by_filter=False, probed=False)
                         for n in indexed - listed]
            reads.append(outcomes)
            if failed and not out.found:
                out.error.CopyFrom(router._unreachable("read", keys[i], failed, cands).key_error())
        await router.shell.call(self._record_reads, reads)
        if router.metrics is not None:
            router.metrics.observe_probes(probes)  # type: ignore[attr-defined]
        return reply

    def _record_reads(self, reads: list[list[ProbeOutcome]]) -> None:
        with self.router.shell.lock:
            for outcomes in reads:
                self.router.accounting.record_read(outcomes)

    # -- WriteBatch --------------------------------------------------------------------------------
    async def write_many(self, items: Sequence[routing_pb2.WriteRequest]) -> routing_pb2.WriteBatchReply:
        router = self.router
        keys = [it.key for it in items]
        for i, it in enumerate(items):
            if len(it.value) > router.max_value_bytes:
                raise RouterError(grpc.StatusCode.INVALID_ARGUMENT,
                                  f"value #{i} has {len(it.value)} bytes; the largest accepted is "
                                  f"{router.max_value_bytes} (setting max-value-bytes)",
                                  ed.detail(ed.LIMIT_EXCEEDED, key=it.key, setting="max-value-bytes"))
            if it.move and not it.node_id:
                raise RouterError(grpc.StatusCode.INVALID_ARGUMENT, f"item #{i}: move needs a node id to move the "
                                  "key to", ed.detail(ed.INVALID_INPUT, key=it.key))
        self._check(keys, sum(len(it.value) for it in items))
        reply = routing_pb2.WriteBatchReply()
        results = [reply.results.add() for _ in items]
        named = {it.node_id for it in items if it.node_id}
        addresses = await self._addresses(named)
        rows = await self._candidates(keys, "write")
        # 1. who holds each key now (the candidates; for a named node, the others)
        plan: Plan = {}
        for i, (it, cands) in enumerate(zip(items, rows)):
            if it.node_id and addresses.get(it.node_id) is None:
                known = await router.shell.call(lambda: router._address(it.node_id)[1])
                results[i].error.CopyFrom(RouterError(
                    grpc.StatusCode.NOT_FOUND, f"unknown node id {it.node_id!r} (known: {known})",
                    ed.detail(ed.UNKNOWN_NODE, key=it.key)).key_error())
                continue
            for c in cands:
                if c.node_id != it.node_id:
                    _add(plan, c.node_id, c.address, i)
        asked = await self._ask(plan, "BatchGet", lambda idx: storage_pb2.BatchGetRequest(
            keys=[keys[i] for i in idx]), router.read_deadline_s)
        calls = len(plan)
        targets: dict[int, str] = {}
        elsewhere: dict[int, list[str]] = {}
        place: str | None = None
        for i, (it, cands) in enumerate(zip(items, rows)):
            if results[i].HasField("error"):
                continue
            holders, failed = [], []
            for c in cands:
                if c.node_id == it.node_id:
                    continue
                r = asked[c.node_id]
                if not r.reached:
                    failed.append(r)
                elif r.reply.items[plan[c.node_id].where[i]].found:
                    holders.append(c.node_id)
            if failed and (it.node_id or not holders):
                what = f"write on {it.node_id} (the key may be held there)" if it.node_id else \
                    "write (the key may exist there)"
                results[i].error.CopyFrom(router._unreachable(what, it.key, failed, cands,
                                                              effect=ed.EFFECT_NONE).key_error())
            elif it.node_id:
                if holders and not it.move:
                    results[i].error.CopyFrom(RouterError(
                        grpc.StatusCode.FAILED_PRECONDITION,
                        f"key {it.key[:64]!r} is held by {', '.join(sorted(holders))}; writing it on {it.node_id} too "
                        "would make a second copy; write it without a node, or move it",
                        ed.detail(ed.SECOND_COPY, key=it.key, holders=sorted(holders),
                                  effect=ed.EFFECT_NONE)).key_error())
                else:
                    targets[i] = it.node_id
                    elsewhere[i] = sorted(holders)
            elif holders:
                targets[i] = holders[0]
            else:
                if place is None:
                    place = await router.shell.call(router._place) or ""
                if not place:
                    results[i].error.CopyFrom(RouterError(
                        grpc.StatusCode.UNAVAILABLE, "no node is connected; nowhere to place the write",
                        ed.detail(ed.NO_NODE, key=it.key, effect=ed.EFFECT_NONE)).key_error())
                else:
                    targets[i] = place
        # 2. the writes, one BatchPut per target node
        target_addresses = {**{c.node_id: c.address for row in rows for c in row},
                            **{n: a for n, a in addresses.items() if a},
                            **(await self._addresses(set(targets.values()) - named))}
        puts: Plan = {}
        for i, node_id in targets.items():
            _add(puts, node_id, target_addresses.get(node_id) or "", i)
        acked = await self._ask(puts, "BatchPut", lambda idx: storage_pb2.BatchPutRequest(
            items=[storage_pb2.PutRequest(key=keys[i], value=items[i].value) for i in idx]), router.write_deadline_s)
        calls += len(puts)
        moves: Plan = {}
        for i, node_id in targets.items():
            r = acked[node_id]
            if not r.reached:
                results[i].error.CopyFrom(router._node_error("write", keys[i], node_id, puts[node_id].address,
                                                             r).key_error())
                continue
            ack = r.reply.acks[puts[node_id].where[i]]
            try:
                await router.hold_acked_hint(keys[i], node_id, ack)
            except RouterError as exc:
                results[i].error.CopyFrom(exc.key_error())
                continue
            results[i].reply.CopyFrom(routing_pb2.WriteReply(node_id=node_id, created=ack.created, epoch=ack.epoch,
                                                             sequence=ack.sequence))
            for holder in elsewhere.get(i, ()):
                _add(moves, holder, target_addresses.get(holder) or "", i)
        # 3. moves: delete the old copies, one BatchDelete per old holder
        if moves:
            deleted = await self._ask(moves, "BatchDelete", lambda idx: storage_pb2.BatchDeleteRequest(
                keys=[keys[i] for i in idx]), router.write_deadline_s)
            calls += len(moves)
            for i in sorted({i for p in moves.values() for i in p.items}):
                holders = elsewhere[i]
                failed = [deleted[h] for h in holders if not deleted[h].reached]
                if failed:
                    target = results[i].reply
                    results[i].error.CopyFrom(RouterError(
                        grpc.StatusCode.UNAVAILABLE,
                        f"move of key {keys[i][:64]!r} unfinished: written on {target.node_id} but the old copy could "
                        f"not be deleted ({'; '.join(r.describe_error() for r in failed)}); repeat the move once that "
                        "node is reachable",
                        ed.detail(ed.MOVE_UNFINISHED, key=keys[i], effect=ed.EFFECT_PARTIAL, done_on=[target.node_id],
                                  nodes=[ed.node_failure(r.node_id, moves[r.node_id].address, r.code,
                                                         r.error.details() or "") for r in failed])).key_error())
                else:
                    results[i].reply.moved_from.extend(holders)
        reply.node_calls = calls
        return reply

    # -- RemoveBatch -------------------------------------------------------------------------------
    async def remove_many(self, keys: list[bytes]) -> routing_pb2.RemoveBatchReply:
        self._check(keys)
        router = self.router
        rows = await self._candidates(keys, "remove")
        plan: Plan = {}
        for i, cands in enumerate(rows):
            for c in cands:
                _add(plan, c.node_id, c.address, i)
        results = await self._ask(plan, "BatchDelete", lambda items: storage_pb2.BatchDeleteRequest(
            keys=[keys[i] for i in items]), router.write_deadline_s)
        reply = routing_pb2.RemoveBatchReply(node_calls=len(plan))
        for i, cands in enumerate(rows):
            out = reply.results.add()
            removed, failed = [], []
            for c in cands:
                r = results[c.node_id]
                if not r.reached:
                    failed.append(r)
                elif r.reply.acks[plan[c.node_id].where[i]].created:
                    removed.append(c.node_id)
            if failed:
                out.error.CopyFrom(router._unreachable(
                    "remove", keys[i], failed, cands, done=sorted(removed),
                    effect=ed.EFFECT_PARTIAL if removed else ed.EFFECT_UNKNOWN).key_error())
            else:
                out.node_ids.extend(sorted(removed))
        return reply


def _entries(reply: Any) -> Sequence[Any]:
    """The per-key entries of a node batch reply (BatchGetReply.items, BatchWriteAck.acks)."""
    return reply.items if isinstance(reply, storage_pb2.BatchGetReply) else reply.acks


class _ShortReply(grpc.RpcError):
    """A node batch reply with fewer entries than keys asked (a node bug): no key of it is known."""

    def __init__(self, node_id: str, asked: int, got: int) -> None:
        super().__init__(f"node {node_id} answered {got} entries for {asked} keys")
        self._detail = f"node {node_id} answered {got} entries for {asked} keys"

    def code(self) -> grpc.StatusCode:
        return grpc.StatusCode.INTERNAL

    def details(self) -> str:
        return self._detail
