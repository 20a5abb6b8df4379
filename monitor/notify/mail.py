"""E-mail: build MIME messages, queue them in the outbox, deliver the outbox over SMTP.

Standard library only (``email`` with ``policy.SMTP``, ``smtplib``, ``ssl``).

What the renderer hands over is matched by shape, not by class (``monitor.notify.message``
defines the classes; any object with these attributes will do)::

    content:       subject: str, text: str, html: str, images: Sequence[image]   (ContentLike)
    image:         cid: str, png: bytes, filename: str  (ImageLike; a 3-tuple works too)
    owner message: recipient: str, models: tuple[str, ...], dedupe_key: str, content
                                                                              (OwnerMessageLike)

The HTML refers to each image as ``src="cid:<cid>"``; ``cid`` is a dot-atom such as
``chart-3@plumbline``.

What a pass calls (DESIGN.md section 5, step 7), when ``notify.email`` is configured::

    changed = models_to_notify(store, config, pass_id)        # new or cleared findings
    enqueue_pass_messages(store, config.notify.email, pass_id=pass_id,
                          owners_by_model=model_owners(config), changed_models=changed,
                          render=render, created_at=now)      # render(recipient, models)
    report = deliver_outbox(store, config.notify.email, now=now)

``render(recipient, models) -> content`` is called once per recipient with the sorted names
of that recipient's models that have news, so an owner of two models gets one message covering
both, and a pass with no new or cleared findings sends nothing. The dedupe key
``pass:<pass id>:<recipient>`` makes a re-run of the same pass queue nothing new. A renderer
that groups by owner itself hands over owner messages instead:
``enqueue(store, compose_owner_messages(email, messages, pass_id=..., created_at=now))`` keeps
their dedupe keys and refuses two messages to one recipient.

What the digest command calls::

    enqueue_digest(store, email, content, period_end=..., created_at=now)   # key digest:<end>
    deliver_outbox(store, email, now=now)                                   # with --send

Clocks: give ``created_at`` and ``now`` from the real clock. The outbox is about delivery, not
the business clock: a message created at a future ``--as-of`` would not be due until then.

``--dry-run``: ``compose_pass_messages`` / ``compose_digest`` build the same
:class:`ComposedMessage` without touching the database; ``write_eml(m.body, out_dir,
m.eml_name)`` writes each one to a ``.eml`` file instead of queueing and sending it.

Headers. Every header is built by the standard library from values that are checked first: a
line break (CR, LF or any other character ``str.splitlines`` breaks on) or a NUL in a header
value, an address or an image's Content-ID or file name is refused by :func:`build_message` with
a ``ValueError`` naming the header. The compose functions first pass the renderer's subject
through :func:`header_text`, which turns control characters and line breaks into single spaces,
so a series called ``"x\\r\\nBcc: y@z"`` gives the subject text ``x Bcc: y@z`` on one line, not a
header. As a last check, the built bytes are parsed again and their header names compared with
the ones intended.

Delivery (DESIGN.md section 12). :func:`deliver_outbox` opens one connection for all due
messages (a new one only if the server drops it), sends each, and marks each sent in its own
commit right after the server's acceptance. A message that fails (connection refused, timeout,
TLS or login failure, a 4xx or 5xx reply) stays in the outbox and is retried with back-off
(``Store.mark_failed``: 1 min, doubling, at most 6 h); nothing is ever dropped. A message the
server accepted for some recipients and refused for others counts as sent (retrying would send
it twice to the others); the refused addresses are in the report. The one case in which a
message can go out twice: the server accepted it and the process died (or the connection was
lost before the server's reply arrived) before ``mark_sent`` committed. The retry then sends the
same bytes with the same Message-ID, which lets a receiving system recognise the copy.

Security: ``none`` (plain SMTP), ``starttls`` (plain, then STARTTLS; a server that does not offer
it is an error, never a fall-back to plain text), ``tls`` (TLS from the first byte). Certificates
are verified against the system's trust store with the host name checked
(``ssl.create_default_context()``; OpenSSL honours ``SSL_CERT_FILE`` for a private CA); callers
may pass their own ``ssl_context``. Login happens only when ``username_env`` and
``password_env`` are configured and both variables are set; they are read at send time and
never stored, logged or put in an error text; a password is never sent over ``security: none``.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import re
import smtplib
import socket
import ssl
import threading
import time
import unicodedata
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from email.headerregistry import Address
from email.message import EmailMessage, MIMEPart
from email.parser import BytesHeaderParser
from email.policy import SMTP
from email.policy import default as default_policy
from email.utils import format_datetime, make_msgid
from pathlib import Path
from typing import Protocol

from monitor.config import Email, PlumblineConfig, models_of_feed
from monitor.store import OutboxMessage, Store, utc_text
from monitor.text import printable

# --------------------------------------------------------------------------- content


class ImageLike(Protocol):
    """A PNG shown inside the HTML part, referred to there as ``cid:<cid>``."""

    @property
    def cid(self) -> str: ...
    @property
    def png(self) -> bytes: ...
    @property
    def filename(self) -> str: ...


Image = ImageLike | tuple[str, bytes, str]


class ContentLike(Protocol):
    """What a renderer returns for one message."""

    @property
    def subject(self) -> str: ...
    @property
    def text(self) -> str: ...
    @property
    def html(self) -> str: ...
    @property
    def images(self) -> Sequence[Image]: ...


class OwnerMessageLike(Protocol):
    """One pass message for one recipient, grouped by the renderer."""

    @property
    def recipient(self) -> str: ...
    @property
    def models(self) -> tuple[str, ...]: ...
    @property
    def dedupe_key(self) -> str: ...
    @property
    def content(self) -> ContentLike: ...


Renderer = Callable[[str, tuple[str, ...]], ContentLike]
"""``render(recipient, models)``: the content of one recipient's message for a pass."""


def _image_fields(image: Image) -> tuple[str, bytes, str]:
    if isinstance(image, tuple):
        cid, png, filename = image
        return cid, png, filename
    return image.cid, image.png, image.filename


# --------------------------------------------------------------------------- headers

# Headers build_message sets itself; callers' extra headers may not replace them.
_OWN_HEADERS = frozenset({
    "from", "to", "cc", "bcc", "subject", "date", "message-id", "mime-version",
    "auto-submitted", "content-type", "content-transfer-encoding", "content-disposition",
    "content-id", "reply-to", "sender",
})  # fmt: skip
_HEADER_NAME = re.compile(r"^[!-9;-~]+$")  # RFC 5322 field name: printable ASCII but ':'
_CID = re.compile(r"^[A-Za-z0-9!#$&'*+/=?^_`{|}~.-]+(@[A-Za-z0-9.-]+)?$")
_CID_REFERENCE = re.compile(r"""cid:([^"'\s<>)]+)""")
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _check_header_value(header: str, value: str) -> None:
    if not isinstance(value, str):
        raise TypeError(f"e-mail header {header}: expected text, got {type(value).__name__}")
    # Padding makes a trailing line break count too ("a\n".splitlines() is one line).
    if len(f"x{value}x".splitlines()) > 1 or "\x00" in value:
        raise ValueError(
            f"e-mail header {header}: {value!r} contains a line break or NUL, which could start "
            "a new header; header values must be one line (see header_text())"
        )


def header_text(value: str) -> str:
    """``value`` as one line for a header: control characters and line breaks become spaces,
    runs of white space one space. Use it for any header text made from data (series names)."""
    spaced = "".join(" " if unicodedata.category(char) == "Cc" else char for char in value)
    return " ".join(spaced.split())


def _parse_address(header: str, value: str) -> Address:
    """One mailbox (``name@example.org`` or ``Name <name@example.org>``), or ValueError."""
    _check_header_value(header, value)
    try:
        parsed = SMTP.header_factory(header, value)
        addresses = parsed.addresses
        defects = parsed.defects
    except Exception as exc:  # the header parser raises IndexError etc. on some inputs
        raise ValueError(f"e-mail header {header}: {value!r} is not an address") from exc
    if len(addresses) != 1 or defects or not addresses[0].username or not addresses[0].domain:
        raise ValueError(
            f"e-mail header {header}: {value!r} is not one address like name@example.org"
        )
    address: Address = addresses[0]
    if not address.addr_spec.isascii():
        raise ValueError(
            f"e-mail header {header}: {value!r}: addresses with non-ASCII characters need "
            "SMTPUTF8, which Plumbline does not use"
        )
    return address


def recipient_key(address: str) -> str:
    """The form of an address used to group and name messages: the domain in lower case (the
    local part is kept as written, since RFC 5321 lets a server tell its cases apart)."""
    parsed = _parse_address("To", address)
    return f"{parsed.username}@{parsed.domain.lower()}"


def _message_id(
    sender: Address, dedupe_key: str | None, identity: str | None, moment: datetime
) -> str:
    if dedupe_key is None or identity is None:
        return make_msgid(domain=sender.domain)
    # The database's random identity and the moment of composing make the id unique across
    # databases: two instances, a restored backup or a rebuilt database number their passes
    # from the same ids, and would otherwise reuse a Message-ID. A retry sends the stored bytes,
    # so the one unavoidable double send carries the same id.
    text = f"plumbline\0{identity}\0{sender.addr_spec}\0{dedupe_key}\0{moment.isoformat()}"
    digest = hashlib.sha256(text.encode()).hexdigest()
    return f"<{digest[:40]}@{sender.domain}>"


def build_message(
    *,
    sender: str,
    recipients: Sequence[str],
    subject: str,
    text: str,
    html: str,
    inline_images: Iterable[Image] = (),
    headers: Mapping[str, str] | None = None,
    dedupe_key: str | None = None,
    date: datetime | None = None,
    identity: str | None = None,
) -> bytes:
    """The whole message as bytes (CRLF line ends), ready for the outbox or a ``.eml`` file.

    Structure: ``multipart/alternative`` of a ``text/plain`` part and the HTML, which becomes
    ``multipart/related`` with each PNG as an inline part whose ``Content-ID`` is ``<cid>``.
    Headers: From, To (all ``recipients``), Subject, Date (``date``, default now), Message-ID
    (derived from ``dedupe_key``, the database's ``identity`` and the date when both are given,
    else random), ``Auto-Submitted: auto-generated``
    (RFC 3834, so auto-responders stay quiet), then ``headers``. Raises ValueError for a line
    break in any header value, a malformed address, a non-PNG image, a bad or repeated
    Content-ID, or a ``cid:`` in the HTML with no image behind it.
    """
    from_address = _parse_address("From", sender)
    if isinstance(recipients, str):
        raise TypeError("recipients is a sequence of addresses, not one string")
    to_addresses = [_parse_address("To", recipient) for recipient in recipients]
    if not to_addresses:
        raise ValueError("a message needs at least one recipient")
    _check_header_value("Subject", subject)
    moment = datetime.now(UTC) if date is None else date
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ValueError("the Date of a message needs a time zone")
    if dedupe_key is not None:
        _check_header_value("Message-ID", dedupe_key)
    extra = dict(headers or {})
    for name, value in extra.items():
        if not _HEADER_NAME.match(name) or name.lower() in _OWN_HEADERS:
            raise ValueError(f"e-mail header name {name!r} is not allowed here")
        _check_header_value(name, value)

    message = EmailMessage(policy=SMTP)
    message["From"] = from_address
    message["To"] = to_addresses
    message["Subject"] = subject
    message["Date"] = format_datetime(moment)
    message["Message-ID"] = _message_id(from_address, dedupe_key, identity, moment)
    message["Auto-Submitted"] = "auto-generated"
    for name, value in extra.items():
        message[name] = value
    message["MIME-Version"] = "1.0"
    message.make_alternative()

    # Parts are MIMEPart, not EmailMessage, so they carry no MIME-Version header of their own.
    # Quoted-printable keeps the body 7-bit clean for servers without 8BITMIME.
    text_part = MIMEPart(policy=SMTP)
    text_part.set_content(text, subtype="plain", cte="quoted-printable")
    html_part = MIMEPart(policy=SMTP)
    html_part.set_content(html, subtype="html", cte="quoted-printable")
    cids: set[str] = set()
    for cid, png, filename in map(_image_fields, inline_images):
        if not isinstance(cid, str) or not _CID.match(cid):
            raise ValueError(f"inline image Content-ID {cid!r} is not like chart-1@plumbline")
        if cid in cids:
            raise ValueError(f"inline image Content-ID {cid!r} is used twice")
        _check_header_value("Content-Disposition filename", filename)
        if not bytes(png).startswith(_PNG_SIGNATURE):
            raise ValueError(f"inline image {cid!r} is not a PNG")
        cids.add(cid)
        html_part.add_related(
            bytes(png), maintype="image", subtype="png", cid=f"<{cid}>", filename=filename,
            disposition="inline",
        )
    if cids:
        html_part.set_param("type", "text/html")  # RFC 2387: the root part's type
    missing = sorted(set(_CID_REFERENCE.findall(html)) - cids)
    if missing:
        raise ValueError(f"the HTML refers to cid:{missing[0]} but no inline image has that id")
    # typeshed wants an EmailMessage here; the library itself attaches MIMEParts.
    message.attach(text_part)  # type: ignore[arg-type]
    message.attach(html_part)  # type: ignore[arg-type]

    data = message.as_bytes()
    _verify_header_names(data, [*_BASE_HEADERS, *(name.lower() for name in extra)])
    return data


_BASE_HEADERS = (
    "from", "to", "subject", "date", "message-id", "auto-submitted", "mime-version",
    "content-type",
)  # fmt: skip


def _verify_header_names(data: bytes, expected: Sequence[str]) -> None:
    parsed = BytesHeaderParser(policy=default_policy).parsebytes(data)
    found = sorted(name.lower() for name in parsed)
    if found != sorted(expected):
        raise ValueError(
            f"the message's headers came out as {found}, not {sorted(expected)}; not sending it"
        )


# --------------------------------------------------------------------------- composing


@dataclass(frozen=True)
class ComposedMessage:
    """One built message, before it is queued (or written to a ``.eml`` file)."""

    kind: str  # pass | digest
    dedupe_key: str
    recipients: tuple[str, ...]  # envelope addresses (addr-spec form)
    subject: str
    body: bytes
    created_at: datetime
    pass_id: int | None
    models: tuple[str, ...]  # the models it covers (empty for the digest)

    @property
    def eml_name(self) -> str:
        """A file name for ``write_eml``: the dedupe key with ``:`` as ``-``."""
        return self.dedupe_key.replace(":", "-")


@dataclass(frozen=True)
class QueuedMessage:
    outbox_id: int
    dedupe_key: str
    recipients: tuple[str, ...]
    models: tuple[str, ...]
    newly_queued: bool  # False when a message with this dedupe key was queued before


def model_owners(config: PlumblineConfig) -> dict[str, tuple[str, ...]]:
    """Each model's ``owners`` (the loader fills in ``notify.email.to`` for a model naming none)."""
    return {name: tuple(model.owners or ()) for name, model in config.models.items()}


def models_to_notify(store: Store, config: PlumblineConfig, pass_id: int) -> frozenset[str]:
    """Models with findings raised or cleared in ``pass_id``, none with an owner's note.

    A feed-level finding (``stale_feed``, ``rejected_input``) counts for every model that reads
    the feed. Ongoing findings do not count: they were reported when they were new.
    """
    findings = [
        *store.list_findings(raised_in_pass=pass_id),
        *store.list_findings(cleared_in_pass=pass_id),
    ]
    models: set[str] = set()
    for finding in findings:
        if finding.noted:
            continue
        if finding.model is not None:
            models.add(finding.model)
        elif finding.feed is not None:
            models.update(models_of_feed(config, finding.feed))
    return frozenset(models)


def group_by_recipient(
    owners_by_model: Mapping[str, Sequence[str]], models: Iterable[str]
) -> dict[str, tuple[str, ...]]:
    """Recipient → the sorted models among ``models`` that it owns; recipients in key order.

    Addresses that differ only in the case of the domain are one recipient (the first spelling
    seen is kept). A model missing from ``owners_by_model``, or with no owners, reaches nobody.
    """
    spelling: dict[str, str] = {}
    owned: dict[str, set[str]] = {}
    for model in sorted(set(models)):
        for owner in owners_by_model.get(model, ()):
            key = recipient_key(owner)
            spelling.setdefault(key, _parse_address("To", owner).addr_spec)
            owned.setdefault(key, set()).add(model)
    return {spelling[key]: tuple(sorted(owned[key])) for key in sorted(owned)}


def _compose(
    email: Email,
    content: ContentLike,
    *,
    kind: str,
    dedupe_key: str,
    recipients: Sequence[str],
    created_at: datetime,
    pass_id: int | None,
    models: tuple[str, ...],
    identity: str | None = None,
) -> ComposedMessage:
    subject = header_text(content.subject) or "Plumbline"
    envelope = tuple(_parse_address("To", recipient).addr_spec for recipient in recipients)
    body = build_message(
        # The plain-text part is read in terminals and text viewers: escape the control
        # characters and bidirectional marks a file value may bring (monitor.text.printable).
        sender=email.sender, recipients=recipients, subject=subject,
        text=printable(content.text),
        html=content.html, inline_images=content.images, dedupe_key=dedupe_key,
        date=created_at, identity=identity,
    )
    return ComposedMessage(kind, dedupe_key, envelope, subject, body, created_at, pass_id, models)


def compose_pass_messages(
    email: Email,
    *,
    pass_id: int,
    owners_by_model: Mapping[str, Sequence[str]],
    changed_models: Iterable[str],
    render: Renderer,
    created_at: datetime,
    identity: str | None = None,
) -> list[ComposedMessage]:
    """One message per recipient who owns a model in ``changed_models``; none when it is empty.
    ``identity``: the database's (``Store.identity``), for the Message-IDs."""
    messages = []
    for recipient, models in group_by_recipient(owners_by_model, changed_models).items():
        messages.append(
            _compose(
                email, render(recipient, models), kind="pass",
                dedupe_key=f"pass:{pass_id}:{recipient_key(recipient)}", recipients=[recipient],
                created_at=created_at, pass_id=pass_id, models=models, identity=identity,
            )
        )
    return messages


def compose_owner_messages(
    email: Email,
    messages: Iterable[OwnerMessageLike],
    *,
    pass_id: int,
    created_at: datetime,
    identity: str | None = None,
) -> list[ComposedMessage]:
    """A pass's messages as grouped by the renderer, with their own dedupe keys. Two messages to
    one recipient (by :func:`recipient_key`) are refused: each recipient gets one per pass."""
    composed: list[ComposedMessage] = []
    seen: dict[str, str] = {}
    for message in messages:
        key = recipient_key(message.recipient)
        if key in seen:
            raise ValueError(
                f"two messages for {message.recipient} in pass {pass_id} ({seen[key]} and "
                f"{message.dedupe_key}); a recipient gets one message covering all their models"
            )
        seen[key] = message.dedupe_key
        composed.append(
            _compose(
                email, message.content, kind="pass", dedupe_key=message.dedupe_key,
                recipients=[message.recipient], created_at=created_at, pass_id=pass_id,
                models=tuple(message.models), identity=identity,
            )
        )
    return composed


def compose_digest(
    email: Email,
    content: ContentLike,
    *,
    period_end: datetime,
    created_at: datetime,
    recipients: Sequence[str] | None = None,
    pass_id: int | None = None,
    identity: str | None = None,
) -> ComposedMessage:
    """The digest for the period ending ``period_end``, to ``recipients`` (default
    ``notify.email.to``), all in one message with dedupe key ``digest:<period_end as UTC>``."""
    return _compose(
        email, content, kind="digest", dedupe_key=f"digest:{utc_text(period_end)}",
        recipients=list(email.to if recipients is None else recipients), created_at=created_at,
        pass_id=pass_id, models=(), identity=identity,
    )


def enqueue(store: Store, messages: Iterable[ComposedMessage]) -> list[QueuedMessage]:
    """Put composed messages in the outbox; one already queued under its key is left as it was."""
    queued = []
    for message in messages:
        row, created = store.enqueue_message(
            kind=message.kind, dedupe_key=message.dedupe_key, recipients=message.recipients,
            subject=message.subject, body=message.body, created_at=message.created_at,
            pass_id=message.pass_id,
        )
        queued.append(
            QueuedMessage(row.id, row.dedupe_key, row.recipients, message.models, created)
        )
    return queued


def enqueue_pass_messages(
    store: Store,
    email: Email,
    *,
    pass_id: int,
    owners_by_model: Mapping[str, Sequence[str]],
    changed_models: Iterable[str],
    render: Renderer,
    created_at: datetime,
) -> list[QueuedMessage]:
    """Compose and queue a pass's messages (:func:`compose_pass_messages`, :func:`enqueue`)."""
    return enqueue(
        store,
        compose_pass_messages(
            email, pass_id=pass_id, owners_by_model=owners_by_model,
            changed_models=changed_models, render=render, created_at=created_at,
            identity=store.identity,
        ),
    )


def enqueue_digest(
    store: Store,
    email: Email,
    content: ContentLike,
    *,
    period_end: datetime,
    created_at: datetime,
    recipients: Sequence[str] | None = None,
    pass_id: int | None = None,
) -> QueuedMessage:
    """Compose and queue the digest (:func:`compose_digest`); queued at most once per period."""
    message = compose_digest(
        email, content, period_end=period_end, created_at=created_at, recipients=recipients,
        pass_id=pass_id, identity=store.identity,
    )
    return enqueue(store, [message])[0]


_UNSAFE_FILE_CHARS = re.compile(r"[^A-Za-z0-9@+=._-]+")


def write_eml(message_bytes: bytes, out_dir: str | Path, name: str) -> Path:
    """Write a message to ``out_dir/<name>.eml`` (for ``--dry-run``) and return the path.

    ``name`` is reduced to letters, digits and ``@+=._-``; the file is written beside its final
    name and renamed, so a reader never sees half a message.
    """
    stem = _UNSAFE_FILE_CHARS.sub("_", name.removesuffix(".eml")).strip("._") or "message"
    folder = Path(out_dir)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{stem}.eml"
    partial = folder / f".{stem}.eml.part"
    partial.write_bytes(message_bytes)
    os.replace(partial, path)
    return path


# --------------------------------------------------------------------------- delivery


@dataclass(frozen=True)
class DeliveryFailure:
    outbox_id: int
    error: str  # one line, as stored in the outbox's last_error; never holds a secret
    next_attempt_at: datetime


@dataclass(frozen=True)
class DeliveryReport:
    sent: tuple[int, ...] = ()  # outbox ids the server accepted, in sending order
    failed: tuple[DeliveryFailure, ...] = ()
    refused_recipients: tuple[tuple[int, str], ...] = ()  # (outbox id, address) of sent ones
    connections: int = 0  # SMTP connections opened (0 when nothing was due)
    notes: tuple[str, ...] = ()  # e.g. credentials configured but not in the environment


class _NoPlainPassword(Exception):
    pass


_Credentials = tuple[str, str]


def _credentials(email: Email) -> tuple[_Credentials | None, tuple[str, ...]]:
    if email.username_env is None or email.password_env is None:
        return None, ()
    user = os.environ.get(email.username_env)
    password = os.environ.get(email.password_env)
    missing = [
        name for name, value in ((email.username_env, user), (email.password_env, password))
        if not value
    ]
    if missing or user is None or password is None:
        return None, (
            f"{' and '.join(missing)} not set in the environment: connecting without login",
        )
    return (user, password), ()


def _session(email: Email, timeout: float, context: ssl.SSLContext) -> smtplib.SMTP:
    """An SMTP session not yet connected, so a deadline can close its socket from the start."""
    session: smtplib.SMTP
    if email.security == "tls":
        session = smtplib.SMTP_SSL(timeout=timeout, context=context)
    else:
        session = smtplib.SMTP(timeout=timeout)
    # What the constructor would have recorded had it been given the host (it would also have
    # connected at once, outside any deadline): the name TLS checks the certificate against.
    session._host = email.smtp_host  # type: ignore[attr-defined]
    return session


def _connect(
    session: smtplib.SMTP, email: Email, context: ssl.SSLContext,
    credentials: _Credentials | None,
) -> smtplib.SMTP:
    if credentials is not None and email.security == "none":
        raise _NoPlainPassword(
            "refusing to send the SMTP password over an unencrypted connection "
            "(security: none); use starttls or tls"
        )
    try:
        session.connect(email.smtp_host, email.smtp_port)
        session.ehlo()
        if email.security == "starttls":
            # Raises SMTPNotSupportedError when the server does not offer STARTTLS: never
            # carry on in plain text.
            session.starttls(context=context)
            session.ehlo()
        if credentials is not None:
            session.login(*credentials)
    except BaseException:
        session.close()
        raise
    return session


# A message (with the connection when it opens one) must be done within this many times
# ``notify.email.timeout`` in all: the timeout alone bounds each read, and a server that trickles
# a byte at a time would never reach it.
MESSAGE_DEADLINE_FACTOR = 4


@contextmanager
def _deadline(
    session: smtplib.SMTP, seconds: float, stop: threading.Event | None
) -> Iterator[list[str]]:
    """Shut the session's socket down when ``seconds`` pass or ``stop`` is set, whichever is
    first; the blocked read or write then fails at once. Yields a list that says which."""
    done = threading.Event()
    why: list[str] = []

    def watch() -> None:
        end = time.monotonic() + seconds
        while not done.is_set():
            left = end - time.monotonic()
            if left <= 0:
                why.append(f"not done within the overall deadline of {seconds:g} s per message "
                           "(the server is too slow or stalled)")
                break
            if stop is not None and stop.is_set():
                why.append("stopped: Plumbline is shutting down; it is tried again later")
                break
            done.wait(min(left, 0.2))
        else:
            return
        sock = session.sock
        if sock is not None:
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_RDWR)

    watcher = threading.Thread(target=watch, name="plumbline-smtp-deadline", daemon=True)
    watcher.start()
    try:
        yield why
    finally:
        done.set()
        watcher.join()


def _describe(stage: str, exc: BaseException) -> str:
    if isinstance(exc, smtplib.SMTPRecipientsRefused):
        detail = "; ".join(
            f"{address}: {code} {reply.decode(errors='replace')}"
            for address, (code, reply) in exc.recipients.items()
        )
        text = f"recipients refused: {detail}"
    elif isinstance(exc, smtplib.SMTPResponseException):
        reply = exc.smtp_error
        reply_text = reply.decode(errors="replace") if isinstance(reply, bytes) else str(reply)
        text = f"{type(exc).__name__}: {exc.smtp_code} {reply_text}"
    else:
        text = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
    return header_text(f"{stage}: {text}")[:500]


def _quit(session: smtplib.SMTP) -> None:
    try:
        session.quit()
    except OSError:
        session.close()


def deliver_outbox(
    store: Store,
    email: Email,
    *,
    now: datetime,
    connect_timeout: float | None = None,
    ssl_context: ssl.SSLContext | None = None,
    batch_size: int = 100,
    stop: threading.Event | None = None,
) -> DeliveryReport:
    """Send every outbox message due at ``now`` (the real clock, normally) over one connection.

    Nothing due: no connection is made. Each accepted message is marked sent at once; each
    failure is recorded with its back-off, and when the server cannot be reached every due
    message is marked failed without trying again in this run. ``connect_timeout`` (seconds)
    overrides ``notify.email.timeout``; ``ssl_context`` replaces the default verifying context.
    Each message, with the connection it opens, has ``MESSAGE_DEADLINE_FACTOR`` times the
    timeout in all; ``stop`` (the daemon's) cuts a send short and leaves the rest due.
    """
    timeout = email.timeout.total_seconds() if connect_timeout is None else connect_timeout
    deadline = timeout * MESSAGE_DEADLINE_FACTOR
    context = ssl.create_default_context() if ssl_context is None else ssl_context
    credentials, notes = _credentials(email)
    sent: list[int] = []
    failed: list[DeliveryFailure] = []
    refused: list[tuple[int, str]] = []
    connections = 0
    unreachable: str | None = None
    session: smtplib.SMTP | None = None
    handled: set[int] = set()

    def fail(message: OutboxMessage, error: str) -> None:
        next_at = store.mark_failed(message.id, at=now, error=error)
        failed.append(DeliveryFailure(message.id, error, next_at))

    def stopping() -> bool:
        return stop is not None and stop.is_set()

    try:
        while not stopping():
            batch = [m for m in store.due_messages(now, limit=batch_size) if m.id not in handled]
            if not batch:
                break
            for message in batch:
                if stopping():
                    break  # the rest stay due, untouched
                handled.add(message.id)
                if unreachable is not None:
                    fail(message, unreachable)
                    continue
                current = session or _session(email, timeout, context)
                with _deadline(current, deadline, stop) as cut:
                    if session is None:
                        try:
                            session = _connect(current, email, context, credentials)
                            connections += 1
                        except (OSError, _NoPlainPassword) as exc:  # SMTPException is OSError
                            if cut and stopping():
                                break
                            unreachable = header_text(f"connect: {cut[0]}") if cut else (
                                _describe("connect", exc)
                            )
                            fail(message, unreachable)
                            continue
                    try:
                        rejected = session.sendmail(
                            email.sender, list(message.recipients), message.body
                        )
                    except OSError as exc:  # smtplib.SMTPException is an OSError too
                        # A refusal leaves the connection usable (smtplib sends RSET); a lost
                        # connection or a 421 reply does not, and the next message opens a new
                        # one.
                        usable = (
                            not cut
                            and isinstance(exc, smtplib.SMTPException)
                            and not isinstance(exc, smtplib.SMTPServerDisconnected)
                            and session.sock is not None
                        )
                        if not usable:
                            session.close()
                            session = None
                        if cut and stopping():
                            break
                        fail(message, header_text(f"send: {cut[0]}") if cut else
                             _describe("send", exc))
                        continue
                store.mark_sent(message.id, at=now)
                sent.append(message.id)
                refused.extend((message.id, address) for address in sorted(rejected))
    finally:
        if session is not None:
            if stopping():
                session.close()
            else:
                with _deadline(session, deadline, stop):
                    _quit(session)
    return DeliveryReport(tuple(sent), tuple(failed), tuple(refused), connections, notes)


__all__ = [
    "ComposedMessage", "ContentLike", "DeliveryFailure", "DeliveryReport", "Image", "ImageLike",
    "OwnerMessageLike", "QueuedMessage", "Renderer", "build_message", "compose_digest",
    "compose_owner_messages", "compose_pass_messages", "deliver_outbox", "enqueue",
    "enqueue_digest", "enqueue_pass_messages", "group_by_recipient", "header_text",
    "model_owners", "models_to_notify", "recipient_key", "write_eml",
]  # fmt: skip
