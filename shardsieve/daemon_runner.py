"""The process lifecycle both daemons share: start, serve until SIGTERM/SIGINT, stop cleanly."""

from __future__ import annotations

import logging
import signal
import sys
import threading
from typing import Callable, Protocol, TypeVar


class Daemon(Protocol):
    def stop(self, grace: float = ...) -> None: ...


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

    def on_signal(signum: int, _frame: object) -> None:
        log.info("signal received", extra={"signal": signal.Signals(signum).name})
        stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    try:
        daemon = build()
    except startup_errors as exc:
        log.error("cannot start", extra={"error": str(exc)})
        print(f"shardsieve {role}: {exc}", file=sys.stderr)
        return 1
    try:
        start(daemon, stop)
        while not stop.wait(0.5):
            pass
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
