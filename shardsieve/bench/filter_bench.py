"""`shardsieve bench filter`: our Bloom filter against rbloom and the hashing floor, side by side.

Every round runs all contenders on the same keys one after the other; each figure is the
best of the rounds (the least disturbed by other work on a shared machine) and speeds are
reported as ratios against the baseline measured in the same run.

Baselines:
  rbloom   Bloom(n, p, hash_func) with hash_func(key) = mmh3.hash128(key, signed=True),
           insert with update(keys), query with [k in bloom for k in keys].
  floor    128-bit mmh3 digests of all keys (joined and read with numpy.frombuffer): no
           Bloom filter that hashes with mmh3 from Python can insert or query faster.
Codec figures come from shardsieve.bench.codec_figures.measure_codec.
"""

from __future__ import annotations

import gc
import json
import sys
import time
from collections.abc import Callable
from typing import Any

import click

MUST_RATIO = 0.8
GOAL_RATIO = 1.0
MUST_ENTROPY = 1.03
MUST_ZSTD = 0.85
MUST_CODEC_RATE = 5e6


def make_keys(n: int, prefix: bytes = b"harbour-parcel") -> list[bytes]:
    """Invented example keys: parcel ids of a fictional harbour courier."""
    return [b"%s:%010d" % (prefix, i) for i in range(n)]


def _timed(fn: Callable[[], Any]) -> float:
    """Seconds of one call, after a collection so no earlier garbage is paid for inside it."""
    gc.collect()
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def run_filter_bench(keys_count: int = 1_000_000, fpr: float = 0.01, rounds: int = 5,
                     progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Measure insert and query of ours, rbloom and the hashing floor on the same keys."""
    import mmh3
    import numpy as np
    import rbloom

    from shardsieve.bloom import BloomFilter
    from shardsieve.geometry import geometry_for
    from shardsieve.hashing import CHUNK_KEYS

    say = progress or (lambda _msg: None)
    say(f"making {keys_count:,} keys")
    keys = make_keys(keys_count)
    geometry = geometry_for(keys_count, fpr)
    digest = mmh3.mmh3_x64_128_digest

    def hash_rbloom(key: bytes) -> int:
        return mmh3.hash128(key, signed=True)

    def ours_insert() -> BloomFilter:
        bf = BloomFilter(geometry)
        bf.add_batch(keys)
        return bf

    def rbloom_insert() -> Any:
        bloom = rbloom.Bloom(keys_count, fpr, hash_rbloom)
        bloom.update(keys)
        return bloom

    def rbloom_own_hash_insert() -> Any:
        # For scale only: rbloom's default hash is randomised per process (useless for a
        # distributed filter), but it shows what the per-key Python callback costs rbloom.
        bloom = rbloom.Bloom(keys_count, fpr)
        bloom.update(keys)
        return bloom

    def floor_joined() -> Any:
        return np.frombuffer(b"".join(map(digest, keys)), dtype="<u8")

    def floor_chunked() -> Any:
        return [np.frombuffer(b"".join(map(digest, keys[i:i + CHUNK_KEYS])), dtype="<u8")
                for i in range(0, len(keys), CHUNK_KEYS)]

    ours = ours_insert()
    theirs = rbloom_insert()
    ours_hits = ours.contains_batch(keys)
    if not ours_hits.all():
        raise RuntimeError("our filter reported a false negative: the benchmark result would be meaningless")

    own = rbloom_own_hash_insert()
    times: dict[str, float] = {name: float("inf") for name in
                               ("ours_insert", "ours_query", "rbloom_insert", "rbloom_query", "floor",
                                "rbloom_own_hash_insert", "rbloom_own_hash_query")}
    for r in range(rounds):
        say(f"round {r + 1}/{rounds}: inserts")
        times["ours_insert"] = min(times["ours_insert"], _timed(ours_insert))
        times["rbloom_insert"] = min(times["rbloom_insert"], _timed(rbloom_insert))
        say(f"round {r + 1}/{rounds}: queries")
        times["ours_query"] = min(times["ours_query"], _timed(lambda: ours.contains_batch(keys)))
        times["rbloom_query"] = min(times["rbloom_query"], _timed(lambda: [k in theirs for k in keys]))
        times["rbloom_own_hash_insert"] = min(times["rbloom_own_hash_insert"], _timed(rbloom_own_hash_insert))
        times["rbloom_own_hash_query"] = min(times["rbloom_own_hash_query"], _timed(lambda: [k in own for k in keys]))
        say(f"round {r + 1}/{rounds}: hashing floor")
        times["floor"] = min(times["floor"], _timed(floor_joined), _timed(floor_chunked))

    rate = {name: keys_count / t for name, t in times.items()}
    return {
        "keys": keys_count,
        "fpr": fpr,
        "rounds": rounds,
        "geometry_bits": geometry.bits,
        "geometry_hashes": geometry.hashes,
        "rbloom_bits": int(theirs.size_in_bits),
        "ours_insert_per_s": rate["ours_insert"],
        "ours_query_per_s": rate["ours_query"],
        "rbloom_insert_per_s": rate["rbloom_insert"],
        "rbloom_query_per_s": rate["rbloom_query"],
        "hash_floor_per_s": rate["floor"],
        "rbloom_own_hash_insert_per_s": rate["rbloom_own_hash_insert"],
        "rbloom_own_hash_query_per_s": rate["rbloom_own_hash_query"],
        "insert_ratio_vs_rbloom": rate["ours_insert"] / rate["rbloom_insert"],
        "query_ratio_vs_rbloom": rate["ours_query"] / rate["rbloom_query"],
        "insert_fraction_of_hash_floor": rate["ours_insert"] / rate["floor"],
        "query_fraction_of_hash_floor": rate["ours_query"] / rate["floor"],
    }


def run_codec_figures(progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Codec size and speed figures from shardsieve.bench.codec_figures (imported only when needed)."""
    from shardsieve.bench.codec_figures import measure_codec

    if progress:
        progress("delta codec at densities 1e-4, 1e-3, 1e-2")
    figures = measure_codec()
    return {
        "delta_size_vs_entropy": figures.get("delta_size_vs_entropy"),
        "delta_size_vs_zstd": figures.get("delta_size_vs_zstd"),
        "codec_positions_per_s": figures.get("codec_positions_per_s"),
        "codec_rows": figures.get("rows", []),
    }


def _verdict(value: float | None, must: float, goal: float | None = None, lower_is_better: bool = False) -> str:
    if value is None:
        return "n/a"
    ok = value <= must if lower_is_better else value >= must
    if not ok:
        return "[red]FAIL[/red]"
    if goal is not None and value < goal:
        return "[yellow]ok < goal[/yellow]"
    return "[green]ok[/green]"


def _render(result: dict[str, Any]) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console()
    speed = Table(title=f"Bloom filter, {result['keys']:,} keys, p = {result['fpr']:g}, best of {result['rounds']} rounds "
                        f"(ours m = 2^{result['geometry_bits'].bit_length() - 1}, k = {result['geometry_hashes']}; "
                        f"rbloom m = {result['rbloom_bits']:,})")
    speed.add_column("figure", overflow="fold")
    speed.add_column("value", justify="right", no_wrap=True)
    speed.add_column("must", no_wrap=True)
    speed.add_column("goal", no_wrap=True)
    speed.add_column("verdict", no_wrap=True)
    for label, key in (("ours insert keys/s", "ours_insert_per_s"), ("rbloom insert keys/s", "rbloom_insert_per_s"),
                       ("ours query keys/s", "ours_query_per_s"), ("rbloom query keys/s", "rbloom_query_per_s"),
                       ("mmh3 hashing floor keys/s", "hash_floor_per_s"),
                       ("(scale) rbloom, own per-process hash, insert keys/s", "rbloom_own_hash_insert_per_s"),
                       ("(scale) rbloom, own per-process hash, query keys/s", "rbloom_own_hash_query_per_s")):
        speed.add_row(label, f"{result[key]:,.0f}", "", "", "")
    for key in ("insert_ratio_vs_rbloom", "query_ratio_vs_rbloom"):
        speed.add_row(key, f"{result[key]:.3f}", f">= {MUST_RATIO}", f">= {GOAL_RATIO}",
                      _verdict(result[key], MUST_RATIO, GOAL_RATIO))
    speed.add_row("insert_fraction_of_hash_floor", f"{result['insert_fraction_of_hash_floor']:.3f}", "", "", "")
    speed.add_row("query_fraction_of_hash_floor", f"{result['query_fraction_of_hash_floor']:.3f}", "", "", "")
    console.print(speed)
    if "delta_size_vs_entropy" not in result:
        return
    codec = Table(title="Delta codec: size vs entropy bound log2 C(m,d) and vs zstd-19 of the gaps")
    for name in ("d/m", "positions", "bytes", "/entropy", "/zstd", "pos/s"):
        codec.add_column(name, justify="right", no_wrap=True)
    for row in result.get("codec_rows", []):
        codec.add_row(f"{row['density']:g}", f"{row['positions']:,}", f"{row['encoded_bytes']:,}",
                      f"{row['size_vs_entropy']:.4f}", f"{row['size_vs_zstd']:.3f}", f"{row['positions_per_s']:,.0f}")
    console.print(codec)
    worst = Table(title="Delta codec, worst density")
    worst.add_column("figure", overflow="fold")
    worst.add_column("value", justify="right", no_wrap=True)
    worst.add_column("must", no_wrap=True)
    worst.add_column("verdict", no_wrap=True)
    worst.add_row("delta_size_vs_entropy", f"{result['delta_size_vs_entropy']:.4f}", f"<= {MUST_ENTROPY}",
                  _verdict(result["delta_size_vs_entropy"], MUST_ENTROPY, lower_is_better=True))
    worst.add_row("delta_size_vs_zstd", f"{result['delta_size_vs_zstd']:.3f}", f"<= {MUST_ZSTD}",
                  _verdict(result["delta_size_vs_zstd"], MUST_ZSTD, lower_is_better=True))
    worst.add_row("codec_positions_per_s", f"{result['codec_positions_per_s']:,.0f}", ">= 5e6",
                  _verdict(result["codec_positions_per_s"], MUST_CODEC_RATE))
    console.print(worst)


@click.command("filter")
@click.option("--json", "as_json", is_flag=True, help="Print the figures as one JSON object on stdout.")
@click.option("--keys", "keys_count", type=click.IntRange(min=1000), default=1_000_000, show_default=True,
              help="Keys to insert and query.")
@click.option("--fpr", type=click.FloatRange(min=0, max=1, min_open=True, max_open=True), default=0.01,
              show_default=True, help="Target false-positive rate for both filters.")
@click.option("--rounds", type=click.IntRange(min=1), default=5, show_default=True,
              help="Rounds; each figure is the best round.")
@click.option("--skip-codec", is_flag=True, help="Leave out the delta codec figures.")
def bench_filter(as_json: bool, keys_count: int, fpr: float, rounds: int, skip_codec: bool) -> None:
    """Insert and query speed against rbloom and the mmh3 hashing floor, plus delta codec figures."""
    from rich.console import Console
    from rich.status import Status

    err = Console(stderr=True)
    with Status("starting", console=err) as status:
        def progress(msg: str) -> None:
            status.update(msg)

        result = run_filter_bench(keys_count, fpr, rounds, progress)
        if not skip_codec:
            result.update(run_codec_figures(progress))
    if as_json:
        sys.stdout.write(json.dumps(result) + "\n")
    else:
        _render(result)
