"""Slow and unauthenticated clients against a real `kilter serve` (2 workers) on loopback:
a request head that never completes is cut off, a body that stops arriving gets 408, and a
post without a valid key is answered 401 before its body is read (the client never sends
it). Every socket has a generous timeout, so a server that never answers fails the test
instead of hanging it; nothing here asserts how fast anything was."""

from __future__ import annotations

import socket
from collections.abc import Iterator
from pathlib import Path

import pytest

import support
from support import Server

WAIT_S = 20.0  # far above the deadlines set below: only a server that never acts hits it


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Server, dict[str, str]]]:
    tmp = tmp_path_factory.mktemp("slow")
    url = f"sqlite:///{tmp / 'slow.db'}"
    model_dir = support.build_model(tmp / "models")
    keys = support.prepare_database(url)
    env = support.server_env(url, model_dir, KILTER_HEADER_TIMEOUT_S="1", KILTER_BODY_TIMEOUT_S="1")
    server = Server(env, tmp, workers=2).start()
    try:
        yield server, keys
    finally:
        server.stop()


def _connect(server: Server) -> socket.socket:
    s = socket.create_connection(("127.0.0.1", server.port), timeout=WAIT_S)
    s.settimeout(WAIT_S)
    return s


def _read_all(s: socket.socket) -> bytes:
    out = b""
    while True:
        chunk = s.recv(65536)
        if not chunk:
            return out
        out += chunk


def test_a_request_head_that_never_completes_is_cut_off(served) -> None:
    server, _ = served
    with _connect(server) as s:
        s.sendall(b"POST /v1/assets/pump-01/readings HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: appl")
        assert _read_all(s) == b""  # closed by the server, no answer: the head never ended


def test_an_idle_connection_after_a_response_is_cut_off_too(served) -> None:
    server, _ = served
    with _connect(server) as s:
        s.sendall(b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n")
        first = b""
        while b'{"status":"ok"}' not in first:
            chunk = s.recv(65536)
            assert chunk, first
            first += chunk
        assert first.startswith(b"HTTP/1.1 200")
        s.sendall(b"GET /healthz HTTP/1.1\r\nHost: 12")  # the next head stalls half-way
        assert _read_all(s) == b""


@pytest.mark.parametrize("path", [b"/v1/assets/pump-01/readings", b"/v1/score"])
def test_a_body_that_stops_arriving_gets_408(served, path: bytes) -> None:
    server, keys = served
    with _connect(server) as s:
        s.sendall(
            b"POST " + path + b" HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
            + f"Authorization: Bearer {keys['machine']}\r\nContent-Length: 5000\r\n\r\n".encode()
            + b'{"readings": ['
        )
        answer = _read_all(s)
    assert answer.startswith(b"HTTP/1.1 408"), answer[:200]
    assert b"request_timeout" in answer


def test_without_a_valid_key_the_body_is_never_waited_for(served) -> None:
    """The head announces a body the client never sends: the 401 comes anyway."""
    server, _ = served
    for auth in (b"", b"Authorization: Bearer ew_wrong\r\n"):
        with _connect(server) as s:
            s.sendall(
                b"POST /v1/assets/pump-01/readings HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
                + auth + b"Content-Length: 100000\r\n\r\n"
            )
            head = s.recv(65536)
        assert head.startswith(b"HTTP/1.1 401"), head[:200]


def test_a_dashboard_post_without_a_session_is_answered_without_its_body(served) -> None:
    server, _ = served
    with _connect(server) as s:
        s.sendall(
            b"POST /alerts/1/acknowledge HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/x-www-form-urlencoded\r\n"
            b"Content-Length: 100000\r\n\r\ncsrf_token="
        )
        head = s.recv(65536)
    assert head.startswith(b"HTTP/1.1 401"), head[:200]
