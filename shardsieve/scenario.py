"""The tour's invented scenario: the Brinewick Kelp Cooperative and its records.

Everything here is made up (the cooperative, its harbour, farms, boats and customers); the
names are built from invented syllables, and any likeness to a real business is accidental.

Why a scenario at all: it shows why keys cannot be found by hashing. The cooperative keeps
each farm's records on the node in that farm's shed (write locality), and moves a farm to
another node when sheds are re-wired, so a key's node follows its history, not its name.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

BUSINESS = "Brinewick Kelp Cooperative"
HARBOUR = "Brinewick"

_SYLLABLES = ("bra", "ne", "wick", "lo", "tarn", "mel", "sko", "vir", "dun", "pell", "osk", "rue",
              "fen", "gal", "hoth", "ith", "kest", "mora", "quil", "sable", "tov", "ul", "wend", "yar")
FARMS = ("north-shoal", "gullrock", "eelgrass-bend", "cinder-cove", "long-tether", "mistbank",
         "tallow-reef", "seven-buoys", "rookery-flat", "amber-slack", "lantern-spit", "driftwood-run")
PRODUCTS = ("sugar-kelp", "dulse", "sea-lettuce", "oarweed", "laver", "bladderwrack")
KINDS = ("harvest", "crate", "tide-log", "order", "customer")


@dataclass(frozen=True)
class Record:
    key: bytes
    value: bytes
    farm: str


def invented_name(rng: np.random.Generator, parts: int = 2) -> str:
    return "".join(_SYLLABLES[int(i)] for i in rng.integers(0, len(_SYLLABLES), size=parts)).capitalize()


def records(count: int, seed: int = 1) -> list[Record]:
    """`count` distinct records of the cooperative, each tied to the farm that wrote it."""
    if count < 0:
        raise ValueError(f"record count must be >= 0, got {count}")
    rng = np.random.default_rng(seed)
    out: list[Record] = []
    seen: set[bytes] = set()
    serial = 0
    while len(out) < count:
        serial += 1
        farm = FARMS[int(rng.integers(len(FARMS)))]
        kind = KINDS[int(rng.integers(len(KINDS)))]
        product = PRODUCTS[int(rng.integers(len(PRODUCTS)))]
        week = int(rng.integers(1, 53))
        if kind == "harvest":
            key = f"brinewick/{farm}/harvest/2031-w{week:02d}/{product}/{serial:06d}"
            value = f'{{"wet_kg": {int(rng.integers(40, 900))}, "line": {int(rng.integers(1, 40))}}}'
        elif kind == "crate":
            key = f"brinewick/{farm}/crate/BW{int(rng.integers(16**6)):06X}"
            value = f'{{"product": "{product}", "dried_g": {int(rng.integers(200, 5000))}}}'
        elif kind == "tide-log":
            key = f"brinewick/{farm}/tide-log/2031-w{week:02d}/{serial:06d}"
            value = f'{{"height_cm": {int(rng.integers(-80, 420))}, "water_c": {float(rng.uniform(6, 17)):.1f}}}'
        elif kind == "order":
            key = f"brinewick/{farm}/order/{serial:06d}"
            value = f'{{"buyer": "{invented_name(rng)} {invented_name(rng, 3)}", "product": "{product}"}}'
        else:
            key = f"brinewick/{farm}/customer/{invented_name(rng).lower()}-{serial:06d}"
            value = f'{{"name": "{invented_name(rng)} {invented_name(rng, 3)}", "town": "{invented_name(rng)}"}}'
        kb = key.encode()
        if kb in seen:
            continue
        seen.add(kb)
        out.append(Record(kb, value.encode(), farm))
    return out


def farm_placement(node_ids: Sequence[str], seed: int = 1, moved_share: float = 0.25) -> dict[str, str]:
    """farm -> node holding its records: each farm's shed is wired to one node, and a share of the
    farms were moved to another node later, so placement is by history, not by name."""
    if not node_ids:
        raise ValueError("no nodes to place farms on")
    rng = np.random.default_rng(seed + 1)
    nodes = sorted(node_ids)
    place = {farm: nodes[i % len(nodes)] for i, farm in enumerate(FARMS)}
    for farm in FARMS:
        if rng.random() < moved_share:
            place[farm] = nodes[int(rng.integers(len(nodes)))]
    # No shed left without a farm (when there are enough farms): the busiest node hands one over.
    for node in nodes[:len(FARMS)]:
        if node not in place.values():
            counts = {n: list(place.values()).count(n) for n in nodes}
            busiest = max(counts, key=lambda n: counts[n])
            farm = next(f for f in FARMS if place[f] == busiest)
            place[farm] = node
    return place


def placed(records_: Sequence[Record], node_ids: Sequence[str], seed: int = 1) -> tuple[list[Record], list[str]]:
    """Records with their owner node (by farm, with records of big farms spread over two nodes)."""
    place = farm_placement(node_ids, seed)
    nodes = sorted(node_ids)
    owners = []
    for i, r in enumerate(records_):
        home = place[r.farm]
        # Every third record of a farm overflowed to the next node over when its shed filled up.
        owners.append(nodes[(nodes.index(home) + 1) % len(nodes)] if i % 3 == 2 else home)
    return list(records_), owners


def example_keys(recs: Sequence[Record], count: int = 3) -> list[str]:
    return [r.key.decode() for r in recs[:count]]
