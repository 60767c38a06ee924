"""Real servers on loopback for the notification tests: an SMTP server and an HTTP receiver.

`SmtpRecorder` is an aiosmtpd server that keeps every message it accepts, can answer with a
scripted SMTP reply, require a login, speak STARTTLS or implicit TLS, and be stopped to play a
dead server. `HttpRecorder` is an http.server receiver in a thread that keeps every request and
answers from a script (e.g. 503 three times, then 200) or hangs past the client's timeout.
`self_signed_certificate` makes a throwaway certificate for 127.0.0.1 with the openssl tool,
and `sample_notification` an invented digest (input data, not check values) to send through them.
"""

from __future__ import annotations

import email
import email.policy
import shutil
import socket
import ssl
import subprocess
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from email.message import EmailMessage
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any, TypeVar

from aiosmtpd.controller import Controller
from aiosmtpd.smtp import AuthResult, LoginPassword

from aftercast.notify import (
    AlertLine,
    Channel,
    ChartData,
    Notification,
    build_channel,
    parse_channel_config,
)

LOOPBACK = "127.0.0.1"
ChannelT = TypeVar("ChannelT", bound=Channel)


def free_port() -> int:
    """A TCP port nothing listens on right now (aiosmtpd's Controller needs a fixed port)."""
    with socket.socket() as probe:
        probe.bind((LOOPBACK, 0))
        return int(probe.getsockname()[1])


def self_signed_certificate(folder: Path) -> tuple[Path, Path] | None:
    """(certificate, key) valid for IP 127.0.0.1 and localhost, or None without openssl."""
    openssl = shutil.which("openssl")
    if openssl is None:
        return None
    cert, key = folder / "cert.pem", folder / "key.pem"
    subprocess.run(
        [
            openssl,
            "req",
            "-x509",
            "-newkey",
            "rsa:2048",
            "-nodes",
            "-days",
            "1",
            "-subj",
            "/CN=localhost",
            "-addext",
            "subjectAltName=IP:127.0.0.1,DNS:localhost",
            "-keyout",
            str(key),
            "-out",
            str(cert),
        ],
        check=True,
        capture_output=True,
        timeout=60,
    )
    return cert, key


def server_tls_context(cert: Path, key: Path) -> ssl.SSLContext:
    context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    context.load_cert_chain(cert, key)
    return context


@dataclass
class ReceivedMail:
    mail_from: str
    rcpt_tos: list[str]
    raw: bytes
    message: EmailMessage
    login: str | None
    over_tls: bool


class SmtpRecorder:
    """An aiosmtpd server on loopback that records what it accepts.

    `data_reply` (e.g. "451 4.3.0 try later" or "550 5.7.1 no") replaces the answer to DATA;
    `logins` (user -> password) turns on AUTH and requires it before MAIL.
    """

    def __init__(
        self,
        *,
        data_reply: str | None = None,
        logins: dict[str, str] | None = None,
        starttls: ssl.SSLContext | None = None,
        implicit_tls: ssl.SSLContext | None = None,
    ) -> None:
        self.data_reply = data_reply
        self.logins = logins or {}
        self.messages: list[ReceivedMail] = []
        self.failed_logins: list[str] = []
        self.port = free_port()
        options: dict[str, Any] = {}
        if self.logins:
            options.update(
                authenticator=self._authenticate,
                auth_required=True,
                auth_require_tls=starttls is not None,
            )
        if starttls is not None:
            options.update(tls_context=starttls, require_starttls=True)
        self.controller = Controller(
            self, hostname=LOOPBACK, port=self.port, ssl_context=implicit_tls, **options
        )
        self.running = False

    def start(self) -> SmtpRecorder:
        self.controller.start()
        self.running = True
        return self

    def stop(self) -> None:
        """Stop listening: from now on a client gets "connection refused"."""
        if self.running:
            self.controller.stop()
            self.running = False

    def __enter__(self) -> SmtpRecorder:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def _authenticate(
        self, server: Any, session: Any, envelope: Any, mechanism: str, auth_data: Any
    ) -> AuthResult:
        if isinstance(auth_data, LoginPassword):
            user, password = auth_data.login.decode(), auth_data.password.decode()
            if self.logins.get(user) == password:
                return AuthResult(success=True, auth_data=user)
            self.failed_logins.append(user)
        return AuthResult(success=False, handled=False)

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:  # noqa: N802
        if self.data_reply is not None:
            return self.data_reply
        raw = bytes(envelope.content)
        parsed = email.message_from_bytes(raw, policy=email.policy.default)
        assert isinstance(parsed, EmailMessage)
        self.messages.append(
            ReceivedMail(
                mail_from=envelope.mail_from,
                rcpt_tos=list(envelope.rcpt_tos),
                raw=raw,
                message=parsed,
                login=session.auth_data if session.authenticated else None,
                over_tls=server.transport.get_extra_info("ssl_object") is not None,
            )
        )
        return "250 2.0.0 Message accepted"


@dataclass
class ReceivedRequest:
    method: str
    path: str
    headers: dict[str, str]
    body: bytes


@dataclass
class HttpRecorder:
    """An HTTP receiver on a free loopback port, answering POSTs from a script.

    `script` lists the statuses of the first answers (then `default_status`); `hang_seconds`
    makes every answer wait that long first (released early by `stop`); `reply_headers` are
    added to every answer, e.g. {"Retry-After": "30"}; `reply_body` replaces the body;
    `on_request` runs before each answer.
    """

    script: list[int] = field(default_factory=list)
    default_status: int = 200
    hang_seconds: float = 0.0
    reply_headers: dict[str, str] = field(default_factory=dict)
    reply_body: str | None = None
    requests: list[ReceivedRequest] = field(default_factory=list)
    # Called with the number of the request (1 = first) before it is answered, e.g. to let
    # another deliverer run while a send is in flight.
    on_request: Callable[[int], None] | None = None

    def __post_init__(self) -> None:
        self._lock = threading.Lock()
        self._released = threading.Event()
        self.server = ThreadingHTTPServer((LOOPBACK, 0), self._handler_class())
        self.server.daemon_threads = True
        self.port = int(self.server.server_address[1])
        # A short poll interval keeps `shutdown` (and so every test) from waiting half a second.
        self._thread = threading.Thread(
            target=self.server.serve_forever, kwargs={"poll_interval": 0.02}, daemon=True
        )

    def url(self, path: str = "/hook") -> str:
        return f"http://{LOOPBACK}:{self.port}{path}"

    def __enter__(self) -> HttpRecorder:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def stop(self) -> None:
        self._released.set()
        self.server.shutdown()
        self.server.server_close()

    def _next_status(self, request: ReceivedRequest) -> int:
        with self._lock:
            self.requests.append(request)
            count = len(self.requests)
            status = self.script.pop(0) if self.script else self.default_status
        if self.on_request is not None:
            self.on_request(count)
        return status

    def _handler_class(self) -> type[BaseHTTPRequestHandler]:
        recorder = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802
                length = int(self.headers.get("content-length", "0"))
                body = self.rfile.read(length)
                status = recorder._next_status(
                    ReceivedRequest(
                        "POST", self.path, {k.lower(): v for k, v in self.headers.items()}, body
                    )
                )
                if recorder.hang_seconds and recorder._released.wait(recorder.hang_seconds):
                    return  # stopped while hanging: just drop the connection
                text = (
                    recorder.reply_body if recorder.reply_body is not None else f"status {status}"
                )
                reply = text.encode()
                self.send_response(status)
                for name, value in recorder.reply_headers.items():
                    self.send_header(name, value)
                self.send_header("content-type", "text/plain")
                self.send_header("content-length", str(len(reply)))
                self.end_headers()
                self.wfile.write(reply)

            def log_message(self, format: str, *args: Any) -> None:
                pass  # keep test output clean

        return Handler


def channel_of(kind: type[ChannelT], raw: dict[str, Any]) -> ChannelT:
    """Build a channel the way the config module will: validate the entry, then the registry."""
    channel = build_channel(parse_channel_config(raw))
    assert isinstance(channel, kind)
    return channel


def mismatched_chart() -> ChartData:
    """A chart whose `actual` has one value more than it has times."""
    one_time = ["2024-01-01T00:00:00Z"]
    return ChartData("s", "m", 80, one_time, [1.0, 2.0], [1.0], [0.0], [2.0])


NASTY_SERIES_ID = '<script>alert(1)</script>&"x"'


def sample_notification(
    series_id: str = "store-17", charts: int = 1, notification_id: str = "ntf-0001", **changes: Any
) -> Notification:
    """An invented two-alert digest with `charts` charts; `changes` override its fields."""
    shared: dict[str, Any] = {"model": "shop-planner", "state": "raised"}
    coverage = AlertLine(
        series_id=series_id,
        horizon="1",
        rule="coverage_low",
        severity="critical",
        opened_at="2024-05-01T06:00:00+00:00",
        summary="The 80% interval covered 55% of the last 40 outcomes.",
        evidence={
            "coverage": 0.55,
            "level": 80,
            "n": 40,
            "p_value": 1.7e-6,
            "window_start": "2024-04-03",
            "window_end": "2024-05-01",
            "suggested_fix": "widen the interval half-width by a factor of 1.9",
        },
        labels={"team": "retail", "region": "north"},
        **shared,
    )
    bias = AlertLine(
        "store-3",
        horizon="all",
        rule="bias",
        severity="warning",
        **shared,
        opened_at="2024-04-29T00:00:00Z",
        evidence={"statistic": 5.2, "n": 28},
        summary="Errors have stayed positive: the forecast runs low.",
    )
    days = [f"2024-04-{d:02d}T00:00:00Z" for d in range(1, 29)]
    chart = ChartData(
        series_id=series_id,
        model="shop-planner",
        level=80.0,
        times=days,
        actual=[100.0 + (d % 7) * 6 for d in range(28)],
        point=[110.0] * 27 + [None],
        lower=[104.0] * 28,
        upper=[116.0] * 28,
        coverage_times=days[7:],
        coverage=[0.8 - d / 60 for d in range(21)],
    )
    fields: dict[str, Any] = {
        "id": notification_id,
        "kind": "digest",
        "route": "oncall",
        "channel": "test-channel",
        "created_at": "2024-05-01T06:05:00Z",
        "alerts": [coverage, bias],
        "more": 3,
        "charts": [chart] * charts,
        "dashboard_url": "http://127.0.0.1:8000/series/store-17",
    }
    fields.update(changes)
    return Notification(**fields)
