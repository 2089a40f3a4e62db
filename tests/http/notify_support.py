"""Real local receivers for the notification tests: an HTTP webhook receiver
(http.server on 127.0.0.1) that checks each delivery's signature the way the README tells
receivers to, and an SMTP server (aiosmtpd on 127.0.0.1). Both record what arrived and
stop when their `with` block ends."""

from __future__ import annotations

import json
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from email import message_from_bytes
from email.message import Message
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

from service.notify_channels import KEY_HEADER, SIGNATURE_HEADER, TIMESTAMP_HEADER, verify


@dataclass
class Delivery:
    headers: dict[str, str]
    body: bytes
    signature_ok: bool

    @property
    def json(self) -> dict[str, Any]:
        return json.loads(self.body)

    @property
    def key(self) -> str:
        return self.headers.get(KEY_HEADER.lower(), "")


@dataclass
class WebhookReceiver:
    """Answers each POST with the next status in `statuses` (then 200). With `hold` set, the
    first request is read in full and then kept waiting (no answer) until `release` is set:
    a sender killed meanwhile has sent but never heard back."""

    secret: str
    statuses: list[int] = field(default_factory=list)
    hold: bool = False
    deliveries: list[Delivery] = field(default_factory=list)
    arrived: threading.Event = field(default_factory=threading.Event)
    release: threading.Event = field(default_factory=threading.Event)
    url: str = ""
    lock: threading.Lock = field(default_factory=threading.Lock)

    def keys(self) -> list[str]:
        with self.lock:
            return [d.key for d in self.deliveries]

    def unique(self) -> dict[str, Delivery]:
        """What a receiver that drops repeats keeps: the first delivery of each key."""
        out: dict[str, Delivery] = {}
        with self.lock:
            for d in self.deliveries:
                out.setdefault(d.key, d)
        return out


@contextmanager
def webhook_receiver(secret: str, **kwargs: Any) -> Iterator[WebhookReceiver]:
    receiver = WebhookReceiver(secret=secret, **kwargs)

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:  # noqa: N802 - http.server's name
            body = self.rfile.read(int(self.headers.get("Content-Length", "0")))
            headers = {k.lower(): v for k, v in self.headers.items()}
            ok = verify(receiver.secret, headers.get(TIMESTAMP_HEADER.lower(), ""), body, headers.get(SIGNATURE_HEADER.lower(), ""))
            with receiver.lock:
                receiver.deliveries.append(Delivery(headers, body, ok))
                first = len(receiver.deliveries) == 1
                status = receiver.statuses.pop(0) if receiver.statuses else 200
            receiver.arrived.set()
            if receiver.hold and first:
                receiver.release.wait(timeout=60)
            try:
                self.send_response(status if ok else 401)
                self.send_header("Content-Length", "0")
                self.end_headers()
            except OSError:
                pass  # the sender is gone

        def log_message(self, *args: Any) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    server.daemon_threads = True
    receiver.url = f"http://127.0.0.1:{server.server_address[1]}/hook"
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    thread.start()
    try:
        yield receiver
    finally:
        receiver.release.set()
        server.shutdown()
        server.server_close()
        thread.join(timeout=10)


@dataclass
class SmtpSink:
    host: str
    port: int
    messages: list[Message] = field(default_factory=list)
    envelopes: list[tuple[str, list[str]]] = field(default_factory=list)

    def message_ids(self) -> list[str]:
        return [str(m["Message-ID"]) for m in self.messages]


@contextmanager
def smtp_sink(*, tls: tuple[Path, Path] | None = None, users: dict[str, str] | None = None) -> Iterator[SmtpSink]:
    """aiosmtpd's Controller on 127.0.0.1 and a free port, collecting every message. With
    `tls` (certificate, key) it offers STARTTLS and requires it; with `users` it requires a
    login (only over TLS) against those names and passwords."""
    import socket
    import ssl

    from aiosmtpd.controller import Controller
    from aiosmtpd.smtp import AuthResult, LoginPassword

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = int(s.getsockname()[1])
    sink = SmtpSink("127.0.0.1", port)

    class Handler:
        async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:  # noqa: N802 - aiosmtpd's name
            sink.envelopes.append((envelope.mail_from, list(envelope.rcpt_tos)))
            sink.messages.append(message_from_bytes(envelope.original_content or envelope.content))
            return "250 OK"

    def authenticate(server: Any, session: Any, envelope: Any, mechanism: str, auth_data: Any) -> AuthResult:
        ok = isinstance(auth_data, LoginPassword) and users is not None and \
            users.get(auth_data.login.decode()) == auth_data.password.decode()
        return AuthResult(success=ok, handled=False)

    kwargs: dict[str, Any] = {}
    if tls is not None:
        context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
        context.load_cert_chain(str(tls[0]), str(tls[1]))
        kwargs.update(tls_context=context, require_starttls=True)
    if users is not None:
        kwargs.update(authenticator=authenticate, auth_required=True, auth_require_tls=True)
    controller = Controller(Handler(), hostname="127.0.0.1", port=port, **kwargs)
    controller.start()
    try:
        yield sink
    finally:
        controller.stop()


def self_signed(folder: Path) -> tuple[Path, Path]:
    """A certificate for 127.0.0.1 made by the openssl command (the test's own CA file)."""
    import subprocess

    cert, key = folder / "relay.pem", folder / "relay.key"
    subprocess.run(
        ["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", str(key), "-out", str(cert), "-days", "1",
         "-subj", "/CN=127.0.0.1", "-addext", "subjectAltName=IP:127.0.0.1"],
        check=True, capture_output=True, timeout=60,
    )
    return cert, key
