"""A real SMTP server on loopback (aiosmtpd) for the e-mail tests: plain, STARTTLS, TLS.

The certificates come from a throw-away CA made by trustme for each test session; the client side
trusts that CA through an ``ssl.SSLContext`` the tests hand to ``deliver_outbox``, so certificate
and host-name checks stay on, as in production.
"""

from __future__ import annotations

import socket
import ssl
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import timedelta
from typing import Any

import pytest
import trustme
from aiosmtpd.controller import Controller
from aiosmtpd.smtp import SMTP, AuthResult, Envelope, LoginPassword, Session

from monitor.config import Email

HOST = "127.0.0.1"
USER = "plumbline-sender"
PASSWORD = "correct horse battery staple"
USER_ENV = "PLUMBLINE_TEST_SMTP_USER"
PASSWORD_ENV = "PLUMBLINE_TEST_SMTP_PASSWORD"


@dataclass(frozen=True)
class Received:
    """One message as the server took it: the envelope and the raw bytes."""

    mail_from: str
    rcpt_tos: tuple[str, ...]
    data: bytes
    peer: tuple[str, int]  # the client's address: distinct ports are distinct connections
    tls: bool
    login: str | None  # the user name that authenticated, or None


class RecordingHandler:
    """Keeps every message the server accepts. ``refuse`` holds addresses to refuse at RCPT;
    ``defer_data`` is how many DATA commands to answer with a temporary failure first."""

    def __init__(self) -> None:
        self.received: list[Received] = []
        self.refuse: set[str] = set()
        self.defer_data = 0
        self.after_storing: Callable[[], None] | None = None  # runs before the 250 reply

    async def handle_RCPT(
        self, server: SMTP, session: Session, envelope: Envelope, address: str,
        rcpt_options: list[str],
    ) -> str:
        if address in self.refuse:
            return "550 5.1.1 No such mailbox here"
        envelope.rcpt_tos.append(address)
        return "250 OK"

    async def handle_DATA(self, server: SMTP, session: Session, envelope: Envelope) -> str:
        if self.defer_data > 0:
            self.defer_data -= 1
            return "451 4.3.0 Try again later"
        transport = server.transport
        tls = transport is not None and transport.get_extra_info("ssl_object") is not None
        raw = envelope.original_content
        assert isinstance(raw, bytes)
        assert envelope.mail_from is not None
        self.received.append(
            Received(
                envelope.mail_from, tuple(envelope.rcpt_tos), raw, tuple(session.peer), tls,
                session.auth_data if session.authenticated else None,
            )
        )
        if self.after_storing is not None:
            self.after_storing()
        return "250 Message accepted for delivery"


def _authenticate(
    server: SMTP, session: Session, envelope: Envelope, mechanism: str, auth_data: Any
) -> AuthResult:
    if not isinstance(auth_data, LoginPassword):
        return AuthResult(success=False, handled=False)
    ok = auth_data.login == USER.encode() and auth_data.password == PASSWORD.encode()
    return AuthResult(success=ok, handled=False, auth_data=USER if ok else None)


def free_port() -> int:
    """A port nothing listens on right now (the OS picks it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind((HOST, 0))
        return int(probe.getsockname()[1])


@dataclass(frozen=True)
class Certificates:
    ca: trustme.CA
    server_context: ssl.SSLContext
    client_context: ssl.SSLContext  # verifying, trusting only the test CA


@pytest.fixture(scope="session")
def certificates() -> Certificates:
    ca = trustme.CA()
    server_cert = ca.issue_cert(HOST, "localhost")
    server_context = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    server_cert.configure_cert(server_context)
    client_context = ssl.create_default_context()
    ca.configure_trust(client_context)
    return Certificates(ca, server_context, client_context)


@dataclass
class SmtpServer:
    """One aiosmtpd server; ``start()`` / ``stop()`` may be called again on the same port."""

    security: str  # none | starttls | tls
    port: int
    certificates: Certificates
    auth: bool
    handler: RecordingHandler = field(default_factory=RecordingHandler)
    _controller: Controller | None = None

    @property
    def received(self) -> list[Received]:
        return self.handler.received

    @property
    def client_context(self) -> ssl.SSLContext:
        return self.certificates.client_context

    def start(self) -> SmtpServer:
        assert self._controller is None, "already running"
        options: dict[str, Any] = {"server_hostname": "smtp.test"}
        if self.security == "starttls":
            options.update(
                tls_context=self.certificates.server_context, require_starttls=True,
                auth_require_tls=True,
            )
        elif self.security == "tls":
            options["ssl_context"] = self.certificates.server_context
            # aiosmtpd counts only STARTTLS as TLS when it decides whether AUTH may be
            # offered; on a TLS-from-the-start connection it is TLS all the same.
            options["auth_require_tls"] = False
        if self.auth:
            options.update(authenticator=_authenticate, auth_required=self.security == "starttls")
        controller = Controller(self.handler, hostname=HOST, port=self.port, **options)
        controller.start()
        self._controller = controller
        return self

    def stop(self) -> None:
        if self._controller is not None:
            self._controller.stop()
            self._controller = None

    def email_config(self, **overrides: Any) -> Email:
        settings: dict[str, Any] = {
            "to": ["planning@example.org"],
            "sender": "plumbline@example.org",
            "smtp_host": HOST,
            "smtp_port": self.port,
            "security": self.security,
            "timeout": timedelta(seconds=5),
        }
        if self.auth:
            settings.update(username_env=USER_ENV, password_env=PASSWORD_ENV)
        settings.update(overrides)
        return Email.model_validate(settings)


class ServerFactory:
    def __init__(self, certificates: Certificates) -> None:
        self.certificates = certificates
        self.servers: list[SmtpServer] = []

    def __call__(
        self, security: str = "none", *, auth: bool = False, start: bool = True,
        port: int | None = None,
    ) -> SmtpServer:
        server = SmtpServer(security, free_port() if port is None else port, self.certificates,
                            auth)
        self.servers.append(server)
        return server.start() if start else server


@pytest.fixture
def smtp_servers(certificates: Certificates) -> Iterator[ServerFactory]:
    """``smtp_servers(security, auth=, start=, port=)`` makes servers; all stop after the test."""
    factory = ServerFactory(certificates)
    yield factory
    for server in factory.servers:
        server.stop()


@pytest.fixture
def smtp_server(smtp_servers: ServerFactory) -> SmtpServer:
    """A plain SMTP server on loopback, no TLS, no login."""
    return smtp_servers("none")


@pytest.fixture
def starttls_server(smtp_servers: ServerFactory, monkeypatch: pytest.MonkeyPatch) -> SmtpServer:
    """STARTTLS required before anything else; login required, over TLS only; the user name
    and password are in the environment variables the config names."""
    monkeypatch.setenv(USER_ENV, USER)
    monkeypatch.setenv(PASSWORD_ENV, PASSWORD)
    return smtp_servers("starttls", auth=True)


@pytest.fixture
def tls_server(smtp_servers: ServerFactory, monkeypatch: pytest.MonkeyPatch) -> SmtpServer:
    """TLS from the first byte, login offered."""
    monkeypatch.setenv(USER_ENV, USER)
    monkeypatch.setenv(PASSWORD_ENV, PASSWORD)
    return smtp_servers("tls", auth=True)
