"""NodeStorage of an agent: routed writes go to the store and wait for its feed; probes read the store.

Why not the node's writer: an agent's filter counts only what its store's change feed reports
(docs/agents.md, "Exactness"), so a Put or Delete routed through a coordinator is committed to
the store and acknowledged once the feed brought it into the ledger and the filter
(`FeedApplier.write` / `delete` return the stamp of the delta that carries it:
docs/architecture.md#2-read-your-writes-through-a-coordinator). `NodeCore.put_many` never
sees a routed write: the agent's NodeCore limits refuse values on purpose (AGENT_LIMITS).

Requests are checked against the agent's settings (max-key-bytes, max-value-bytes,
max-batch: the same limits as a node's); NodeCore's own limits guard only the ledger, whose
keys come from the store. A write waits in a thread of its own pool, never on the event loop.
"""

from __future__ import annotations

import asyncio
from concurrent.futures import Executor
from typing import Callable, Sequence

from shardsieve.node.adapters.applier import FeedApplier, FeedTimeout
from shardsieve.node.core import Limits, NodeCore, WriteResult, check_items, check_keys
from shardsieve.node.service import NodeStorageService
from shardsieve.node.store import KeyLedger, StoreError, StoreUnavailable
from shardsieve.sync.node_side import WriteStamp


class RoutedWrites:
    """Blocking routed writes of one agent (run them in a thread pool).

    `created` in each result says whether the agent's ledger lacked the key before the write
    (put) or held it (delete): what the agent had observed of the store just before, the
    same question a node's store answers inside its transaction."""

    def __init__(self, applier: FeedApplier, ledger: KeyLedger, timeout: float) -> None:
        self.applier = applier
        self.ledger = ledger
        self.timeout = timeout

    def put(self, items: Sequence[tuple[bytes, bytes]]) -> list[WriteResult]:
        before = self.ledger.get_many([k for k, _ in items])
        stamp = self._run(lambda: self.applier.write(items, self.timeout))
        return _results([v is None for v in before], stamp)

    def delete(self, keys: Sequence[bytes]) -> list[WriteResult]:
        before = self.ledger.get_many(keys)
        stamp = self._run(lambda: self.applier.delete(keys, self.timeout))
        return _results([v is not None for v in before], stamp)

    def _run(self, write: Callable[[], WriteStamp]) -> WriteStamp:
        url = self.applier.external.url
        try:
            return write()
        except FeedTimeout as exc:
            raise StoreUnavailable(f"the write is in {url}, but {exc}; retry it (writes are idempotent)") from None
        except StoreError:
            raise
        except Exception as exc:  # noqa: BLE001 - the driver's error (redis, psycopg2), named in the message
            raise StoreUnavailable(f"{url} did not confirm the write (it may or may not be applied): "
                                   f"{type(exc).__name__}: {exc}") from None


def _results(flags: list[bool], stamp: WriteStamp) -> list[WriteResult]:
    return [WriteResult(flag, stamp.epoch, stamp.sequence, stamp.old_position) for flag in flags]


class AgentStorageService(NodeStorageService):
    """The node's servicer with the agent's write and probe paths (module docstring)."""

    def __init__(self, core: NodeCore, writes: RoutedWrites, limits: Limits, readers: Executor | None,
                 writers: Executor | None) -> None:
        super().__init__(core, None, readers)
        self.writes = writes
        self.limits = limits
        self.writers = writers

    async def _put(self, items: list[tuple[bytes, bytes]]) -> list[WriteResult]:
        self.core.require_ready()
        checked = check_items(items, self.limits)
        if not checked:
            return []
        return await asyncio.get_running_loop().run_in_executor(self.writers, self.writes.put, checked)

    async def _delete(self, keys: list[bytes]) -> list[WriteResult]:
        self.core.require_ready()
        checked = [bytes(k) for k in keys]
        check_keys(checked, self.limits)
        if not checked:
            return []
        return await asyncio.get_running_loop().run_in_executor(self.writers, self.writes.delete, checked)

    async def _get(self, keys: list[bytes]) -> list[bytes | None]:
        checked = [bytes(k) for k in keys]
        check_keys(checked, self.limits)
        return await self._read(self.core.get_many, checked)
