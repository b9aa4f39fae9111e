"""An agent inside a Python store's own write path (docs/agents.md, "Embedded agent").

The host store calls `changed(added, removed)` after each commit; the agent keeps the
counting filter (a NodeCore over a MemoryKeyLedger, so the sync driver can stream it to
coordinators like any node's) and counts only verified transitions: a key reported added
that the ledger already holds is not counted twice, a key reported removed that the ledger
does not hold is not uncounted. A host that reports an overwrite as an addition, or
repeats a delete, therefore costs nothing.

Start-up: `start(keys)` lists the host's keys while the host keeps writing. A key removed
during the listing is remembered (a tombstone), so a listing batch read before that removal
cannot bring it back; a key added during the listing is in the ledger at once. Writes wait
while the filter is loaded from the ledger (one pass over the keys in memory).
"""

from __future__ import annotations

import itertools
import threading
from pathlib import Path
from typing import Iterable, Sequence

from shardsieve.node.adapters.applier import AGENT_LIMITS
from shardsieve.node.adapters.ledger import META_FILE, MemoryKeyLedger
from shardsieve.node.core import NodeCore
from shardsieve.sync.node_side import WriteStamp


class EmbeddedAgent:
    """The filter of a store written in Python, fed by the store's own commits."""

    def __init__(self, node_id: str, *, capacity: int, target_fpr: float, state_dir: Path | None = None,
                 seed: int = 0, listing_batch: int = 1000, **core_options: object) -> None:
        self.ledger = MemoryKeyLedger(None if state_dir is None else Path(state_dir) / META_FILE)
        self.core = NodeCore(node_id, self.ledger, capacity=capacity, target_fpr=target_fpr, seed=seed,
                             limits=AGENT_LIMITS, **core_options)  # type: ignore[arg-type]
        self.listing_batch = listing_batch
        self._lock = threading.Lock()
        self._tombstones: set[bytes] | None = None
        self._live = False

    @property
    def live(self) -> bool:
        return self._live

    def start(self, keys: Iterable[bytes]) -> None:
        """List the host's keys (any order, repeats allowed) and load the filter from them.
        `changed` may be called from other threads meanwhile."""
        with self._lock:
            if self._live or self._tombstones is not None:
                raise RuntimeError("start() runs once")
            self._tombstones = set()
        iterator = iter(keys)
        while True:
            batch = [bytes(k) for k in itertools.islice(iterator, self.listing_batch)]
            if not batch:
                break
            with self._lock:
                tomb = self._tombstones
                self.ledger.put_many([(k, b"") for k in batch if k and k not in tomb])
        with self._lock:
            self._tombstones = None
            self.core.load()
            self._live = True

    def changed(self, added: Sequence[bytes] = (), removed: Sequence[bytes] = ()) -> WriteStamp | None:
        """A committed change of the host store (no key in both lists; removals apply first).
        Returns the stamp for a WriteAck once live (None while start() lists)."""
        added = [bytes(k) for k in added if k]
        removed = [bytes(k) for k in removed if k]
        with self._lock:
            if not self._live:
                if self._tombstones is None:
                    raise RuntimeError("call start() before reporting changes")
                self._tombstones.update(removed)
                self.ledger.delete_many(removed)
                self.ledger.put_many([(k, b"") for k in added])
                return None
            batch = self.core.limits.max_batch
            for i in range(0, len(removed), batch):
                self.core.delete_many(removed[i:i + batch])
            for i in range(0, len(added), batch):
                self.core.put_many([(k, b"") for k in added[i:i + batch]])
            with self.core.sync_step() as sync:
                return sync.record()
