"""Wiring of an agent process: the node daemon over a store it does not own (docs/agents.md).

The agent is NodeDaemon with four parts replaced: the core is NodeCore over
AgentStore(ledger, external store), the filter is loaded after the store's first listing
(FeedApplier.catch_up), writes routed through a coordinator go to the store and wait for its
feed (node/agent_service.py), and stopping ends the feed before the core. Everything else —
gRPC server, health, TLS, tokens, push timer, heartbeats, sync drivers, metrics, logs, SIGHUP —
is the node's, driven by the same settings.

Staleness while the feed is not live (docs/agents.md, "Staleness and the new epoch"): the
applier tells every state change (`on_state`, from its thread). While the state is not LIVE
(a relisting after a break: listing, sweeping, broken) every sync stream is held closed, so
every coordinator sees the stream down and lists the agent as stale, which safe mode adds to
every candidate list (docs/architecture.md#3-bounded-staleness). Streams open only after the
first listing (as for any node, after the filter load).

New epoch after a break: once the relisting repaired the ledger and the feed is live again,
the streams are released and a rebuild of the same size is requested (NodeSync's rebuild: a
scan of the ledger in key order into a new filter, a new epoch, a verified switch-over at
each coordinator, which serves the old replica until then:
docs/architecture.md#1-no-false-negatives-once-synced). A rebuild already running is left to
finish; the owed one is asked for when the node is idle again.
"""

from __future__ import annotations

import asyncio
import logging
import math
import sys
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from urllib.parse import quote, urlsplit, urlunsplit

from shardsieve import logs
from shardsieve.daemon_runner import EXIT_FAILED, run_until_signalled
from shardsieve.node.adapters.applier import AGENT_LIMITS, FeedApplier, FeedState, FeedTimeout
from shardsieve.node.adapters.ledger import AgentStore, open_ledger
from shardsieve.node.agent_service import AgentStorageService, RoutedWrites
from shardsieve.node.core import LoadCancelled, NodeCore
from shardsieve.node.daemon import NodeDaemon
from shardsieve.node.service import NodeStorageService
from shardsieve.node.settings import AgentSettings
from shardsieve.node.store import ExternalStore, KeyLedger, StoreError, open_external
from shardsieve.sync.node_side import RebuildPhase

log = logging.getLogger("shardsieve.agent")

#: Exit code when the store cannot be watched: unreachable, or not set up for an agent (the
#: one line on stderr says what to change). docs/agents.md, "Exit codes".
EXIT_STORE_REFUSED = 4
WRITE_THREADS = 8


def store_address(settings: AgentSettings) -> str:
    """The store address with the password of store-password-file put in (when it has none)."""
    password = settings.store_password()
    parts = urlsplit(settings.store)
    if not password or parts.password:
        return settings.store
    user = quote(parts.username or "", safe="")
    host = parts.netloc.rpartition("@")[2]
    return urlunsplit(parts._replace(netloc=f"{user}:{quote(password, safe='')}@{host}"))


def open_agent_store(settings: AgentSettings) -> ExternalStore:
    """Connect to the store and check its set-up (StoreError with the fix when it is not ready)."""
    options: dict[str, object] = {}
    if settings.store_kind == "redis":
        options["configure_notifications"] = settings.configure_notifications
    else:
        options["node_id"] = settings.id
    return open_external(store_address(settings), **options)


class AgentDaemon(NodeDaemon):
    """One running agent; build it on the event loop that runs it (see the module doc)."""

    writes_own_store = False

    def __init__(self, settings: AgentSettings, external: ExternalStore) -> None:
        self.external = external
        self._loop = asyncio.get_running_loop()
        self._feed_live = False          # the loop's view of the applier's state
        self._rebuild_owed = False
        self._rebuild_task: asyncio.Task[None] | None = None
        self.rebuilds_after_break = 0
        self.writers = ThreadPoolExecutor(max_workers=WRITE_THREADS, thread_name_prefix="agent-write")
        super().__init__(settings)

    # ------------------------------------------------------------------ the node's parts, replaced
    def _open_core(self) -> NodeCore:
        settings = self.settings
        assert isinstance(settings, AgentSettings)
        self.ledger: KeyLedger = open_ledger(settings.ledger_kind, settings.state_dir)
        self.applier = FeedApplier(self.external, self.ledger, poll_interval=0.05,
                                   on_state=self._state_from_feed_thread)
        return NodeCore(settings.id, AgentStore(self.ledger, self.external), capacity=settings.capacity,
                        target_fpr=settings.fpr, seed=settings.seed, history_limit=settings.history_limit,
                        push_threshold=settings.push_threshold, push_interval=settings.push_interval_ms / 1000.0,
                        limits=AGENT_LIMITS, scan_batch=settings.scan_batch)

    def _storage_service(self) -> NodeStorageService:
        settings = self.settings
        assert isinstance(settings, AgentSettings)
        writes = RoutedWrites(self.applier, self.ledger, settings.write_timeout_ms / 1000.0)
        return AgentStorageService(self.core, writes, self.limits, self.readers, self.writers)

    async def _load(self, cancel: threading.Event | None) -> None:
        """List the store into the ledger (no deadline: health says NOT_SERVING meanwhile), load
        the filter from the ledger, then apply the feed live."""
        def progress(keys: int) -> None:
            log.info("listing the store", extra={"store": self.external.url, "keys_counted": keys})

        def load() -> None:
            try:
                self.applier.catch_up(math.inf, cancel, progress)
            except FeedTimeout as exc:
                if cancel is not None and cancel.is_set():
                    raise LoadCancelled(str(exc)) from None
                raise
            self.core.load(cancel=cancel)
            self.applier.go_live(self.core)

        await self._loop.run_in_executor(None, load)

    def _describe_store(self) -> dict[str, object]:
        settings = self.settings
        assert isinstance(settings, AgentSettings)
        return {"store": self.external.url, "ledger": settings.ledger_kind, "state_dir": str(settings.state_dir)}

    def _driver_hold(self) -> str:
        return "" if self._feed_live else f"the store's feed is {self.applier.state}"

    async def _stop_feed(self) -> None:
        if self._rebuild_task is not None:
            self._rebuild_task.cancel()
        await self._loop.run_in_executor(None, self.applier.stop)

    async def _close_store(self) -> None:
        self.writers.shutdown(wait=True)
        self.external.close()
        self.ledger.close()

    def _feed_figures(self) -> dict[str, float]:
        c = self.applier.counters
        return {"feed_live": 1.0 if self.applier.state is FeedState.LIVE else 0.0, "listings": c.listings,
                "feed_breaks": c.breaks, "keys_counted": c.keys_counted, "keys_uncounted": c.keys_uncounted,
                "keys_swept": c.swept, "rebuilds_after_break": self.rebuilds_after_break}

    # ------------------------------------------------------------------ staleness and the new epoch
    def _state_from_feed_thread(self, state: FeedState) -> None:
        try:
            self._loop.call_soon_threadsafe(self._on_feed_state, state)
        except RuntimeError:      # the loop is closed (shutdown)
            pass

    def _on_feed_state(self, state: FeedState) -> None:
        """On the loop, in the order the applier changed state (module doc)."""
        if state is FeedState.LIVE:
            self._feed_live = True
            for driver in self.drivers:
                driver.release()
            if self._rebuild_owed and (self._rebuild_task is None or self._rebuild_task.done()):
                self._rebuild_task = asyncio.create_task(self._rebuild_when_idle(), name="agent-rebuild")
            return
        if self._feed_live:
            self._rebuild_owed = True
            log.warning("holding the sync streams until the store is listed again",
                        extra={"state": str(state), "reason": self.applier.last_error})
        self._feed_live = False
        for driver in self.drivers:
            driver.hold(f"the store's feed is {state}")

    async def _rebuild_when_idle(self) -> None:
        interval = self.settings.push_interval_ms / 1000.0
        while self._rebuild_owed and self._feed_live and not self._stopped:
            if await self._loop.run_in_executor(self.sync_thread, self._request_rebuild):
                self._rebuild_owed = False
                self.rebuilds_after_break += 1
                return
            await asyncio.sleep(interval)     # a rebuild is running: ask again once it ended

    def _request_rebuild(self) -> bool:
        """A rebuild of the current size under a new epoch; False while another one runs."""
        with self.core.sync_step() as sync:
            if sync.rebuild_phase is not RebuildPhase.IDLE:
                return False
            sync.request_rebuild(sync.capacity, sync.target_fpr, requested_by="agent", now=time.monotonic(),
                                 reason=f"the store was listed again after its feed broke "
                                        f"({self.applier.last_listing_reason})")
            return True


def run(settings: AgentSettings) -> int:
    """Connect to the store, then run the agent until SIGTERM/SIGINT; returns the exit code."""
    logs.setup_logging("agent", settings.id, settings.log_format, settings.log_level)
    try:
        external = open_agent_store(settings)
    except StoreError as exc:
        print(f"shardsieve agent: {exc}", file=sys.stderr)
        return EXIT_STORE_REFUSED
    except ImportError as exc:
        print(f"shardsieve agent: the store drivers are not installed ({exc}); "
              f"pip install 'shardsieve[agents]'", file=sys.stderr)
        return EXIT_FAILED

    async def start(daemon: AgentDaemon, cancel: threading.Event) -> None:
        await daemon.start(cancel)

    try:
        return run_until_signalled("agent", log, lambda: AgentDaemon(settings, external), start,
                                   startup_errors=(StoreError, OSError, RuntimeError, ValueError),
                                   quiet_stops=(LoadCancelled,))
    finally:
        external.close()     # again after a clean stop (harmless): also when the build failed
