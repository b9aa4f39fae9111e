"""shardsieve.limits: sync message limits and the implausible-fill flag."""

from __future__ import annotations

import math

import pytest

from shardsieve.bloom import BloomFilter
from shardsieve.geometry import Geometry, geometry_for
from shardsieve.limits import (
    LimitExceeded,
    SyncLimits,
    check_node_message,
    expected_fill,
    fill_implausibility,
    fill_tolerance,
)
from shardsieve.security import Undecodable
from shardsieve.sync.errors import InvalidHello, MalformedMessage
from shardsieve.v1 import filter_pb2, sync_pb2

LIMITS = SyncLimits(max_filter_bits=1 << 20, max_snapshot_chunks=8, max_delta_bytes=1000)


def _chunk(**kw: object) -> sync_pb2.NodeMessage:
    base: dict[str, object] = dict(snapshot_id=1, geometry=filter_pb2.Geometry(bits=1 << 16, hashes=7, scheme=1),
                                   encoding=1, chunk_count=1, total_bytes=(1 << 16) // 8, data=b"\0" * 10)
    base.update(kw)
    return sync_pb2.NodeMessage(snapshot_chunk=filter_pb2.SnapshotChunk(**base))  # type: ignore[arg-type]


@pytest.mark.parametrize("msg, error, text", [
    (sync_pb2.NodeMessage(), MalformedMessage, "no body"),
    (Undecodable("DecodeError: bad"), MalformedMessage, "not a NodeMessage"),
    (sync_pb2.NodeMessage(hello=sync_pb2.Hello(node_id="")), InvalidHello, "node_id"),
    (sync_pb2.NodeMessage(hello=sync_pb2.Hello(node_id="a/b")), InvalidHello, "node_id"),
    (sync_pb2.NodeMessage(hello=sync_pb2.Hello(node_id="n" * 129)), InvalidHello, "node_id"),
    (sync_pb2.NodeMessage(hello=sync_pb2.Hello(node_id="n", storage_address="h" * 300)), InvalidHello, "address"),
    (sync_pb2.NodeMessage(hello=sync_pb2.Hello(node_id="n", geometry=filter_pb2.Geometry(bits=1 << 21, hashes=3))),
     LimitExceeded, "max-filter-bits"),
    (sync_pb2.NodeMessage(hello=sync_pb2.Hello(node_id="n", geometry=filter_pb2.Geometry(bits=1 << 12, hashes=99))),
     LimitExceeded, "hash functions"),
    (sync_pb2.NodeMessage(delta=filter_pb2.Delta(sequence=3, payload=b"x" * 1001)), LimitExceeded, "max-delta-bytes"),
    (_chunk(chunk_count=9), LimitExceeded, "max-snapshot-chunks"),
    (_chunk(geometry=filter_pb2.Geometry(bits=1 << 22, hashes=7, scheme=1)), LimitExceeded, "max-filter-bits"),
    (_chunk(total_bytes=(1 << 16) // 8 + 1), LimitExceeded, "raw bytes of its own"),
    (_chunk(total_bytes=(1 << 20) // 8 + 1, geometry=filter_pb2.Geometry(bits=1 << 20, hashes=7, scheme=1)),
     LimitExceeded, "at most 131072 are accepted"),
])
def test_messages_past_a_limit_are_refused_with_their_status(msg: object, error: type, text: str) -> None:
    with pytest.raises(error, match=text) as err:
        check_node_message(msg, LIMITS)  # type: ignore[arg-type]
    expected = {LimitExceeded: "RESOURCE_EXHAUSTED", MalformedMessage: "INVALID_ARGUMENT",
                InvalidHello: "INVALID_ARGUMENT"}[error]
    assert err.value.grpc_status_name == expected


def test_messages_within_limits_pass() -> None:
    check_node_message(sync_pb2.NodeMessage(hello=sync_pb2.Hello(
        node_id="node-1.a_b", geometry=filter_pb2.Geometry(bits=1 << 20, hashes=7))), LIMITS)
    check_node_message(sync_pb2.NodeMessage(delta=filter_pb2.Delta(payload=b"x" * 1000)), LIMITS)
    check_node_message(_chunk(chunk_count=8), LIMITS)
    check_node_message(sync_pb2.NodeMessage(heartbeat=sync_pb2.Heartbeat()), LIMITS)


def test_max_snapshot_bytes_follows_the_largest_filter() -> None:
    assert SyncLimits(max_filter_bits=1 << 20, max_snapshot_chunks=4096).max_snapshot_bytes == (1 << 20) // 8
    assert SyncLimits(max_filter_bits=1 << 40, max_snapshot_chunks=2).max_snapshot_bytes == 2 << 20
    with pytest.raises(ValueError, match="max-filter-bits"):
        SyncLimits(max_filter_bits=10).validate()


# --------------------------------------------------------------------------- fill plausibility


def test_expected_fill_matches_the_published_formula() -> None:
    # 1 - (1 - 1/m)^(kn), Broder & Mitzenmacher 2004, section 2.1, evaluated directly
    m, k, n = 1 << 14, 7, 1000
    assert expected_fill(m, k, n) == pytest.approx(1 - (1 - 1 / m) ** (k * n), rel=1e-12)
    # Hoeffding: 2 exp(-2 m eps^2) = 1e-12 solved for eps
    assert 2 * math.exp(-2 * m * fill_tolerance(m) ** 2) == pytest.approx(1e-12, rel=1e-9)


@pytest.mark.parametrize("n", [0, 1, 50, 2000, 9000, 20000])
def test_honest_filters_are_not_flagged(n: int) -> None:
    geometry = geometry_for(10_000, 0.01)
    bloom = BloomFilter(geometry)
    bloom.add_batch([f"brinewick-parcel-{i}".encode() for i in range(n)])
    assert fill_implausibility(bloom.set_count(), geometry.bits, geometry.hashes, n) == ""


def test_hostile_fills_are_flagged() -> None:
    g = geometry_for(10_000, 0.01)
    all_ones = fill_implausibility(g.bits, g.bits, g.hashes, 10)
    assert "at most" in all_ones                   # 10 keys x k hashes cannot set every bit
    # 10 000 keys fill ~41% of this filter; 50% is possible by the hard bound but not by chance
    assert "far above" in fill_implausibility(g.bits // 2, g.bits, g.hashes, 10_000)
    assert "far below" in fill_implausibility(0, g.bits, g.hashes, 5000)   # keys claimed, nothing set
    assert fill_implausibility(0, Geometry(bits=1 << 10, hashes=3).bits, 3, 0) == ""
