"""A raw RESP2 connection for the Redis agent's subscription: commands out, replies parsed in bulk.

Why not redis-py's connection here: its pure-Python parser reads a published message one
line at a time (a socket-buffer call per line), about 35 µs per key event on our 2-core
machine, which capped the agent at a fraction of the rate Redis accepts writes
(`shardsieve bench agent`). This reader takes whatever the socket holds in one recv and
parses every complete reply in it with index arithmetic; an incomplete tail waits for the
next read.

The format is RESP2 (Redis docs, "Redis serialization protocol specification"): a reply is a
simple string `+...\\r\\n`, an error `-...\\r\\n`, an integer `:n\\r\\n`, a bulk string
`$len\\r\\n<len bytes>\\r\\n` (`$-1\\r\\n`: null) or an array `*n\\r\\n` followed by n replies
(`*-1\\r\\n`: null). Bulk strings are length-prefixed, so keys holding CR or LF are read
exactly.
"""

from __future__ import annotations

import select
import socket
import ssl
from typing import Any, Sequence

CRLF = b"\r\n"
MESSAGE_HEAD = b"*3\r\n$7\r\nmessage\r\n$"   # a published message, up to its channel's length
RECV_BYTES = 1 << 18
MAX_READ_BYTES = 4 << 20      # one read_replies call parses at most about this much


class RespError(Exception):
    """An error reply (`-ERR ...`) from the server."""


class _Incomplete(Exception):
    """The buffer ends inside a reply."""


def parse(buf: bytes, pos: int) -> tuple[Any, int]:
    """The reply starting at `pos` and the position after it; _Incomplete when the buffer ends first."""
    end = buf.find(CRLF, pos)
    if end < 0:
        raise _Incomplete
    kind = buf[pos]
    if kind == 36:                              # '$' bulk string
        n = int(buf[pos + 1:end])
        if n < 0:
            return None, end + 2
        stop = end + 2 + n
        if stop + 2 > len(buf):
            raise _Incomplete
        return buf[end + 2:stop], stop + 2
    if kind == 42:                              # '*' array
        n = int(buf[pos + 1:end])
        if n < 0:
            return None, end + 2
        items = []
        at = end + 2
        for _ in range(n):
            item, at = parse(buf, at)
            items.append(item)
        return items, at
    if kind == 58:                              # ':' integer
        return int(buf[pos + 1:end]), end + 2
    if kind == 43:                              # '+' simple string
        return buf[pos + 1:end], end + 2
    if kind == 45:                              # '-' error
        return RespError(buf[pos + 1:end].decode("utf-8", "replace")), end + 2
    raise ConnectionError(f"not a RESP2 reply (first byte {buf[pos:pos + 1]!r})")


def encode(args: Sequence[bytes | str | int]) -> bytes:
    """A command as a RESP2 array of bulk strings."""
    parts = [b"*%d\r\n" % len(args)]
    for arg in args:
        data = arg if isinstance(arg, bytes) else str(arg).encode()
        parts.append(b"$%d\r\n%s\r\n" % (len(data), data))
    return b"".join(parts)


class RespConnection:
    """One connection: blocking commands for the set-up, then non-blocking bulk reads."""

    def __init__(self, host: str, port: int, *, tls: bool = False, timeout: float = 10.0,
                 connect_timeout: float = 5.0) -> None:
        sock = socket.create_connection((host, port), timeout=connect_timeout)
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        if tls:
            sock = ssl.create_default_context().wrap_socket(sock, server_hostname=host)
        sock.settimeout(timeout)
        self.sock = sock
        self.timeout = timeout
        self._buf = b""                  # unparsed bytes
        self._chunks: list[bytes] = []   # read since, joined before the next parse

    def send(self, *args: bytes | str | int) -> None:
        self.sock.sendall(encode(args))

    def command(self, *args: bytes | str | int) -> Any:
        """Send one command and wait for its reply (RespError for an error reply)."""
        self.send(*args)
        return self.read_one()

    def read_one(self) -> Any:
        """The next reply, waiting for it (the socket's timeout applies)."""
        while True:
            self._join()
            try:
                reply, pos = parse(self._buf, 0)
            except (_Incomplete, IndexError):
                self._fill(blocking=True)
                continue
            self._buf = self._buf[pos:]
            if isinstance(reply, RespError):
                raise reply
            return reply

    def read_replies(self, wait: float) -> list[Any]:
        """Every complete reply readable now, waiting up to `wait` s for the first bytes."""
        if self._pending() or self._readable(wait):
            got = 0
            while got < MAX_READ_BYTES and self._fill(blocking=False):
                got += RECV_BYTES
                if not self._pending() and not self._readable(0.0):
                    break
        return self._parse_all()

    def close(self) -> None:
        try:
            self.sock.close()
        except OSError:
            pass

    # ------------------------------------------------------------------ internals
    def _pending(self) -> bool:
        return isinstance(self.sock, ssl.SSLSocket) and self.sock.pending() > 0

    def _readable(self, wait: float) -> bool:
        ready, _, _ = select.select([self.sock], [], [], wait)
        return bool(ready)

    def _join(self) -> None:
        if self._chunks:
            self._buf = b"".join([self._buf, *self._chunks])
            self._chunks = []

    def _parse_all(self) -> list[Any]:
        """Every complete reply in the buffer. A published message (`*3 $7 message $n channel
        $m data`, nearly every reply on a subscription) is read inline; anything else, or a
        message whose data is not a bulk string, goes through parse()."""
        self._join()
        out = []
        buf, pos, size = self._buf, 0, len(self._buf)
        find, head, skip = buf.find, MESSAGE_HEAD, len(MESSAGE_HEAD)
        while pos < size:
            if buf.startswith(head, pos):
                at = pos + skip
                end = find(CRLF, at)
                if end >= 0:
                    stop = end + 2 + int(buf[at:end])
                    if stop + 3 < size and buf[stop + 2] == 36:      # '$': a bulk string follows
                        end2 = find(CRLF, stop + 3)
                        if end2 >= 0:
                            stop2 = end2 + 2 + int(buf[stop + 3:end2])
                            if stop2 + 2 <= size and stop2 >= end2 + 2:
                                out.append([b"message", buf[end + 2:stop], buf[end2 + 2:stop2]])
                                pos = stop2 + 2
                                continue
            try:
                reply, pos_after = parse(buf, pos)
            except (_Incomplete, IndexError):
                break
            out.append(reply)
            pos = pos_after
        self._buf = buf[pos:]
        return out

    def _fill(self, blocking: bool) -> bool:
        """Read what the socket holds (blocking: wait for something). False: nothing was there."""
        try:
            if blocking:
                data = self.sock.recv(RECV_BYTES)
            else:
                self.sock.setblocking(False)
                try:
                    data = self.sock.recv(RECV_BYTES)
                finally:
                    self.sock.settimeout(self.timeout)
        except (BlockingIOError, ssl.SSLWantReadError):
            return False
        if not data:
            raise ConnectionError("Connection closed by server.")
        self._chunks.append(data)
        return True
