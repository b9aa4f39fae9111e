"""Router servicer: Locate / LocateBatch / Read / Write / Remove over the coordinator's state.

Candidates come from the one merge of coordinator/candidates.py; Locate and LocateBatch answer
with bytes encoded by coordinator/wire.py. Reads probe every candidate at once and return at
the first hit; a read that found nothing while some candidate could not be asked fails with
UNAVAILABLE naming it (absence is not proven). A write without a node id first asks the
candidates whether the key exists (so an overwrite lands where the key lives), else goes to
placement (the fresh node with the most free capacity); the node's ack becomes a
read-your-writes hint (docs/architecture.md#2-read-your-writes-through-a-coordinator).

Everything runs on the coordinator's event loop: reads of the coordinator's state go through
`CoordinatorShell.call`, probes are grpc.aio calls gathered at once (coordinator/probes.py),
and a LocateBatch of `OFF_LOOP_KEYS` keys or more is matched in a worker thread, so a large
batch never delays a single-key Locate or a Read (docs/coordinator.md, "Event loop and threads").
"""

from __future__ import annotations

import asyncio
import logging
import time
from typing import Any, Awaitable, Callable, Iterable

import grpc

from shardsieve.coordinator.accounting import Accounting, ProbeOutcome
from shardsieve.coordinator.candidates import Candidate, CandidateFinder, CandidateLists
from shardsieve.coordinator.hints import HintTable
from shardsieve.coordinator.membership import Membership, is_stale
from shardsieve.coordinator.policy import LivePolicy, Policy
from shardsieve.coordinator.probes import ProbeResult, Prober
from shardsieve.coordinator.shell import CoordinatorShell
from shardsieve.coordinator.wire import ReplyEncoder
from shardsieve import error_detail as ed
from shardsieve.sync.coordinator_side import NodeState
from shardsieve.v1 import routing_pb2, storage_pb2

log = logging.getLogger("shardsieve.coordinator.router")

# Kinds of candidate lookups counted as lookups (metrics): reads and locates, never a write's probes.
LOOKUP_KINDS = frozenset({"locate", "read"})
MAX_BATCH_KEYS = 100_000
MAX_KEY_BYTES = 64 * 1024
MAX_VALUE_BYTES = 16 << 20
# A LocateBatch at least this large is matched in a worker thread (a 256-key batch takes a few
# hundred microseconds in process: shardsieve bench routing); smaller ones are answered on the loop.
OFF_LOOP_KEYS = 256


class RouterError(Exception):
    """A Router call's failure: its gRPC code, a message for people, and the machine-readable
    ErrorDetail clients decide by (shardsieve/error_detail.py)."""

    def __init__(self, code: grpc.StatusCode, message: str, detail: routing_pb2.ErrorDetail | None = None) -> None:
        super().__init__(message)
        self.code = code
        self.message = message
        self.detail = detail

    def key_error(self) -> routing_pb2.KeyError:
        """This failure as a batch call's per-key error."""
        return routing_pb2.KeyError(code=self.code.value[0], message=self.message, detail=self.detail)


def _check_key(key: bytes, what: str = "key", limit: int = MAX_KEY_BYTES) -> None:
    if not key:
        raise RouterError(grpc.StatusCode.INVALID_ARGUMENT, f"{what} must not be empty",
                          ed.detail(ed.INVALID_INPUT))
    if len(key) > limit:
        raise RouterError(grpc.StatusCode.INVALID_ARGUMENT,
                          f"{what} has {len(key)} bytes; the largest accepted is {limit} (setting max-key-bytes)",
                          ed.detail(ed.LIMIT_EXCEEDED, setting="max-key-bytes"))


def batch_too_large(count: int, limit: int, setting: str, what: str = "keys") -> RouterError:
    return RouterError(grpc.StatusCode.INVALID_ARGUMENT,
                       f"batch of {count} {what} exceeds the limit of {limit} (setting {setting}); split it",
                       ed.detail(ed.LIMIT_EXCEEDED, setting=setting))


def most_free_capacity(nodes: Iterable[tuple[str, NodeState | None]], policy: Policy, now: float,
                       exclude: frozenset[str] = frozenset()) -> str | None:
    """Placement of a new key: the fresh node with the most free capacity (capacity - keys);
    without a fresh one, the connected one with the most; None when none is connected."""
    nodes = [(n, s) for n, s in nodes if n not in exclude and s is not None]
    live = [(n, s) for n, s in nodes if not is_stale(s, policy, now)] or [(n, s) for n, s in nodes if s.connected]
    if not live:
        return None
    return max(live, key=lambda item: (item[1].capacity - item[1].key_count, item[0]))[0]


class Router:
    """The routing logic behind the gRPC servicer (usable in-process by tests and benchmarks)."""

    def __init__(self, candidates: CandidateFinder, shell: CoordinatorShell, membership: Membership,
                 hints: HintTable, accounting: Accounting, policy: LivePolicy, prober: Prober, *,
                 expire_hints: Callable[[float], object] | None = None, read_deadline_s: float = 2.0,
                 write_deadline_s: float = 5.0, clock: Callable[[], float] = time.monotonic,
                 metrics: object | None = None, max_key_bytes: int = MAX_KEY_BYTES,
                 max_value_bytes: int = MAX_VALUE_BYTES, max_batch_keys: int = MAX_BATCH_KEYS) -> None:
        """expire_hints(now): drops hints past their age before a write adds one
        (coordinator/operations.py; None: only the monitor's pass does)."""
        self.candidates = candidates
        self.shell = shell
        self.membership = membership
        self.hints = hints
        self.accounting = accounting
        self.policy = policy
        self.prober = prober
        self.expire_hints = expire_hints
        self.max_key_bytes = max_key_bytes
        self.max_value_bytes = max_value_bytes
        self.max_batch_keys = max_batch_keys
        self.read_deadline_s = read_deadline_s
        self.write_deadline_s = write_deadline_s
        self.clock = clock
        self.metrics = metrics
        self._background: set[asyncio.Future[Any]] = set()

    # -- locate ------------------------------------------------------------------------------------
    def locate(self, keys: list[bytes], kind: str = "locate") -> list[list[Candidate]]:
        """Candidates of each key as objects (the read, write and remove paths)."""
        if len(keys) > self.max_batch_keys:
            raise batch_too_large(len(keys), self.max_batch_keys, "max-batch-keys")
        for i, key in enumerate(keys):
            _check_key(key, f"key #{i}", self.max_key_bytes)
        result = self.candidates.find(keys, self.clock()).rows()
        if self.metrics is not None and kind in LOOKUP_KINDS:   # a write's or a remove's probes are not lookups
            self.metrics.observe_locate(kind, [len(c) for c in result])  # type: ignore[attr-defined]
        return result

    def _check_batch(self, keys: list[bytes]) -> None:
        if len(keys) > self.max_batch_keys:
            raise batch_too_large(len(keys), self.max_batch_keys, "max-batch-keys")
        if keys and (min(map(len, keys)) == 0 or max(map(len, keys)) > self.max_key_bytes):
            for i, key in enumerate(keys):
                _check_key(key, f"key #{i}", self.max_key_bytes)

    def locate_lists(self, keys: list[bytes]) -> CandidateLists:
        """Candidates of each key in compact form (the Locate and LocateBatch paths)."""
        self._check_batch(keys)
        lists = self.candidates.find(keys, self.clock())
        if self.metrics is not None:
            self.metrics.observe_locate_total("locate", len(keys), lists.total)  # type: ignore[attr-defined]
        return lists

    # -- probing with accounting ----------------------------------------------------------------------
    def _indexed(self) -> set[str]:
        """The nodes whose filter was consulted: every one with a replica."""
        with self.shell.lock:
            return {state.node_id for state in self.shell.nodes() if state.has_replica}

    def _record(self, cands: list[Candidate], results: list[ProbeResult]) -> None:
        """Account one read from its candidates and their probes' results; every node with a
        replica was consulted (the filters are read under the same lock)."""
        with self.shell.lock:
            indexed = {state.node_id for state in self.shell.nodes() if state.has_replica}
            listed = {c.node_id: c for c in cands}
            by_node = {r.node_id: r for r in results}
            outcomes = []
            for node_id, cand in listed.items():
                r = by_node.get(node_id)
                reached = r is not None and r.reached
                outcomes.append(ProbeOutcome(node_id, consulted=node_id in indexed,
                                             listed_by_filter=cand.listed_by_filter, probed=True,
                                             found=bool(reached and r.reply.found), reached=reached))  # type: ignore[union-attr]
            for node_id in indexed - listed.keys():
                outcomes.append(ProbeOutcome(node_id, consulted=True, listed_by_filter=False, probed=False))
            self.accounting.record_read(outcomes)

    async def _probe_get(self, key: bytes, cands: list[Candidate], deadline_s: float,
                         as_read: bool = True) -> tuple[ProbeResult | None, list[ProbeResult]]:
        """Ask every candidate for key; return (first hit or None, results known so far). A read's
        probes feed the false-positive accounting; a write's (as_read=False) only the probe metrics.

        With one candidate (or none), the common case of a fleet whose filters are sized right,
        the probe is awaited directly: no task per probe, no completion machinery."""
        def account(results: list[ProbeResult]) -> None:     # once every probe finished, hit or not
            if as_read:
                self._spawn(self.shell.call(self._record, cands, results))
            if self.metrics is not None:
                self.metrics.observe_probes(results)  # type: ignore[attr-defined]

        if not cands:
            account([])
            return None, []
        if len(cands) == 1:
            # shielded: a read cancelled meanwhile (its caller gave up) still lets the probe
            # finish and be accounted, as the node counts it
            probe = asyncio.ensure_future(self.prober.call(cands[0].node_id, cands[0].address, "Get",
                                                           storage_pb2.GetRequest(key=key), deadline_s))
            probe.add_done_callback(lambda done: None if done.cancelled() else account([done.result()]))
            result = await asyncio.shield(probe)
            return (result if result.reached and result.reply.found else None), [result]
        targets = [(c.node_id, c.address) for c in cands]
        seen: list[ProbeResult] = []
        for arriving in self.prober.ask_all(targets, "Get", storage_pb2.GetRequest(key=key), deadline_s, account):
            result = await arriving
            seen.append(result)
            if result.reached and result.reply.found:
                return result, seen
        return None, seen

    def _spawn(self, work: Awaitable[Any]) -> None:
        task = asyncio.ensure_future(work)
        self._background.add(task)
        task.add_done_callback(self._background.discard)

    # -- read / write / remove ------------------------------------------------------------------------
    async def read(self, key: bytes, deadline_ms: int = 0) -> routing_pb2.ReadReply:
        _check_key(key, limit=self.max_key_bytes)
        cands = (await self.shell.call(self.locate, [key], "read"))[0]
        deadline_s = deadline_ms / 1000.0 if deadline_ms else self.read_deadline_s
        hit, seen = await self._probe_get(key, cands, deadline_s)
        wasted = sum(1 for r in seen if r.reached and not r.reply.found)
        if hit is not None:
            return routing_pb2.ReadReply(found=True, value=hit.reply.value, node_id=hit.node_id, probes=len(cands),
                                         wasted_probes=wasted, candidates=len(cands))
        failed = [r for r in seen if not r.reached]
        if failed:
            raise self._unreachable("read", key, failed, cands)
        return routing_pb2.ReadReply(found=False, probes=len(cands), wasted_probes=wasted, candidates=len(cands))

    def _address(self, node_id: str) -> tuple[str | None, str]:
        """(node_id's storage address or None when unknown, the known node ids for an error)."""
        with self.shell.lock:
            return self.membership.address(node_id), ", ".join(self.membership.node_ids()) or "none"

    async def write(self, key: bytes, value: bytes, node_id: str = "", move: bool = False) -> routing_pb2.WriteReply:
        """Write key on the node holding it, else where placement puts it; or on node_id. A key is
        on one node: a write on node_id of a key held elsewhere is refused unless `move`, which
        writes the new copy first and then deletes the others (docs/coordinator.md, "Writes")."""
        _check_key(key, limit=self.max_key_bytes)
        if len(value) > self.max_value_bytes:
            raise RouterError(grpc.StatusCode.INVALID_ARGUMENT,
                              f"value has {len(value)} bytes; the largest accepted is {self.max_value_bytes} "
                              "(setting max-value-bytes)", ed.detail(ed.LIMIT_EXCEEDED, setting="max-value-bytes"))
        if move and not node_id:
            raise RouterError(grpc.StatusCode.INVALID_ARGUMENT, "move needs a node id to move the key to",
                              ed.detail(ed.INVALID_INPUT))
        elsewhere: list[str] = []
        if node_id:
            address, known = await self.shell.call(self._address, node_id)
            if address is None:
                raise RouterError(grpc.StatusCode.NOT_FOUND, f"unknown node id {node_id!r} (known: {known})",
                                  ed.detail(ed.UNKNOWN_NODE, key=key))
            target = node_id
            cands = (await self.shell.call(self.locate, [key], "write"))[0]
            holders, failed = await self._holders(key, [c for c in cands if c.node_id != node_id])
            if failed:
                raise self._unreachable(f"write on {node_id} (the key may be held there)", key, failed, cands,
                                        effect=ed.EFFECT_NONE)
            if holders and not move:
                raise RouterError(grpc.StatusCode.FAILED_PRECONDITION,
                                  f"key {key[:64]!r} is held by {', '.join(holders)}; writing it on {node_id} too would "
                                  "make a second copy (reads would answer either value). Write without a node to "
                                  "update it where it is, or move it (move / `shardsieve put --node "
                                  f"{node_id} --move`): the new copy is written, then the old one deleted",
                                  ed.detail(ed.SECOND_COPY, key=key, holders=holders, effect=ed.EFFECT_NONE))
            elsewhere = holders
        else:
            cands = (await self.shell.call(self.locate, [key], "write"))[0]
            hit, seen = await self._probe_get(key, cands, self.read_deadline_s, as_read=False)
            if hit is not None:
                target = hit.node_id
            else:
                failed = [r for r in seen if not r.reached]
                if failed:
                    raise self._unreachable("write (the key may exist there)", key, failed, cands,
                                            effect=ed.EFFECT_NONE)
                picked = await self.shell.call(self._place)
                if picked is None:
                    raise RouterError(grpc.StatusCode.UNAVAILABLE, "no node is connected; nowhere to place the write",
                                      ed.detail(ed.NO_NODE, key=key, effect=ed.EFFECT_NONE))
                target = picked
            address = (await self.shell.call(self._address, target))[0] or ""
        result = await self.prober.call(target, address, "Put", storage_pb2.PutRequest(key=key, value=value),
                                        self.write_deadline_s)
        if not result.reached:
            raise self._node_error("write", key, target, address, result)
        ack = result.reply
        await self.hold_acked_hint(key, target, ack)
        reply = routing_pb2.WriteReply(node_id=target, created=ack.created, epoch=ack.epoch, sequence=ack.sequence)
        if elsewhere:
            reply.moved_from.extend(await self._delete_old_copies(key, target, elsewhere, ack))
        return reply

    async def hold_acked_hint(self, key: bytes, target: str, ack: storage_pb2.WriteAck) -> None:
        """The read-your-writes hint of a write `target` acknowledged with `ack`; a full hint
        table fails the call (RESOURCE_EXHAUSTED) naming the node that holds the write."""
        old = (ack.old_position.epoch, ack.old_position.sequence) if ack.HasField("old_position") else None
        now = self.clock()
        if self.expire_hints is not None:
            await self.shell.call(self.expire_hints, now)
        try:
            await self.shell.call(lambda: self.hold_hint(key, target, ack.epoch, ack.sequence, now, old=old))
        except OverflowError as exc:
            raise RouterError(grpc.StatusCode.RESOURCE_EXHAUSTED,
                              f"{exc}; the write of key {key[:64]!r} was applied on {target} but may not be routable "
                              "until its delta arrives",
                              ed.detail(ed.HINTS_FULL, key=key, effect=ed.EFFECT_PARTIAL, done_on=[target])) from None

    async def _holders(self, key: bytes, cands: list[Candidate]) -> tuple[list[str], list[ProbeResult]]:
        """Every candidate that holds key (all probes awaited), and the ones that could not be asked."""
        holders: list[str] = []
        failed: list[ProbeResult] = []
        if not cands:
            return holders, failed
        for arriving in self.prober.ask_all([(c.node_id, c.address) for c in cands], "Get",
                                            storage_pb2.GetRequest(key=key), self.read_deadline_s):
            r = await arriving
            if not r.reached:
                failed.append(r)
            elif r.reply.found:
                holders.append(r.node_id)
        return sorted(holders), failed

    async def _delete_old_copies(self, key: bytes, target: str, holders: list[str],
                                 ack: storage_pb2.WriteAck) -> list[str]:
        """The second half of a move: delete key from its old holders (the new copy is already
        acknowledged, so no moment exists where no node holds it). A holder that cannot be
        asked leaves the move unfinished: UNAVAILABLE says so; repeating the move finishes it."""
        addresses = {n: (await self.shell.call(self._address, n))[0] or "" for n in holders}
        deleted, failed = [], []
        for arriving in self.prober.ask_all([(n, addresses[n]) for n in holders], "Delete",
                                            storage_pb2.DeleteRequest(key=key), self.write_deadline_s):
            r = await arriving
            (deleted if r.reached else failed).append(r if not r.reached else r.node_id)
        if failed:
            names = "; ".join(r.describe_error() for r in failed)
            raise RouterError(grpc.StatusCode.UNAVAILABLE,
                              f"move of key {key[:64]!r} unfinished: written on {target} (epoch {ack.epoch}, sequence "
                              f"{ack.sequence}) but the old copy could not be deleted ({names}); repeat the move once "
                              "that node is reachable",
                              ed.detail(ed.MOVE_UNFINISHED, key=key, effect=ed.EFFECT_PARTIAL, done_on=[target],
                                        nodes=[_failure(r, addresses.get(r.node_id, "")) for r in failed]))
        return sorted(deleted)

    def hold_hint(self, key: bytes, node_id: str, epoch: int, sequence: int, now: float,
                  old: tuple[int, int] | None = None) -> bool:
        """Hold a read-your-writes hint for a write node_id acknowledged at (epoch, sequence) (and
        `old` during a hand-over) unless its replica already holds it; a node unlisted
        meanwhile gets none. OverflowError when max-hints are held."""
        with self.shell.lock:
            if not self.membership.knows(node_id):
                return False
            return self.hints.add(key, node_id, epoch, sequence, applied=self.shell.position(node_id), old=old,
                                  now=now)

    def _place(self) -> str | None:
        with self.shell.lock:
            return most_free_capacity(((n, self.shell.node(n)) for n in self.membership.node_ids()),
                                      self.policy.current, self.clock())

    async def remove(self, key: bytes) -> routing_pb2.RemoveReply:
        _check_key(key, limit=self.max_key_bytes)
        cands = (await self.shell.call(self.locate, [key], "remove"))[0]
        targets = [(c.node_id, c.address) for c in cands]
        removed, failed = [], []
        for arriving in self.prober.ask_all(targets, "Delete", storage_pb2.DeleteRequest(key=key),
                                            self.write_deadline_s):
            r = await arriving
            if not r.reached:
                failed.append(r)
            elif r.reply.created:
                removed.append(r.node_id)
        if failed:
            raise self._unreachable("remove", key, failed, cands, done=removed,
                                    effect=ed.EFFECT_PARTIAL if removed else ed.EFFECT_UNKNOWN)
        return routing_pb2.RemoveReply(node_ids=sorted(removed))

    # -- errors ------------------------------------------------------------------------------------
    def _unreachable(self, op: str, key: bytes, failed: list[ProbeResult], cands: list[Candidate],
                     done: list[str] | None = None, effect: int = 0) -> RouterError:
        """Absence not proven (or a write not decided): candidate node(s) could not be asked. The
        ErrorDetail names them (CANDIDATE_UNAVAILABLE); a node that refused the key as invalid
        makes it INVALID_ARGUMENT instead."""
        invalid = [r for r in failed if r.code == grpc.StatusCode.INVALID_ARGUMENT]
        if invalid:
            return RouterError(grpc.StatusCode.INVALID_ARGUMENT, invalid[0].error.details(),  # type: ignore[union-attr]
                               ed.detail(ed.INVALID_INPUT, key=key))
        names = "; ".join(r.describe_error() for r in failed)
        extra = f"; deleted on {', '.join(done)}" if done else ""
        addresses = {c.node_id: c.address for c in cands}
        return RouterError(grpc.StatusCode.UNAVAILABLE,
                           f"{op} of key {key[:64]!r} incomplete: candidate node(s) could not be asked ({names}){extra}; "
                           "retry once they are reachable",
                           ed.detail(ed.CANDIDATE_UNAVAILABLE, key=key, effect=effect, done_on=done or (),
                                     nodes=[_failure(r, addresses.get(r.node_id, "")) for r in failed]))

    def _node_error(self, op: str, key: bytes, node_id: str, address: str, result: ProbeResult) -> RouterError:
        code = result.code or grpc.StatusCode.UNAVAILABLE
        if code == grpc.StatusCode.INVALID_ARGUMENT:
            return RouterError(code, f"node {node_id} refused the {op}: {result.error.details()}",  # type: ignore[union-attr]
                               ed.detail(ed.INVALID_INPUT, key=key, effect=ed.EFFECT_NONE))
        return RouterError(grpc.StatusCode.UNAVAILABLE, f"{op} to node {result.describe_error()}; not acknowledged",
                           ed.detail(ed.NODE_UNAVAILABLE, key=key, effect=ed.EFFECT_UNKNOWN,
                                     nodes=[_failure(result, address)]))


def _failure(result: ProbeResult, address: str) -> routing_pb2.NodeFailure:
    details = result.error.details() if result.error is not None else ""
    return ed.node_failure(result.node_id, address, result.code, details or "")


class RouterService:
    """The gRPC face of the Router: single-key calls here, batches in coordinator/router_batches.py
    (`batches`), the replica feed in coordinator/replica_watch.py (`watch`; None: not served)."""

    def __init__(self, router: Router, encoder: ReplyEncoder | None = None, batches: Any = None,
                 watch: Any = None) -> None:
        from shardsieve.coordinator.router_batches import BatchRouter

        self.router = router
        self.encoder = encoder or ReplyEncoder()
        self.batches: BatchRouter = batches or BatchRouter(router)
        self.watch = watch

    async def _run(self, method: str, context: grpc.aio.ServicerContext,
                   fn: Callable[[], Awaitable[object]]) -> object:
        """Answer one call; its time and any error code go to the metrics (rpc_duration_seconds,
        rpc_errors_total by code)."""
        started = time.perf_counter()
        code: grpc.StatusCode | None = None
        try:
            return await fn()
        except RouterError as exc:
            code = exc.code
            await context.abort(exc.code, exc.message, trailing_metadata=ed.trailing(exc.detail))
        except OverflowError as exc:
            code = grpc.StatusCode.RESOURCE_EXHAUSTED
            await context.abort(code, str(exc))
        except Exception:
            code = grpc.StatusCode.INTERNAL   # grpc answers INTERNAL for an unexpected exception
            raise
        finally:
            if self.router.metrics is not None:
                self.router.metrics.observe_rpc(  # type: ignore[attr-defined]
                    method, time.perf_counter() - started, code.name if code else None)
        raise AssertionError("unreachable")

    # Locate and LocateBatch answer with LocateReply / LocateBatchReply already in protobuf wire
    # format (bytes, coordinator/wire.py); `add_router_service` registers a serializer that passes
    # bytes through.
    def locate_reply(self, key: bytes) -> bytes:
        return self.encoder.locate_reply(self.router.locate_lists([key]))

    def locate_batch_reply(self, keys: list[bytes]) -> bytes:
        return self.encoder.locate_batch_reply(self.router.locate_lists(keys))

    async def Locate(self, request: routing_pb2.LocateRequest, context: grpc.aio.ServicerContext) -> bytes:
        return await self._run("Locate", context, lambda: self.router.shell.call(  # type: ignore[return-value]
            self.locate_reply, request.key))

    async def LocateBatch(self, request: routing_pb2.LocateBatchRequest, context: grpc.aio.ServicerContext) -> bytes:
        keys = list(request.keys)
        return await self._run("LocateBatch", context, lambda: self.router.shell.call(  # type: ignore[return-value]
            self.locate_batch_reply, keys, off_loop=len(keys) >= OFF_LOOP_KEYS))

    async def Read(self, request: routing_pb2.ReadRequest, context: grpc.aio.ServicerContext) -> routing_pb2.ReadReply:
        return await self._run("Read", context,  # type: ignore[return-value]
                               lambda: self.router.read(request.key, request.deadline_ms))

    async def Write(self, request: routing_pb2.WriteRequest,
                    context: grpc.aio.ServicerContext) -> routing_pb2.WriteReply:
        return await self._run("Write", context, lambda: self.router.write(  # type: ignore[return-value]
            request.key, request.value, request.node_id, request.move))

    async def Remove(self, request: routing_pb2.RemoveRequest,
                     context: grpc.aio.ServicerContext) -> routing_pb2.RemoveReply:
        return await self._run("Remove", context, lambda: self.router.remove(request.key))  # type: ignore[return-value]

    async def ReadBatch(self, request: routing_pb2.ReadBatchRequest,
                        context: grpc.aio.ServicerContext) -> routing_pb2.ReadBatchReply:
        return await self._run("ReadBatch", context, lambda: self.batches.read_many(  # type: ignore[return-value]
            list(request.keys), request.deadline_ms))

    async def WriteBatch(self, request: routing_pb2.WriteBatchRequest,
                         context: grpc.aio.ServicerContext) -> routing_pb2.WriteBatchReply:
        return await self._run("WriteBatch", context,  # type: ignore[return-value]
                               lambda: self.batches.write_many(list(request.items)))

    async def RemoveBatch(self, request: routing_pb2.RemoveBatchRequest,
                          context: grpc.aio.ServicerContext) -> routing_pb2.RemoveBatchReply:
        return await self._run("RemoveBatch", context,  # type: ignore[return-value]
                               lambda: self.batches.remove_many(list(request.keys)))


def _passthrough(serialize: Callable[[object], bytes]) -> Callable[[object], bytes]:
    def serializer(reply: object) -> bytes:
        return reply if isinstance(reply, bytes) else serialize(reply)
    return serializer


def add_router_service(service: RouterService, server: grpc.aio.Server) -> None:
    """Register the Router service (like the generated add_RouterServicer_to_server, except that
    Locate/LocateBatch may return pre-encoded bytes)."""
    def handler(method: Callable[..., object], request_cls: type, reply_cls: type) -> grpc.RpcMethodHandler:
        return grpc.unary_unary_rpc_method_handler(method, request_deserializer=request_cls.FromString,
                                                   response_serializer=_passthrough(reply_cls.SerializeToString))
    handlers = {
        "Locate": handler(service.Locate, routing_pb2.LocateRequest, routing_pb2.LocateReply),
        "LocateBatch": handler(service.LocateBatch, routing_pb2.LocateBatchRequest, routing_pb2.LocateBatchReply),
        "Read": handler(service.Read, routing_pb2.ReadRequest, routing_pb2.ReadReply),
        "Write": handler(service.Write, routing_pb2.WriteRequest, routing_pb2.WriteReply),
        "Remove": handler(service.Remove, routing_pb2.RemoveRequest, routing_pb2.RemoveReply),
        "ReadBatch": handler(service.ReadBatch, routing_pb2.ReadBatchRequest, routing_pb2.ReadBatchReply),
        "WriteBatch": handler(service.WriteBatch, routing_pb2.WriteBatchRequest, routing_pb2.WriteBatchReply),
        "RemoveBatch": handler(service.RemoveBatch, routing_pb2.RemoveBatchRequest, routing_pb2.RemoveBatchReply),
    }
    if service.watch is not None:
        handlers["WatchReplicas"] = grpc.unary_stream_rpc_method_handler(
            service.watch.WatchReplicas, request_deserializer=routing_pb2.WatchReplicasRequest.FromString,
            response_serializer=routing_pb2.ReplicaFeed.SerializeToString)
    server.add_generic_rpc_handlers((grpc.method_handlers_generic_handler("shardsieve.v1.Router", handlers),))
