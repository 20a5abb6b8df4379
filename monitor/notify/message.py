"""The neutral shape of a message Plumbline wants sent: what the mail layer needs and nothing
about SMTP. Reports build these; ``monitor/notify/mail.py`` turns them into MIME and sends them.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class InlineImage:
    """A PNG the HTML part shows with ``<img src="cid:{cid}">``."""

    cid: str
    png: bytes
    filename: str


@dataclass(frozen=True)
class MessageContent:
    """Subject (one line, no user text), plain-text part, HTML part and its inline images."""

    subject: str
    text: str
    html: str
    images: tuple[InlineImage, ...] = ()

    def __post_init__(self) -> None:
        if "\n" in self.subject or "\r" in self.subject:
            raise ValueError("a subject is one line")
        for image in self.images:
            if f"cid:{image.cid}" not in self.html:
                raise ValueError(f"inline image {image.cid} is not referenced by the HTML part")


@dataclass(frozen=True)
class OwnerMessage:
    """One message for one recipient, covering all their models; ``dedupe_key`` names it in the
    outbox so that a re-run queues nothing new."""

    recipient: str
    models: tuple[str, ...]
    dedupe_key: str
    content: MessageContent


__all__ = ["InlineImage", "MessageContent", "OwnerMessage"]
