"""The application client (shardsieve/client/): exceptions from structured details, the retry
policy, failover between coordinators, against fake Router servers on loopback (real gRPC,
canned answers, calls counted) and a fake clock (no sleeps).

Outside checks: gRPC status codes and their numbers are grpc's own (grpc.StatusCode); the
backoff's bounds are those of "full jitter" as the module states them (gRPC connection backoff
docs: a delay grows by a multiplier up to a maximum, randomised by jitter).
"""

from __future__ import annotations

import asyncio
from concurrent import futures
from typing import Any, Callable, Iterator

import grpc
import pytest

from shardsieve import error_detail as ed
from shardsieve.client import (
    AsyncClient, AuthFailed, CandidateUnavailable, Client, CoordinatorPool, CoordinatorUnavailable, InvalidInput,
    LimitExceeded, MoveUnfinished, NodeUnavailable, NoNodeAvailable, RetryPolicy, SecondCopy, UnknownNode,
)
from shardsieve.client.errors import from_status
from shardsieve.client.policy import DELETE, READ, WRITE, may_retry
from shardsieve.testing.procs import free_port
from shardsieve.v1 import routing_pb2, routing_pb2_grpc

DOWN = ed.node_failure("node-4", "127.0.0.1:7004", grpc.StatusCode.UNAVAILABLE, "connection refused")


# -- exceptions from structured details --------------------------------------------------------------
@pytest.mark.parametrize("reason,code,cls", [
    (ed.CANDIDATE_UNAVAILABLE, grpc.StatusCode.UNAVAILABLE, CandidateUnavailable),
    (ed.NODE_UNAVAILABLE, grpc.StatusCode.UNAVAILABLE, NodeUnavailable),
    (ed.MOVE_UNFINISHED, grpc.StatusCode.UNAVAILABLE, MoveUnfinished),
    (ed.NO_NODE, grpc.StatusCode.UNAVAILABLE, NoNodeAvailable),
    (ed.LIMIT_EXCEEDED, grpc.StatusCode.INVALID_ARGUMENT, LimitExceeded),
    (ed.INVALID_INPUT, grpc.StatusCode.INVALID_ARGUMENT, InvalidInput),
    (ed.UNKNOWN_NODE, grpc.StatusCode.NOT_FOUND, UnknownNode),
    (ed.SECOND_COPY, grpc.StatusCode.FAILED_PRECONDITION, SecondCopy),
])
def test_the_detail_decides_the_exception_whatever_the_text(reason: int, code: grpc.StatusCode, cls: type) -> None:
    for text in ("failed to connect to all addresses", "connection refused", "anything at all"):
        error = from_status(code, text, ed.detail(reason, key=b"k", nodes=[DOWN]), coordinator="c:1")
        assert type(error) is cls
        assert error.key == b"k"


def test_without_a_detail_unavailable_means_the_coordinator_and_the_rest_follow_the_code() -> None:
    error = from_status(grpc.StatusCode.UNAVAILABLE, "candidate node-4 could not be asked", None, coordinator="c:1")
    assert isinstance(error, CoordinatorUnavailable) and not error.maybe_applied
    assert from_status(grpc.StatusCode.DEADLINE_EXCEEDED, "", None, write=True).maybe_applied  # type: ignore[attr-defined]
    assert isinstance(from_status(grpc.StatusCode.PERMISSION_DENIED, "", None), AuthFailed)
    cu = from_status(grpc.StatusCode.UNAVAILABLE, "", ed.detail(ed.CANDIDATE_UNAVAILABLE, nodes=[DOWN]))
    assert isinstance(cu, CandidateUnavailable)
    assert cu.node_ids == ["node-4"] and cu.nodes[0].code == grpc.StatusCode.UNAVAILABLE


# -- retry policy -----------------------------------------------------------------------------------
def test_which_failures_are_retried() -> None:
    none = from_status(grpc.StatusCode.UNAVAILABLE, "", ed.detail(ed.CANDIDATE_UNAVAILABLE, effect=ed.EFFECT_NONE))
    unknown = from_status(grpc.StatusCode.UNAVAILABLE, "", ed.detail(ed.NODE_UNAVAILABLE, effect=ed.EFFECT_UNKNOWN))
    coordinator = from_status(grpc.StatusCode.UNAVAILABLE, "", None)
    invalid = from_status(grpc.StatusCode.INVALID_ARGUMENT, "", ed.detail(ed.INVALID_INPUT))
    assert may_retry(READ, unknown, sent=True) and may_retry(DELETE, unknown, sent=True)
    assert may_retry(WRITE, none, sent=True)            # nothing was applied
    assert not may_retry(WRITE, unknown, sent=True)     # may have been applied: never twice
    assert not may_retry(WRITE, coordinator, sent=True) and may_retry(WRITE, coordinator, sent=False)
    assert not any(may_retry(kind, invalid, sent=False) for kind in (READ, WRITE, DELETE))


def test_full_jitter_backoff_stays_under_a_ceiling_that_grows_to_the_maximum() -> None:
    policy = RetryPolicy(attempts=6, initial_backoff_s=0.1, max_backoff_s=0.5, multiplier=2.0)
    ceilings = [policy.backoff_s(n, rng=lambda: 1.0) for n in range(1, 6)]
    assert ceilings == pytest.approx([0.1, 0.2, 0.4, 0.5, 0.5])
    assert policy.backoff_s(3, rng=lambda: 0.0) == 0.0
    with pytest.raises(ValueError):
        RetryPolicy(attempts=0)


def test_pool_prefers_the_first_rests_a_failed_one_and_comes_back() -> None:
    pool = CoordinatorPool(("a:1", "b:1", "c:1"), rest_s=1.0, max_rest_s=4.0)
    assert pool.order(0.0) == ["a:1", "b:1", "c:1"]
    pool.failed("a:1", 0.0)
    assert pool.order(0.5) == ["b:1", "c:1", "a:1"]
    assert pool.order(1.0)[0] == "a:1"                  # its rest is over: preferred again
    for _ in range(5):
        pool.failed("a:1", 10.0)
    assert pool.resting(13.9) == ["a:1"] and pool.resting(14.0) == []   # doubling, capped at max_rest_s
    pool.failed("b:1", 20.0)
    pool.failed("a:1", 20.5)
    assert pool.order(20.6) == ["c:1", "b:1", "a:1"]     # resting ones by the end of their rest
    pool.succeeded("a:1")
    assert pool.order(20.6)[0] == "a:1"


# -- against fake coordinators --------------------------------------------------------------------
class FakeRouter(routing_pb2_grpc.RouterServicer):
    """Fails the first `failures` calls of each method with the given code and detail."""

    def __init__(self, failures: int = 0, code: grpc.StatusCode = grpc.StatusCode.UNAVAILABLE,
                 detail: routing_pb2.ErrorDetail | None = None) -> None:
        self.failures, self.code, self.detail = failures, code, detail
        self.calls: dict[str, int] = {}

    def _count(self, name: str, context: grpc.ServicerContext) -> None:
        self.calls[name] = self.calls.get(name, 0) + 1
        if self.calls[name] <= self.failures:
            context.set_trailing_metadata(ed.trailing(self.detail))
            context.abort(self.code, "canned failure")

    def Read(self, request, context):  # type: ignore[no-untyped-def]
        self._count("Read", context)
        return routing_pb2.ReadReply(found=True, value=b"v:" + request.key, node_id="node-1", candidates=1)

    def Write(self, request, context):  # type: ignore[no-untyped-def]
        self._count("Write", context)
        return routing_pb2.WriteReply(node_id="node-1", created=True, epoch=1, sequence=3)

    def Remove(self, request, context):  # type: ignore[no-untyped-def]
        self._count("Remove", context)
        return routing_pb2.RemoveReply(node_ids=["node-1"])

    def ReadBatch(self, request, context):  # type: ignore[no-untyped-def]
        self._count("ReadBatch", context)
        reply = routing_pb2.ReadBatchReply(node_calls=1)
        for key in request.keys:
            if key == b"down":
                reply.results.add(error=routing_pb2.KeyError(
                    code=grpc.StatusCode.UNAVAILABLE.value[0], message="x",
                    detail=ed.detail(ed.CANDIDATE_UNAVAILABLE, key=key, nodes=[DOWN])))
            else:
                reply.results.add(found=key != b"absent", value=b"v" if key != b"absent" else b"", node_id="node-1")
        return reply


@pytest.fixture()
def serve() -> Iterator[Callable[..., str]]:
    servers: list[grpc.Server] = []

    def start(router: FakeRouter, port: int | None = None) -> str:
        server = grpc.server(futures.ThreadPoolExecutor(max_workers=4))
        routing_pb2_grpc.add_RouterServicer_to_server(router, server)
        port = port or free_port()
        server.add_insecure_port(f"127.0.0.1:{port}")
        server.start()
        servers.append(server)
        return f"127.0.0.1:{port}"

    yield start
    for server in servers:
        server.stop(0)


class FakeClock:
    def __init__(self) -> None:
        self.now = 1000.0
        self.slept: list[float] = []

    def __call__(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        self.slept.append(seconds)
        self.now += seconds


def _client(addresses: Any, clock: FakeClock, **kw: Any) -> Client:
    return Client(addresses, clock=clock, sleep=clock.sleep, connect_timeout_s=0.3, **kw)


def test_reads_and_deletes_are_retried_writes_only_when_nothing_was_applied(serve: Callable[..., str]) -> None:
    clock = FakeClock()
    node_down = ed.detail(ed.CANDIDATE_UNAVAILABLE, nodes=[DOWN], effect=ed.EFFECT_UNKNOWN)
    router = FakeRouter(failures=1, detail=node_down)
    with _client(serve(router), clock) as client:
        assert client.get(b"k").value == b"v:k"
        assert client.delete(b"k").deleted
        with pytest.raises(CandidateUnavailable) as exc:
            client.put(b"k", b"v")                       # effect unknown: may be applied, never twice
        assert exc.value.node_ids == ["node-4"]
    assert router.calls == {"Read": 2, "Remove": 2, "Write": 1}
    assert len(clock.slept) == 2 and all(0 <= s <= 0.05 for s in clock.slept)
    safe = FakeRouter(failures=1, detail=ed.detail(ed.CANDIDATE_UNAVAILABLE, nodes=[DOWN], effect=ed.EFFECT_NONE))
    with _client(serve(safe), clock) as client:
        assert client.put(b"k", b"v").node_id == "node-1"
    assert safe.calls == {"Write": 2}


def test_nothing_else_is_retried_and_attempts_are_bounded(serve: Callable[..., str]) -> None:
    clock = FakeClock()
    invalid = FakeRouter(failures=5, code=grpc.StatusCode.INVALID_ARGUMENT,
                         detail=ed.detail(ed.LIMIT_EXCEEDED, setting="max-key-bytes"))
    with _client(serve(invalid), clock) as client, pytest.raises(LimitExceeded) as exc:
        client.get(b"k")
    assert exc.value.setting == "max-key-bytes" and invalid.calls == {"Read": 1}
    down = FakeRouter(failures=10, detail=ed.detail(ed.CANDIDATE_UNAVAILABLE, nodes=[DOWN]))
    with _client(serve(down), clock, retry=RetryPolicy(attempts=3)) as client, pytest.raises(CandidateUnavailable):
        client.get(b"k")
    assert down.calls == {"Read": 3}


def test_failover_to_the_next_coordinator_and_back_after_the_rest(serve: Callable[..., str]) -> None:
    clock = FakeClock()
    first_port = free_port()
    second = FakeRouter()
    with _client([f"127.0.0.1:{first_port}", serve(second)], clock, rest_s=5.0) as client:
        assert client.get(b"a").found and second.calls == {"Read": 1}
        assert client.pool.resting(clock()) == [f"127.0.0.1:{first_port}"]
        first = FakeRouter()
        serve(first, first_port)
        assert client.get(b"b").found and first.calls == {}        # still resting: the second answers
        clock.now += 5.0
        assert client.get(b"c").found and first.calls == {"Read": 1}   # rest over: back to the first


def test_no_coordinator_reachable_is_coordinator_unavailable_naming_them(serve: Callable[..., str]) -> None:
    clock = FakeClock()
    dead = [f"127.0.0.1:{free_port()}", f"127.0.0.1:{free_port()}"]
    with _client(dead, clock, retry=RetryPolicy(attempts=1)) as client, pytest.raises(CoordinatorUnavailable) as exc:
        client.put(b"k", b"v")
    assert set(exc.value.tried) == set(dead) and not exc.value.maybe_applied


def test_batch_results_carry_per_key_errors(serve: Callable[..., str]) -> None:
    with _client(serve(FakeRouter()), FakeClock()) as client:
        results = client.get_many([b"k", b"absent", b"down"])
    assert [r.found for r in results] == [True, False, False]
    assert results[1].ok and isinstance(results[2].error, CandidateUnavailable)
    assert results[2].error.node_ids == ["node-4"] and results[2].error.key == b"down"


def test_bad_arguments_are_refused_before_any_call() -> None:
    with Client(f"127.0.0.1:{free_port()}") as client:
        for call in (lambda: client.get(b""), lambda: client.get("text"),  # type: ignore[arg-type]
                     lambda: client.put_many([(b"k", b"v", "", True)]), lambda: client.get_many(b"k")):
            with pytest.raises(InvalidInput):
                call()


def test_the_asyncio_client_has_the_same_semantics(serve: Callable[..., str]) -> None:
    router = FakeRouter(failures=1, detail=ed.detail(ed.CANDIDATE_UNAVAILABLE, nodes=[DOWN],
                                                      effect=ed.EFFECT_UNKNOWN))
    address = serve(router)
    dead = f"127.0.0.1:{free_port()}"
    slept: list[float] = []

    async def no_sleep(seconds: float) -> None:
        slept.append(seconds)

    async def main() -> None:
        async with AsyncClient([dead, address], connect_timeout_s=0.3, sleep=no_sleep) as client:
            assert (await client.get(b"k")).value == b"v:k"
            with pytest.raises(CandidateUnavailable):
                await client.put(b"k", b"v")
            results = await client.get_many([b"k", b"down"])
            assert results[0].found and isinstance(results[1].error, CandidateUnavailable)
            assert client.pool.resting(client._clock()) == [dead]

    asyncio.run(main())
    assert router.calls == {"Read": 2, "Write": 1, "ReadBatch": 2} and len(slept) == 2
