"""Delta codec figures for `shardsieve bench filter`: size against two outside references
and encode+decode speed, measured side by side in one run.

References:
- the entropy bound log2 C(m, d): no code can spend fewer bits, on average, on a uniformly
  random d-subset of m positions (counting argument; computed with lgamma);
- zstd at level 19 (the zstandard package, an optional bench dependency) of the same gap
  array the codec codes, as little-endian unsigned integers. Both uint32 and uint64 words are
  tried and the smaller result is the reference, so the baseline is the stronger of the two.

Speed is positions / seconds of one encode_delta plus one decode_delta, best of several
rounds (the timeit documentation's advice for noisy shared machines); the median round and
the median CPU time are reported beside it.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from shardsieve import codec
from shardsieve.changeset import ChangeSet, sorted_unique

DEFAULT_BITS = 1 << 24
DEFAULT_DENSITIES = (1e-4, 1e-3, 1e-2)
ZSTD_LEVEL = 19


def _random_positions(rng: np.random.Generator, bits: int, count: int) -> np.ndarray:
    """count distinct positions drawn uniformly from [0, bits), sorted."""
    if count * 4 < bits:
        picked = sorted_unique(rng.integers(0, bits, size=count + count // 8 + 16, dtype=np.uint64))
        while picked.size < count:
            extra = rng.integers(0, bits, size=count, dtype=np.uint64)
            picked = sorted_unique(np.concatenate((picked, extra)))
        picked = rng.permutation(picked)[:count]
        return np.sort(picked).astype(np.uint64)
    return np.sort(rng.choice(bits, size=count, replace=False)).astype(np.uint64)


def zstd_reference(positions: np.ndarray, level: int = ZSTD_LEVEL) -> tuple[int, str]:
    """Smallest zstd output over the gap array as '<u4' and as '<u8'; returns (bytes, word)."""
    import zstandard  # optional bench dependency

    gaps = codec.gaps_of(positions) if positions.size else positions
    compressor = zstandard.ZstdCompressor(level=level)
    best: tuple[int, str] | None = None
    for word in ("<u4", "<u8"):
        if word == "<u4" and gaps.size and int(gaps.max()) >= 1 << 32:
            continue
        size = len(compressor.compress(gaps.astype(word).tobytes()))
        if best is None or size < best[0]:
            best = (size, word)
    assert best is not None
    return best


def _time_round_trip(changes: ChangeSet, bits: int, min_seconds: float,
                     rounds: int) -> tuple[list[float], list[float]]:
    """Wall and CPU seconds per encode+decode in each of `rounds` rounds of >= min_seconds.

    CPU time (time.process_time) is reported beside wall time because the machines these
    benchmarks run on are shared: waiting for a core inflates wall time, not CPU time.
    """
    payload = codec.encode_delta(changes, bits)
    if codec.decode_delta(payload, bits) != changes:
        raise AssertionError("codec round trip failed during the benchmark")
    loops = 1
    while True:
        start = time.perf_counter()
        for _ in range(loops):
            codec.decode_delta(codec.encode_delta(changes, bits), bits)
        elapsed = time.perf_counter() - start
        if elapsed >= min_seconds:
            break
        loops *= 2
    wall: list[float] = []
    cpu: list[float] = []
    for _ in range(rounds):
        start, start_cpu = time.perf_counter(), time.process_time()
        for _ in range(loops):
            codec.decode_delta(codec.encode_delta(changes, bits), bits)
        wall.append((time.perf_counter() - start) / loops)
        cpu.append((time.process_time() - start_cpu) / loops)
    return wall, cpu


def measure_codec(bits: int = DEFAULT_BITS, densities: tuple[float, ...] = DEFAULT_DENSITIES, seed: int = 7, *,
                  min_seconds: float = 0.05, rounds: int = 9) -> dict[str, Any]:
    """Size and speed of delta coding at each density; the summary fields take the worst row."""
    rng = np.random.default_rng(seed)
    rows: list[dict[str, Any]] = []
    for density in densities:
        count = max(1, round(density * bits))
        positions = _random_positions(rng, bits, count)
        changes = ChangeSet(positions, np.zeros(0, dtype=np.uint64))
        encoded = len(codec.encode_delta(changes, bits))
        entropy_bytes = codec.entropy_bound_bits(count, bits) / 8
        zstd_bytes, zstd_word = zstd_reference(positions)
        seconds, cpu_seconds = _time_round_trip(changes, bits, min_seconds, rounds)
        rows.append({
            "density": density,
            "positions": count,
            "encoded_bytes": encoded,
            "entropy_bytes": entropy_bytes,
            "zstd_bytes": zstd_bytes,
            "zstd_gap_word": zstd_word,
            "size_vs_entropy": encoded / entropy_bytes,
            "size_vs_zstd": encoded / zstd_bytes,
            "positions_per_s": count / min(seconds),
            "positions_per_s_median": count / float(np.median(seconds)),
            "positions_per_cpu_s": count / float(np.median(cpu_seconds)),
        })
    return {
        "bits": bits,
        "seed": seed,
        "zstd_level": ZSTD_LEVEL,
        "zstd_input": "codec gap array as little-endian uint32 and uint64 words, smaller result kept",
        "encoded_includes": "whole delta payload: header, Rice parameter, body length, CRC-32",
        "rows": rows,
        "delta_size_vs_entropy": max(r["size_vs_entropy"] for r in rows),
        "delta_size_vs_zstd": max(r["size_vs_zstd"] for r in rows),
        "codec_positions_per_s": min(r["positions_per_s"] for r in rows),
        "codec_positions_per_cpu_s": min(r["positions_per_cpu_s"] for r in rows),
        "speed_method": f"best wall-clock round of {rounds} (median and CPU-time median reported per row)",
    }


def format_rows(result: dict[str, Any]) -> list[str]:
    """Plain text table lines (the CLI may render them with rich instead)."""
    lines = [f"delta codec, m = {result['bits']}, zstd level {result['zstd_level']} of gaps ({result['zstd_input']})",
             f"{'density':>8} {'positions':>10} {'bytes':>9} {'entropy':>9} {'zstd':>9} "
             f"{'vs entropy':>10} {'vs zstd':>8} {'pos/s':>10}"]
    for r in result["rows"]:
        lines.append(f"{r['density']:>8g} {r['positions']:>10} {r['encoded_bytes']:>9} {r['entropy_bytes']:>9.0f} "
                     f"{r['zstd_bytes']:>9} {r['size_vs_entropy']:>10.4f} {r['size_vs_zstd']:>8.4f} "
                     f"{r['positions_per_s']:>10.3g}")
    lines.append(f"worst: delta_size_vs_entropy={result['delta_size_vs_entropy']:.4f} "
                 f"delta_size_vs_zstd={result['delta_size_vs_zstd']:.4f} "
                 f"codec_positions_per_s={result['codec_positions_per_s']:.3g} "
                 f"(CPU time: {result['codec_positions_per_cpu_s']:.3g})")
    return lines


if __name__ == "__main__":  # pragma: no cover - manual run
    import json
    import sys

    figures = measure_codec()
    if "--json" in sys.argv:
        print(json.dumps(figures, indent=2))
    else:
        print("\n".join(format_rows(figures)))
