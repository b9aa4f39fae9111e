"""The process lifecycle both daemons share, on one asyncio event loop: build, start, serve until
SIGTERM/SIGINT, stop cleanly; SIGHUP re-reads the token files (see docs/security.md, "Rotating
tokens").

Exit codes of a daemon (docs/node.md and docs/coordinator.md, "Exit codes"): 0 after a clean
stop, 1 when it cannot start (one line on stderr says why) or fails while serving, 2 for an
invalid setting (the command line reports it before anything starts), 3 when its listen
address is taken or not local (`EXIT_ADDRESS_IN_USE`, one line naming the address).
"""

from __future__ import annotations

import asyncio
import logging
import signal
import sys
import threading
from typing import Awaitable, Callable, Protocol, TypeVar

from shardsieve.security import AddressInUse

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_ADDRESS_IN_USE = 3


class Daemon(Protocol):
    async def stop(self, grace: float = ...) -> None: ...

    def reload_secrets(self) -> list[str]: ...


D = TypeVar("D", bound=Daemon)


def run_until_signalled(role: str, log: logging.Logger, build: Callable[[], D],
                        start: Callable[[D, threading.Event], Awaitable[None]], *,
                        startup_errors: tuple[type[BaseException], ...],
                        quiet_stops: tuple[type[BaseException], ...] = ()) -> int:
    """Build and start a daemon on a new event loop, serve until a signal, stop it; returns the
    process exit code (module docstring).

    `build()` runs on the loop (gRPC's asyncio server belongs to the loop it was made on).
    `start(daemon, cancel)` may run long (the node loads its filter); `cancel` is set by a
    signal meanwhile, for work in threads to notice. `startup_errors` while building: one line
    on stderr, exit 1. `quiet_stops` while starting (a signal during the filter load): exit 0.
    """
    return asyncio.run(_serve(role, log, build, start, startup_errors, quiet_stops))


async def _serve(role: str, log: logging.Logger, build: Callable[[], D],
                 start: Callable[[D, threading.Event], Awaitable[None]],
                 startup_errors: tuple[type[BaseException], ...],
                 quiet_stops: tuple[type[BaseException], ...]) -> int:
    loop = asyncio.get_running_loop()
    stop = asyncio.Event()
    cancel = threading.Event()
    reload = asyncio.Event()
    wake = asyncio.Event()

    def on_signal(signum: int) -> None:
        log.info("signal received", extra={"signal": signal.Signals(signum).name})
        stop.set()
        cancel.set()
        wake.set()

    def on_hangup() -> None:
        reload.set()      # handled below, outside the signal handler
        wake.set()

    for signum in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(signum, on_signal, signum)
    loop.add_signal_handler(signal.SIGHUP, on_hangup)
    try:
        daemon = build()
    except AddressInUse as exc:
        print(f"shardsieve {role}: {exc}", file=sys.stderr)
        return EXIT_ADDRESS_IN_USE
    except startup_errors as exc:
        print(f"shardsieve {role}: {exc}", file=sys.stderr)
        return EXIT_FAILED
    try:
        await start(daemon, cancel)
        while not stop.is_set():
            await wake.wait()
            wake.clear()
            if reload.is_set():
                reload.clear()
                _reload(daemon, log)
    except quiet_stops as exc:
        log.info("stopped before serving", extra={"reason": str(exc)})
        await daemon.stop(grace=1.0)
        return EXIT_OK
    except Exception:
        log.exception("fatal error")
        await daemon.stop(grace=1.0)
        return EXIT_FAILED
    await daemon.stop()
    return EXIT_OK


def _reload(daemon: Daemon, log: logging.Logger) -> None:
    """Apply the token files as they are now; a bad one is logged and changes nothing."""
    try:
        changed = daemon.reload_secrets()
    except (ValueError, OSError) as exc:      # ConfigError is a ValueError
        log.error("token files not reloaded; the tokens in force stay", extra={"error": str(exc)})
        return
    log.info("token files reloaded", extra={"changed": changed or "none"})
