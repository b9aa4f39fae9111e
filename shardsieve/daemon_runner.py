"""The process lifecycle both daemons share: start, serve until SIGTERM/SIGINT, stop cleanly;
SIGHUP re-reads the token files (see docs/security.md, "Rotating tokens")."""

from __future__ import annotations

import logging
import signal
import sys
import threading
from typing import Callable, Protocol, TypeVar


class Daemon(Protocol):
    def stop(self, grace: float = ...) -> None: ...

    def reload_secrets(self) -> list[str]: ...


D = TypeVar("D", bound=Daemon)


def run_until_signalled(role: str, log: logging.Logger, build: Callable[[], D],
                        start: Callable[[D, threading.Event], None], *,
                        startup_errors: tuple[type[BaseException], ...],
                        quiet_stops: tuple[type[BaseException], ...] = ()) -> int:
    """Build and start a daemon, serve until a signal, stop it; returns the process exit code.

    `startup_errors` while building: one line on stderr naming the problem, exit 1.
    `quiet_stops` while starting (e.g. a signal during the startup filter load): exit 0.
    """
    stop = threading.Event()
    reload = threading.Event()

    def on_signal(signum: int, _frame: object) -> None:
        log.info("signal received", extra={"signal": signal.Signals(signum).name})
        stop.set()

    def on_hangup(_signum: int, _frame: object) -> None:
        reload.set()     # handled by the main loop, outside the signal handler

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    signal.signal(signal.SIGHUP, on_hangup)
    try:
        daemon = build()
    except startup_errors as exc:
        log.error("cannot start", extra={"error": str(exc)})
        print(f"shardsieve {role}: {exc}", file=sys.stderr)
        return 1
    try:
        start(daemon, stop)
        while not stop.wait(0.2):
            if reload.is_set():
                reload.clear()
                _reload(daemon, log)
    except quiet_stops as exc:
        log.info("stopped before serving", extra={"reason": str(exc)})
        daemon.stop(grace=1.0)
        return 0
    except Exception:
        log.exception("fatal error")
        daemon.stop(grace=1.0)
        return 1
    daemon.stop()
    return 0


def _reload(daemon: Daemon, log: logging.Logger) -> None:
    """Apply the token files as they are now; a bad one is logged and changes nothing."""
    try:
        changed = daemon.reload_secrets()
    except (ValueError, OSError) as exc:      # ConfigError is a ValueError
        log.error("token files not reloaded; the tokens in force stay", extra={"error": str(exc)})
        return
    log.info("token files reloaded", extra={"changed": changed or "none"})
