"""E-mail through a real SMTP server on loopback (aiosmtpd): MIME structure, STARTTLS and TLS with
login, the outbox's retries and exactly-once delivery, one message per owner, header injection."""

from __future__ import annotations

import io
import os
import re
import signal
import subprocess
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from email.message import EmailMessage
from email.parser import BytesParser
from email.policy import default as default_policy
from pathlib import Path
from typing import TYPE_CHECKING

import pytest
from PIL import Image

from monitor.config import PlumblineConfig, parse_config
from monitor.notify.mail import (
    build_message,
    compose_digest,
    compose_owner_messages,
    deliver_outbox,
    enqueue,
    enqueue_digest,
    enqueue_pass_messages,
    group_by_recipient,
    header_text,
    model_owners,
    models_to_notify,
    write_eml,
)
from monitor.store import Store
from monitor.vocabulary import Finding, FindingKind, Severity

if TYPE_CHECKING:  # the fixtures' types, from this folder's conftest.py
    from tests.notify.conftest import ServerFactory, SmtpServer

NOW = datetime(2027, 3, 29, 6, 0, tzinfo=UTC)
PERIOD_END = datetime(2027, 3, 28, 22, 0, tzinfo=UTC)
SENDER = "plumbline@example.org"
# What the test server's environment holds (tests/notify/conftest.py).
USER = "plumbline-sender"
PASSWORD = "correct horse battery staple"

CONFIG = """
database: state/plumbline.sqlite
timezone: Europe/Berlin
feeds:
  depot_weekly:
    inbox: feeds/depot/inbox
    format: csv
    period: week_ending
    cadence: 7d
    columns: [week_ending, order_lines, pick_hours, pallets, receiving_hours]
  yard:
    inbox: feeds/yard/inbox
    format: csv
    period: week_ending
    cadence: 7d
    columns: [week_ending, trailers, yard_hours]
models:
  pick_hours:
    feed: depot_weekly
    response: pick_hours
    predictors: [order_lines]
    owners: [picking@example.org, ops-lead@example.org]
  receiving_hours:
    feed: depot_weekly
    response: receiving_hours
    predictors: [pallets]
    owners: [receiving@example.org, ops-lead@example.org]
  yard_hours:
    feed: yard
    response: yard_hours
    predictors: [trailers]
notify:
  html_dir: reports
  email:
    to: [planning@example.org]
    sender: plumbline@example.org
    smtp_host: 127.0.0.1
    smtp_port: PORT
"""


# The renderer's structures are matched by shape; these have the shape monitor.notify.message
# gives them (a content with ``images``, an image with cid/png/filename, an owner message).


@dataclass(frozen=True)
class InlineImage:
    cid: str
    png: bytes
    filename: str


@dataclass(frozen=True)
class MailContent:
    subject: str
    text: str
    html: str
    images: Sequence[InlineImage | tuple[str, bytes, str]] = ()


@dataclass(frozen=True)
class OwnerMessage:
    recipient: str
    models: tuple[str, ...]
    dedupe_key: str
    content: MailContent


def png(colour: tuple[int, int, int]) -> bytes:
    buffer = io.BytesIO()
    Image.new("RGB", (8, 6), colour).save(buffer, format="PNG")
    return buffer.getvalue()


CHARTS = (
    InlineImage("intervals-1@plumbline", png((20, 90, 160)), "intervals.png"),
    InlineImage("slope-1@plumbline", png((200, 120, 30)), "slope.png"),
)


def digest_content() -> MailContent:
    return MailContent(
        subject="Plumbline digest: 2 findings need attention",
        # A line of a lone dot would end the SMTP data early unless it is escaped on the wire.
        text="Two findings need attention.\n.\nA finding is a statistical signal, not proof.\n",
        html=(
            "<html><body><p>Two findings need attention.</p>"
            '<img src="cid:intervals-1@plumbline" alt="Actuals against intervals">'
            "<img src='cid:slope-1@plumbline' alt='Slope across refits'></body></html>"
        ),
        images=CHARTS,
    )


def parse(data: bytes) -> EmailMessage:
    message = BytesParser(policy=default_policy).parsebytes(data)
    assert isinstance(message, EmailMessage)
    return message


def open_store(tmp_path: Path) -> Store:
    return Store.open(tmp_path / "state" / "plumbline.sqlite")


def new_pass(store: Store, as_of: datetime = NOW) -> int:
    return store.record_pass(as_of=as_of, started_at=as_of).id


def load_config(tmp_path: Path, port: int) -> PlumblineConfig:
    return parse_config(CONFIG.replace("PORT", str(port)), base_dir=tmp_path)


# --------------------------------------------------------------------------- structure


def test_digest_arrives_with_text_html_and_inline_pngs(
    tmp_path: Path, smtp_server: SmtpServer
) -> None:
    email = smtp_server.email_config(to=["planning@example.org", "finance@example.org"])
    with open_store(tmp_path) as store:
        queued = enqueue_digest(
            store, email, digest_content(), period_end=PERIOD_END, created_at=NOW
        )
        report = deliver_outbox(store, email, now=NOW)
        assert report.sent == (queued.outbox_id,)
        assert report.failed == ()
        assert report.connections == 1
        assert store.unsent_messages() == []

    assert len(smtp_server.received) == 1
    received = smtp_server.received[0]
    assert received.mail_from == SENDER
    assert received.rcpt_tos == ("planning@example.org", "finance@example.org")
    message = parse(received.data)
    assert message.get_content_type() == "multipart/alternative"
    assert message["Subject"] == "Plumbline digest: 2 findings need attention"
    assert message["Auto-Submitted"] == "auto-generated"
    assert message["Date"].datetime == NOW
    assert re.fullmatch(r"<[0-9a-f]{40}@example\.org>", message["Message-ID"])

    text_part, html_root = message.get_payload()
    assert text_part.get_content_type() == "text/plain"
    assert text_part.get_content().replace("\r\n", "\n") == digest_content().text
    assert html_root.get_content_type() == "multipart/related"
    html_part, *image_parts = html_root.get_payload()
    assert html_part.get_content_type() == "text/html"
    html = html_part.get_content()

    referenced = re.findall(r"""src=["']cid:([^"']+)["']""", html)
    assert referenced == ["intervals-1@plumbline", "slope-1@plumbline"]
    by_cid = {part["Content-ID"]: part for part in image_parts}
    for cid in referenced:
        part = by_cid[f"<{cid}>"]
        assert part.get_content_type() == "image/png"
        assert part.get_content_disposition() == "inline"
        original = next(image for image in CHARTS if image.cid == cid)
        assert part.get_content() == original.png
        assert part.get_filename() == original.filename
    # No part of its own carries MIME-Version: only the top of the message does.
    assert [part for part in message.walk() if part is not message and "MIME-Version" in part] == []


def test_long_and_non_ascii_headers_survive_folding() -> None:
    subject = "Plumbline: Kommissionierstunden Süd, " + "Lager Nord-Ost " * 20 + "— 3 findings"
    data = build_message(
        sender="Plumbline Überwachung <plumbline@example.org>", recipients=["a@example.org"],
        subject=subject, text="t", html='<img src="cid:c@plumbline">',
        inline_images=[("c@plumbline", png((1, 2, 3)), "Ausfälle.png")], date=NOW,
    )
    assert max(len(line) for line in data.split(b"\r\n")) <= 78
    message = parse(data)
    # Python 3.11's folder may put two spaces where an encoded word meets plain text (observed
    # here); the words and their order are what must survive.
    assert message["Subject"].split() == subject.split()
    assert message["From"].addresses[0].display_name == "Plumbline Überwachung"
    (image,) = [part for part in message.walk() if part.get_content_type() == "image/png"]
    assert image.get_filename() == "Ausfälle.png"


def test_message_id_follows_the_key_the_database_and_the_moment() -> None:
    def build(key: str | None, date: datetime, identity: str | None = "a" * 32) -> str:
        data = build_message(
            sender=SENDER, recipients=["a@example.org"], subject="s", text="t", html="<p>h</p>",
            dedupe_key=key, date=date, identity=identity,
        )
        return str(parse(data)["Message-ID"])

    later = NOW + timedelta(hours=3)
    # Composed again at the same moment in the same database: the same id.
    assert build("pass:7:a@example.org", NOW) == build("pass:7:a@example.org", NOW)
    assert build("pass:7:a@example.org", NOW) != build("pass:8:a@example.org", NOW)
    # Another database (a second instance, a rebuilt one) or a later composition (after a
    # restore): another id, although pass numbers and keys repeat.
    assert build("pass:7:a@example.org", NOW) != build("pass:7:a@example.org", NOW, "b" * 32)
    assert build("pass:7:a@example.org", NOW) != build("pass:7:a@example.org", later)
    assert build(None, NOW) != build(None, NOW)
    assert build("pass:7:a@example.org", NOW, None) != build("pass:7:a@example.org", NOW, None)


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"html": '<img src="cid:missing@plumbline">'}, "cid:missing@plumbline"),
        ({"inline_images": [("a b", png((0, 0, 0)), "a.png")]}, "Content-ID"),
        ({"inline_images": [CHARTS[0], ("intervals-1@plumbline", png((9, 9, 9)), "b.png")]},
         "used twice"),
        ({"inline_images": [("x@plumbline", b"<svg/>", "x.svg")]}, "not a PNG"),
        ({"recipients": []}, "at least one recipient"),
        ({"recipients": ["a@example.org, b@example.org"]}, "not one address"),
        ({"recipients": ["nobody"]}, "not one address"),
        ({"headers": {"Bcc": "x@example.org"}}, "not allowed"),
        ({"headers": {"X Bad": "1"}}, "not allowed"),
        ({"date": datetime(2027, 3, 29, 6, 0)}, "time zone"),
    ],
)
def test_build_message_refuses_malformed_input(change: dict[str, object], message: str) -> None:
    arguments: dict[str, object] = {
        "sender": SENDER, "recipients": ["a@example.org"], "subject": "s", "text": "t",
        "html": "<p>h</p>", "inline_images": (), "date": NOW,
    }
    arguments.update(change)
    with pytest.raises(ValueError, match=re.escape(message)):
        build_message(**arguments)


# --------------------------------------------------------------------------- header injection

INJECTIONS = ["depot 7\r\nBcc: x@y.org", "depot 7\nBcc: x@y.org", "depot 7\rBcc: x@y.org",
              "depot 7\u2028Bcc: x@y.org", "depot 7\x85Bcc: x@y.org", "depot 7\r\n"]


@pytest.mark.parametrize("injected", INJECTIONS)
@pytest.mark.parametrize("where", ["subject", "sender", "recipient", "header", "filename"])
def test_build_message_refuses_a_line_break_in_any_header(injected: str, where: str) -> None:
    address = injected.replace("depot 7", "a@example.org")
    arguments: dict[str, object] = {
        "sender": address if where == "sender" else SENDER,
        "recipients": [address if where == "recipient" else "b@example.org"],
        "subject": injected if where == "subject" else "Weekly digest",
        "text": "t",
        "html": '<img src="cid:c@plumbline">',
        "inline_images": [
            ("c@plumbline", png((1, 2, 3)), injected if where == "filename" else "c.png")
        ],
        "headers": {"X-Plumbline-Series": injected} if where == "header" else {},
    }
    with pytest.raises(ValueError, match="line break"):
        build_message(**arguments)


def test_a_series_name_with_a_newline_cannot_add_a_header(
    tmp_path: Path, smtp_server: SmtpServer
) -> None:
    """The pass path folds the renderer's subject onto one line (header_text) instead of
    refusing it, so the owner still hears about the series; the parsed header set is exactly
    the one intended and the envelope reaches only the owner."""
    series = "north\r\nBcc: attacker@example.net\r\nX-Injected: 1"
    email = smtp_server.email_config()

    def render(recipient: str, models: tuple[str, ...]) -> MailContent:
        return MailContent(
            subject=f"Plumbline: slope shift on {models[0]} / {series}",
            text=f"Series {series}: the slope has shifted.",
            html="<p>Series north&#13;&#10;Bcc: attacker@example.net</p>",
        )

    with open_store(tmp_path) as store:
        pass_id = new_pass(store)
        enqueue_pass_messages(
            store, email, pass_id=pass_id, owners_by_model={"pick_hours": ["picking@example.org"]},
            changed_models=["pick_hours"], render=render, created_at=NOW,
        )
        assert deliver_outbox(store, email, now=NOW).failed == ()

    (received,) = smtp_server.received
    assert received.rcpt_tos == ("picking@example.org",)
    message = parse(received.data)
    assert sorted(message.keys()) == sorted(
        ["From", "To", "Subject", "Date", "Message-ID", "Auto-Submitted", "MIME-Version",
         "Content-Type"]
    )
    assert message["Subject"] == (
        "Plumbline: slope shift on pick_hours / north Bcc: attacker@example.net X-Injected: 1"
    )
    assert "attacker" not in str(message["To"])


def test_header_text_makes_one_line() -> None:
    assert header_text("a\r\nb\tc\u2028d\x00e  f\x1b") == "a b c d e f"
    assert header_text("depot \u00e9t\u00e9") == "depot \u00e9t\u00e9"


# --------------------------------------------------------------------------- TLS and login


def test_starttls_with_login(tmp_path: Path, starttls_server: SmtpServer) -> None:
    email = starttls_server.email_config()
    with open_store(tmp_path) as store:
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)
        report = deliver_outbox(
            store, email, now=NOW, ssl_context=starttls_server.client_context
        )
        assert report.failed == ()
        assert len(report.sent) == 1
        assert report.notes == ()
    (received,) = starttls_server.received
    assert received.tls
    assert received.login == USER
    # The secret is read at send time and kept nowhere in the database.
    for path in tmp_path.joinpath("state").iterdir():
        assert PASSWORD.encode() not in path.read_bytes()


def test_starttls_checks_the_certificate_by_default(
    tmp_path: Path, starttls_server: SmtpServer
) -> None:
    """Without the test CA in its trust store the client must refuse the server's certificate."""
    email = starttls_server.email_config()
    with open_store(tmp_path) as store:
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)
        report = deliver_outbox(store, email, now=NOW)
        (failure,) = report.failed
        assert "CERTIFICATE_VERIFY_FAILED" in failure.error
        (kept,) = store.unsent_messages()
        assert kept.attempts == 1
    assert starttls_server.received == []


def test_a_private_authority_through_ssl_cert_file(
    tmp_path: Path, starttls_server: SmtpServer, monkeypatch: pytest.MonkeyPatch
) -> None:
    """What the README tells users with a company CA: OpenSSL's SSL_CERT_FILE, no code change."""
    ca_file = tmp_path / "company-ca.pem"
    starttls_server.certificates.ca.cert_pem.write_to_path(str(ca_file))
    monkeypatch.setenv("SSL_CERT_FILE", str(ca_file))
    email = starttls_server.email_config()
    with open_store(tmp_path) as store:
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)
        assert deliver_outbox(store, email, now=NOW).failed == ()
    (received,) = starttls_server.received
    assert received.tls and received.login == USER


def test_starttls_is_never_skipped(tmp_path: Path, smtp_server: SmtpServer) -> None:
    """A server that does not offer STARTTLS gets nothing, not a plain-text session."""
    email = smtp_server.email_config(security="starttls")
    with open_store(tmp_path) as store:
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)
        (failure,) = deliver_outbox(store, email, now=NOW).failed
        assert "STARTTLS" in failure.error
    assert smtp_server.received == []


def test_wrong_password_keeps_the_message_and_the_secret(
    tmp_path: Path, starttls_server: SmtpServer, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("PLUMBLINE_TEST_SMTP_PASSWORD", "not-the-password")
    email = starttls_server.email_config()
    with open_store(tmp_path) as store:
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)
        (failure,) = deliver_outbox(
            store, email, now=NOW, ssl_context=starttls_server.client_context
        ).failed
        assert "SMTPAuthenticationError: 535" in failure.error
        assert "not-the-password" not in failure.error
        (kept,) = store.unsent_messages()
        assert kept.last_error == failure.error
    assert starttls_server.received == []


def test_tls_from_the_first_byte_with_login(tmp_path: Path, tls_server: SmtpServer) -> None:
    email = tls_server.email_config()
    assert email.security == "tls"
    with open_store(tmp_path) as store:
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)
        report = deliver_outbox(store, email, now=NOW, ssl_context=tls_server.client_context)
        assert report.failed == ()
    (received,) = tls_server.received
    assert received.tls
    assert received.login == USER


def test_no_password_over_a_plain_connection(
    tmp_path: Path, smtp_server: SmtpServer, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("PLAIN_USER", USER)
    monkeypatch.setenv("PLAIN_PASSWORD", PASSWORD)
    email = smtp_server.email_config(username_env="PLAIN_USER", password_env="PLAIN_PASSWORD")
    with open_store(tmp_path) as store:
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)
        report = deliver_outbox(store, email, now=NOW)
        (failure,) = report.failed
        assert "unencrypted" in failure.error
        assert report.connections == 0
    assert smtp_server.received == []


def test_credentials_missing_from_the_environment(
    tmp_path: Path, smtp_server: SmtpServer, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv("UNSET_SMTP_USER", raising=False)
    monkeypatch.delenv("UNSET_SMTP_PASSWORD", raising=False)
    email = smtp_server.email_config(
        username_env="UNSET_SMTP_USER", password_env="UNSET_SMTP_PASSWORD"
    )
    with open_store(tmp_path) as store:
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)
        report = deliver_outbox(store, email, now=NOW)
    assert report.notes == (
        "UNSET_SMTP_USER and UNSET_SMTP_PASSWORD not set in the environment: connecting "
        "without login",
    )
    (received,) = smtp_server.received
    assert received.login is None


# --------------------------------------------------------------------------- the outbox


def test_server_down_then_back_delivers_exactly_once(
    tmp_path: Path, smtp_servers: ServerFactory
) -> None:
    server = smtp_servers("none", start=False)  # a free port with nothing listening
    email = server.email_config()
    with open_store(tmp_path) as store:
        queued = enqueue_digest(
            store, email, digest_content(), period_end=PERIOD_END, created_at=NOW
        )
        down = deliver_outbox(store, email, now=NOW, connect_timeout=2.0)
        assert down.sent == ()
        (failure,) = down.failed
        assert failure.outbox_id == queued.outbox_id
        assert failure.error.startswith("connect: ConnectionRefusedError")
        (kept,) = store.unsent_messages()
        assert kept.attempts == 1
        assert kept.next_attempt_at > NOW
        assert kept.next_attempt_at == failure.next_attempt_at
        assert kept.body == queued_body(store, queued.outbox_id)

        # Not due yet: nothing is tried, the attempt count stays.
        assert deliver_outbox(store, email, now=NOW + timedelta(seconds=30)).connections == 0
        assert store.unsent_messages()[0].attempts == 1

        server.start()
        back = deliver_outbox(store, email, now=kept.next_attempt_at)
        assert back.sent == (queued.outbox_id,)
        assert store.unsent_messages() == []
        again = deliver_outbox(store, email, now=kept.next_attempt_at + timedelta(days=1))
        assert again.sent == () and again.failed == () and again.connections == 0
    assert len(server.received) == 1
    assert parse(server.received[0].data)["Subject"] == digest_content().subject


CRASHING_SENDER = """
import sys
from datetime import datetime
from monitor.config import Email
from monitor.notify.mail import deliver_outbox
from monitor.store import Store

email = Email.model_validate({"to": ["planning@example.org"], "sender": "plumbline@example.org",
                              "smtp_host": "127.0.0.1", "smtp_port": int(sys.argv[2])})
with Store.open(sys.argv[1]) as store:
    deliver_outbox(store, email, now=datetime.fromisoformat(sys.argv[3]))
"""


def test_a_crash_after_the_server_took_the_message_sends_it_again_with_the_same_id(
    tmp_path: Path, smtp_server: SmtpServer
) -> None:
    """The one documented duplicate (DESIGN.md section 12): the sending process is killed
    (SIGKILL) after the server has stored the message and before the outbox marks it sent. The
    next run sends it again, byte for byte, with the same Message-ID; after that, never again."""
    email = smtp_server.email_config()
    database = tmp_path / "state" / "plumbline.sqlite"
    with open_store(tmp_path) as store:
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)

    child: list[subprocess.Popen[bytes]] = []

    def kill_sender() -> None:
        deadline = time.monotonic() + 10
        while not child and time.monotonic() < deadline:
            time.sleep(0.01)
        os.kill(child[0].pid, signal.SIGKILL)
        child[0].wait(timeout=10)

    smtp_server.handler.after_storing = kill_sender
    child.append(subprocess.Popen(
        [sys.executable, "-c", CRASHING_SENDER, str(database), str(smtp_server.port),
         NOW.isoformat()],
    ))
    assert child[0].wait(timeout=60) == -signal.SIGKILL
    smtp_server.handler.after_storing = None
    assert len(smtp_server.received) == 1

    with open_store(tmp_path) as store:
        (unsent,) = store.unsent_messages()
        assert unsent.attempts == 0  # the crash left no trace in the outbox
        assert deliver_outbox(store, email, now=NOW).sent == (unsent.id,)
        assert deliver_outbox(store, email, now=NOW + timedelta(hours=1)).sent == ()
    first, second = smtp_server.received
    assert first.data == second.data
    assert parse(first.data)["Message-ID"] == parse(second.data)["Message-ID"]


def queued_body(store: Store, outbox_id: int) -> bytes:
    (message,) = [m for m in store.unsent_messages() if m.id == outbox_id]
    return message.body


def test_nothing_due_means_no_connection(tmp_path: Path, smtp_server: SmtpServer) -> None:
    email = smtp_server.email_config()
    with open_store(tmp_path) as store:
        for hours in (0, 1, 2):
            report = deliver_outbox(store, email, now=NOW + timedelta(hours=hours))
            assert (report.sent, report.failed, report.connections) == ((), (), 0)
        enqueue_digest(store, email, digest_content(), period_end=PERIOD_END, created_at=NOW)
        assert len(deliver_outbox(store, email, now=NOW).sent) == 1
        for hours in (1, 2, 3):
            assert deliver_outbox(store, email, now=NOW + timedelta(hours=hours)).sent == ()
        # The same digest period queued again is the same message: nothing new to send.
        again = enqueue_digest(
            store, email, digest_content(), period_end=PERIOD_END, created_at=NOW
        )
        assert not again.newly_queued
        assert deliver_outbox(store, email, now=NOW + timedelta(hours=4)).sent == ()
    assert len(smtp_server.received) == 1


def test_a_refused_message_does_not_block_the_others(
    tmp_path: Path, smtp_server: SmtpServer
) -> None:
    """A temporary DATA failure keeps that message for later; the rest go out on the same
    connection; a recipient refused by the server is reported, the others get the message."""
    smtp_server.handler.defer_data = 1
    smtp_server.handler.refuse = {"gone@example.org"}
    email = smtp_server.email_config()
    with open_store(tmp_path) as store:
        first = enqueue_digest(
            store, email, digest_content(), period_end=PERIOD_END, created_at=NOW
        )
        second = enqueue_digest(
            store, email, digest_content(), period_end=PERIOD_END + timedelta(days=7),
            created_at=NOW, recipients=["planning@example.org", "gone@example.org"],
        )
        report = deliver_outbox(store, email, now=NOW)
        assert [failure.outbox_id for failure in report.failed] == [first.outbox_id]
        assert "451" in report.failed[0].error
        assert report.sent == (second.outbox_id,)
        assert report.refused_recipients == ((second.outbox_id, "gone@example.org"),)
        assert report.connections == 1
        retry = deliver_outbox(store, email, now=report.failed[0].next_attempt_at)
        assert retry.sent == (first.outbox_id,)
    assert [r.rcpt_tos for r in smtp_server.received] == [
        ("planning@example.org",), ("planning@example.org",),
    ]


# --------------------------------------------------------------------------- per-pass messages


def record_finding(store: Store, pass_id: int, model: str | None, feed: str, kind: FindingKind,
                   series: str | None = None) -> int:
    finding = Finding(model, series, feed, kind, Severity.WARNING, "2027-03-21", 3.1, 0.002,
                      "The slope moved.", "Check the depot's process.")
    return store.upsert_finding(finding, pass_id=pass_id, at=NOW).finding.id


def test_one_message_per_owner_covering_all_their_models(
    tmp_path: Path, smtp_server: SmtpServer
) -> None:
    config = load_config(tmp_path, smtp_server.port)
    email = config.notify.email
    assert email is not None
    calls: list[tuple[str, tuple[str, ...]]] = []

    def render(recipient: str, models: tuple[str, ...]) -> MailContent:
        calls.append((recipient, models))
        return MailContent(
            subject=f"Plumbline: news on {', '.join(models)}",
            text=f"Models: {', '.join(models)}", html=f"<p>Models: {', '.join(models)}</p>",
        )

    with open_store(tmp_path) as store:
        pass_id = new_pass(store)
        record_finding(store, pass_id, "pick_hours", "depot_weekly", FindingKind.SLOPE_SHIFT, "n")
        record_finding(store, pass_id, "pick_hours", "depot_weekly", FindingKind.COVERAGE, "s")
        record_finding(store, pass_id, "receiving_hours", "depot_weekly", FindingKind.WEAK_FIT)
        changed = models_to_notify(store, config, pass_id)
        assert changed == {"pick_hours", "receiving_hours"}

        queued = enqueue_pass_messages(
            store, email, pass_id=pass_id, owners_by_model=model_owners(config),
            changed_models=changed, render=render, created_at=NOW,
        )
        assert calls == [
            ("ops-lead@example.org", ("pick_hours", "receiving_hours")),
            ("picking@example.org", ("pick_hours",)),
            ("receiving@example.org", ("receiving_hours",)),
        ]
        assert [q.dedupe_key for q in queued] == [
            f"pass:{pass_id}:ops-lead@example.org", f"pass:{pass_id}:picking@example.org",
            f"pass:{pass_id}:receiving@example.org",
        ]
        report = deliver_outbox(store, email, now=NOW)
        assert len(report.sent) == 3 and report.connections == 1

        # Running the same pass's notify step again queues nothing new and sends nothing.
        calls.clear()
        again = enqueue_pass_messages(
            store, email, pass_id=pass_id, owners_by_model=model_owners(config),
            changed_models=changed, render=render, created_at=NOW + timedelta(minutes=5),
        )
        assert [q.newly_queued for q in again] == [False, False, False]
        assert deliver_outbox(store, email, now=NOW + timedelta(minutes=5)).sent == ()

        # A later pass in which the findings are merely ongoing has no news: no message.
        later = new_pass(store, NOW + timedelta(days=7))
        store.mark_new_findings_ongoing(later)
        record_finding(store, later, "pick_hours", "depot_weekly", FindingKind.SLOPE_SHIFT, "n")
        assert models_to_notify(store, config, later) == frozenset()
        assert enqueue_pass_messages(
            store, email, pass_id=later, owners_by_model=model_owners(config),
            changed_models=models_to_notify(store, config, later), render=render,
            created_at=NOW + timedelta(days=7),
        ) == []

    received = {r.rcpt_tos: parse(r.data) for r in smtp_server.received}
    assert sorted(received) == [
        ("ops-lead@example.org",), ("picking@example.org",), ("receiving@example.org",)
    ]
    both = received[("ops-lead@example.org",)]
    assert both["Subject"] == "Plumbline: news on pick_hours, receiving_hours"
    assert len({r.peer for r in smtp_server.received}) == 1  # one connection for all three


def test_feed_findings_and_clearings_reach_the_models_owners(tmp_path: Path) -> None:
    config = load_config(tmp_path, 25)
    with open_store(tmp_path) as store:
        first = new_pass(store)
        finding_id = record_finding(store, first, "receiving_hours", "depot_weekly",
                                    FindingKind.WEAK_FIT)
        second = new_pass(store, NOW + timedelta(days=7))
        record_finding(store, second, None, "yard", FindingKind.STALE_FEED)
        store.clear_finding(finding_id, pass_id=second, at=NOW + timedelta(days=7))
        # yard_hours names no owners: the loader gave it notify.email.to.
        assert models_to_notify(store, config, second) == {"receiving_hours", "yard_hours"}
        assert group_by_recipient(
            model_owners(config), models_to_notify(store, config, second)
        ) == {
            "ops-lead@example.org": ("receiving_hours",),
            "planning@example.org": ("yard_hours",),
            "receiving@example.org": ("receiving_hours",),
        }
        store.note_finding(finding_id, at=NOW + timedelta(days=8), by="ops", text="known")
        assert models_to_notify(store, config, second) == {"yard_hours"}


def test_addresses_differing_in_domain_case_are_one_recipient() -> None:
    owners = {"a": ["Ops@Example.org"], "b": ["Ops@example.ORG", "x@example.org"], "c": []}
    assert group_by_recipient(owners, ["a", "b", "c", "not-configured"]) == {
        "Ops@Example.org": ("a", "b"),
        "x@example.org": ("b",),
    }
    # The local part is kept as written: RFC 5321 lets a server tell its cases apart.
    assert group_by_recipient({"a": ["ops@example.org"], "b": ["OPS@example.org"]}, "ab") == {
        "OPS@example.org": ("b",),
        "ops@example.org": ("a",),
    }


def test_owner_messages_grouped_by_the_renderer(tmp_path: Path, smtp_server: SmtpServer) -> None:
    email = smtp_server.email_config()
    content = MailContent(
        subject="Plumbline: pick_hours and receiving_hours",
        text="Both models have news.",
        html='<p>Both models.</p><img src="cid:c@plumbline">',
        images=[("c@plumbline", png((5, 5, 5)), "c.png")],  # a plain 3-tuple image
    )
    messages = [
        OwnerMessage("ops-lead@example.org", ("pick_hours", "receiving_hours"),
                     "pass:4:ops-lead@example.org", content),
        OwnerMessage("picking@example.org", ("pick_hours",), "pass:4:picking@example.org",
                     content),
    ]
    with open_store(tmp_path) as store:
        pass_id = new_pass(store)
        queued = enqueue(
            store, compose_owner_messages(email, messages, pass_id=pass_id, created_at=NOW)
        )
        assert [(q.dedupe_key, q.models, q.newly_queued) for q in queued] == [
            ("pass:4:ops-lead@example.org", ("pick_hours", "receiving_hours"), True),
            ("pass:4:picking@example.org", ("pick_hours",), True),
        ]
        assert len(deliver_outbox(store, email, now=NOW).sent) == 2
    assert sorted(r.rcpt_tos for r in smtp_server.received) == [
        ("ops-lead@example.org",), ("picking@example.org",)
    ]

    twice = [*messages, OwnerMessage("ops-lead@EXAMPLE.org", ("yard_hours",), "pass:4:x", content)]
    with pytest.raises(ValueError, match="one message covering all their models"):
        compose_owner_messages(email, twice, pass_id=4, created_at=NOW)


# --------------------------------------------------------------------------- dry run


def test_write_eml_for_a_dry_run(tmp_path: Path) -> None:
    email = parse_config(CONFIG.replace("PORT", "25"), base_dir=tmp_path).notify.email
    assert email is not None
    message = compose_digest(email, digest_content(), period_end=PERIOD_END, created_at=NOW)
    assert message.eml_name == "digest-2027-03-28T22-00-00.000000Z"
    path = write_eml(message.body, tmp_path / "out", message.eml_name)
    assert path == tmp_path / "out" / "digest-2027-03-28T22-00-00.000000Z.eml"
    assert path.read_bytes() == message.body
    assert parse(path.read_bytes())["Subject"] == digest_content().subject
    assert sorted(p.name for p in path.parent.iterdir()) == [path.name]  # no partial file left

    escaped = write_eml(b"x", tmp_path / "out", "../../etc/passwd")
    assert escaped.parent == tmp_path / "out"
    assert escaped.name == "etc_passwd.eml"
