"""The Redis agent's RESP2 reader against the protocol's published byte layouts (Redis docs,
"Redis serialization protocol specification": simple strings, errors, integers, bulk strings
with their length prefix, arrays, and the null bulk string and null array), and against a
real socket pair: replies split at every byte boundary are read whole, once."""

from __future__ import annotations

import socket

import pytest

from shardsieve.node.adapters.resp import RespConnection, RespError, encode, parse

MESSAGE = b"*3\r\n$7\r\nmessage\r\n$18\r\n__keyevent@0__:new\r\n$11\r\nbed\r\n4\x00kelp\r\n"


@pytest.mark.parametrize("wire, value", [
    (b"+OK\r\n", b"OK"),
    (b":1000\r\n", 1000),
    (b"$5\r\nhello\r\n", b"hello"),
    (b"$0\r\n\r\n", b""),
    (b"$-1\r\n", None),
    (b"*-1\r\n", None),
    (b"*2\r\n$3\r\nfoo\r\n$3\r\nbar\r\n", [b"foo", b"bar"]),
    (b"*3\r\n:1\r\n*1\r\n+x\r\n$-1\r\n", [1, [b"x"], None]),
    (MESSAGE, [b"message", b"__keyevent@0__:new", b"bed\r\n4\x00kelp"]),   # a key holding CR LF and NUL
])
def test_the_published_layouts_parse(wire: bytes, value: object) -> None:
    assert parse(wire, 0) == (value, len(wire))


def test_an_error_reply_is_an_error_value() -> None:
    reply, _ = parse(b"-ERR unknown command\r\n", 0)
    assert isinstance(reply, RespError) and str(reply) == "ERR unknown command"


def test_commands_are_arrays_of_bulk_strings() -> None:
    assert encode(["CLIENT", "TRACKING", "on", "REDIRECT", 42]) == (
        b"*5\r\n$6\r\nCLIENT\r\n$8\r\nTRACKING\r\n$2\r\non\r\n$8\r\nREDIRECT\r\n$2\r\n42\r\n")


def _pair() -> tuple[RespConnection, socket.socket]:
    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(1)
    conn = RespConnection("127.0.0.1", server.getsockname()[1], timeout=5)
    peer, _ = server.accept()
    server.close()
    return conn, peer


def test_replies_split_at_every_boundary_are_read_whole_and_once() -> None:
    stream = (MESSAGE + b"*3\r\n$7\r\nmessage\r\n$20\r\n__redis__:invalidate\r\n*-1\r\n"
              + MESSAGE.replace(b"$11\r\nbed\r\n4\x00kelp", b"$-1") + b":7\r\n")
    expected = [[b"message", b"__keyevent@0__:new", b"bed\r\n4\x00kelp"],
                [b"message", b"__redis__:invalidate", None],
                [b"message", b"__keyevent@0__:new", None], 7]
    for cut in range(1, len(stream)):
        conn, peer = _pair()
        try:
            peer.sendall(stream[:cut])
            got = conn.read_replies(1.0)
            peer.sendall(stream[cut:])
            for _ in range(10):             # a lost reply would leave `got` short: bounded
                if len(got) >= len(expected):
                    break
                got += conn.read_replies(1.0)
            assert got == expected, cut
        finally:
            conn.close()
            peer.close()


def test_a_closed_connection_is_a_connection_error() -> None:
    conn, peer = _pair()
    peer.close()
    with pytest.raises(ConnectionError):
        conn.read_replies(1.0)
    conn.close()
