"""Start, watch and stop daemon processes on loopback, for cluster tests, benchmarks and the tour.

Typical use::

    from shardsieve.testing.procs import free_port, shardsieve_argv, start_daemon

    port = free_port()
    proc = start_daemon(
        shardsieve_argv("node", "--id", "n1", "--listen", f"127.0.0.1:{port}", "--data", str(tmp / "n1")),
        log_path=tmp / "n1.log",
        health_address=f"127.0.0.1:{port}",   # waits until gRPC health says SERVING
    )
    try:
        ...
    finally:
        proc.stop()          # SIGTERM, then SIGKILL after the deadline; returns the exit code

`start_daemon` takes any argv, so the same helpers start coordinators. The process's stdout
and stderr go to `log_path`; on a failed start the error carries the log's tail, and
`proc.log_tail()` is handy in assertion messages. Every wait takes a deadline; nothing sleeps
blindly (`wait_until` polls a predicate).
"""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator, Mapping, Sequence, TypeVar

T = TypeVar("T")


class ProcessError(RuntimeError):
    """A daemon did not start, did not become healthy in time, or exited unexpectedly."""


def free_port(host: str = "127.0.0.1") -> int:
    """A TCP port that was free a moment ago (bind to port 0, read it back, release it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind((host, 0))
        return int(sock.getsockname()[1])


def shardsieve_argv(*args: str) -> list[str]:
    """argv running the `shardsieve` CLI with this interpreter (works without the console script on PATH)."""
    return [sys.executable, "-m", "shardsieve.cli.main", *args]


def wait_until(predicate: Callable[[], T], timeout: float, interval: float = 0.02,
               message: str | Callable[[], str] = "condition") -> T:
    """Poll predicate until it returns a truthy value (returned) or raise TimeoutError after timeout s.

    Exceptions raised by the predicate count as "not yet" and the last one is chained.
    """
    deadline = time.monotonic() + timeout
    last_exc: BaseException | None = None
    while True:
        try:
            value = predicate()
            if value:
                return value
        except Exception as exc:  # noqa: BLE001 - a not-yet-ready service raises; keep polling
            last_exc = exc
        if time.monotonic() >= deadline:
            text = message() if callable(message) else message
            raise TimeoutError(f"timed out after {timeout:.1f}s waiting for {text}") from last_exc
        time.sleep(interval)


def health_status(address: str, service: str = "", timeout: float = 1.0,
                  credentials: object = None) -> int | None:
    """The gRPC health status (grpc.health.v1 enum number; 1 = SERVING), or None when unreachable.

    `credentials`: grpc.ChannelCredentials for a TLS daemon (None: plaintext)."""
    import grpc
    from grpc_health.v1 import health_pb2, health_pb2_grpc

    channel_ctx = (grpc.secure_channel(address, credentials) if credentials is not None  # type: ignore[arg-type]
                   else grpc.insecure_channel(address))
    with channel_ctx as channel:
        try:
            reply = health_pb2_grpc.HealthStub(channel).Check(
                health_pb2.HealthCheckRequest(service=service), timeout=timeout)
        except grpc.RpcError:
            return None
        return int(reply.status)


@dataclass
class DaemonProcess:
    """A started daemon: its Popen, argv and log file. Use stop() (or kill()) when done."""

    argv: list[str]
    popen: subprocess.Popen[bytes]
    log_path: Path
    health_address: str | None = None
    credentials: object = None          # grpc.ChannelCredentials of a TLS daemon's health checks
    _log_handle: object = field(default=None, repr=False)

    @property
    def pid(self) -> int:
        return self.popen.pid

    def alive(self) -> bool:
        return self.popen.poll() is None

    def log_text(self) -> str:
        try:
            return self.log_path.read_text(errors="replace")
        except FileNotFoundError:
            return ""

    def log_tail(self, lines: int = 40) -> str:
        tail = self.log_text().splitlines()[-lines:]
        return f"--- last {len(tail)} lines of {self.log_path} ---\n" + "\n".join(tail)

    def wait_healthy(self, timeout: float = 30.0, service: str = "") -> None:
        """Wait until the process answers gRPC health SERVING; fail early if it exits."""
        if self.health_address is None:
            raise ProcessError("no health_address was given for this process")
        address = self.health_address

        def serving() -> bool:
            if not self.alive():
                raise ProcessError(f"process exited with code {self.popen.returncode} before serving\n"
                                   + self.log_tail())
            return health_status(address, service, credentials=self.credentials) == 1

        deadline = time.monotonic() + timeout
        while True:
            if serving():
                return
            if time.monotonic() >= deadline:
                raise ProcessError(f"{address} not SERVING after {timeout:.1f}s\n" + self.log_tail())
            time.sleep(0.05)

    def stop(self, timeout: float = 10.0) -> int:
        """SIGTERM, wait up to timeout, then SIGKILL. Returns the exit code (negative: killed by signal)."""
        if self.alive():
            self.popen.send_signal(signal.SIGTERM)
            try:
                self.popen.wait(timeout)
            except subprocess.TimeoutExpired:
                self.popen.kill()
                self.popen.wait(10)
        self._close_log()
        return int(self.popen.returncode)

    def kill(self) -> int:
        """SIGKILL at once (a crash, as kill -9) and reap. Returns the exit code."""
        if self.alive():
            self.popen.send_signal(signal.SIGKILL)
        self.popen.wait(10)
        self._close_log()
        return int(self.popen.returncode)

    def signal(self, sig: int) -> None:
        """Send any signal (e.g. SIGSTOP/SIGCONT to freeze a daemon)."""
        self.popen.send_signal(sig)

    def _close_log(self) -> None:
        handle = self._log_handle
        if handle is not None:
            handle.close()  # type: ignore[attr-defined]
            self._log_handle = None


_INTERRUPTS = (signal.SIGINT, signal.SIGTERM)


@contextlib.contextmanager
def _interrupts_deferred() -> Iterator[None]:
    """Hold SIGINT/SIGTERM back for a moment: record them, then re-raise them on the way out.

    A Python-level handler, not a blocked signal mask: a mask would be inherited by the
    daemons spawned meanwhile, which could then never be stopped with SIGTERM.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    pending: list[int] = []
    previous = {sig: signal.signal(sig, lambda signum, _frame: pending.append(signum)) for sig in _INTERRUPTS}
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        for sig in pending:
            signal.raise_signal(sig)


def start_daemon(argv: Sequence[str], log_path: Path, *, env: Mapping[str, str] | None = None,
                 health_address: str | None = None, health_service: str = "",
                 timeout: float = 30.0, cwd: Path | None = None, credentials: object = None,
                 on_spawn: Callable[[DaemonProcess], None] | None = None) -> DaemonProcess:
    """Start argv with stdout+stderr appended to log_path; if health_address is given, wait for SERVING.

    `env` entries are added to (not replacing) this process's environment. On a failed start
    the process is killed and ProcessError carries the log tail. `on_spawn` records the new
    process (e.g. in a cluster's table) with SIGINT/SIGTERM held back, so a Ctrl-C can never
    land between the spawn and the record and leave an untracked daemon behind.
    """
    log_path = Path(log_path)
    log_path.parent.mkdir(parents=True, exist_ok=True)
    handle = log_path.open("ab")
    full_env = dict(os.environ)
    full_env.update(env or {})
    full_env.setdefault("PYTHONUNBUFFERED", "1")
    # Test, benchmark and tour daemons listen on loopback: plaintext is allowed here explicitly
    # (the daemons still log a warning); a caller passing TLS settings or "false" overrides it.
    full_env.setdefault("SHARDSIEVE_NODE_ALLOW_PLAINTEXT", "true")
    full_env.setdefault("SHARDSIEVE_COORDINATOR_ALLOW_PLAINTEXT", "true")
    with _interrupts_deferred():        # a Ctrl-C that comes meanwhile is raised after the record
        popen = subprocess.Popen(list(argv), stdout=handle, stderr=subprocess.STDOUT, env=full_env,
                                 cwd=str(cwd) if cwd else None, start_new_session=True)
        proc = DaemonProcess(list(argv), popen, log_path, health_address, credentials, handle)
        if on_spawn is not None:
            on_spawn(proc)
    if health_address is not None:
        try:
            proc.wait_healthy(timeout, health_service)
        except BaseException:
            proc.kill()
            raise
    return proc
