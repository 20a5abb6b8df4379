"""What Plumbline tells people: HTML pages, charts, the digest, and the messages the mail layer
sends (``monitor/notify/mail.py`` turns a ``MessageContent`` into MIME and delivers it).

Public API::

    render_pass_report(store, config, pass_id, *, out_dir=None, escalated=(),
                       write_models=True, messages=True) -> PassReport
        after a pass: writes pass-<id>.html, the model pages and the index; PassReport.messages
        holds one OwnerMessage per recipient with new, cleared or more severe findings
    notify_pass(store, config, pass_id, *, now, notify=None, deliver=True)
        -> (PassReport, DeliveryReport | None): the above, then queue the messages in the
        outbox and deliver (when notify.email is configured)
    build_digest(store, config, *, as_of=None) -> Digest
    write_digest(store, config, out_dir=None, *, as_of=None, now=None) -> Path
        on the digest schedule: digest-<date>.html (+ index, missing model pages), recorded
    digest_message(digest) -> MessageContent     subject, text, html with cid: PNGs, images
    render_digest_html(digest, *, email=False) / render_digest_text(digest)
    write_model_pages(store, config, out_dir=None, *, models=None) / write_index(...)

Modules: ``words`` (how things are said), ``views`` (what pages show), ``fits`` (stored fits as
pages show them), ``series`` (a model's history and chart data from the database), ``charts``
(each kind's data, alt text, SVG and PNG), ``plot`` (the SVG renderer), ``plot_png`` (the
e-mail's PNG, matplotlib), ``html`` (jinja2 pages), ``digest``, ``report`` (per pass),
``message`` (the neutral message shape), ``templates/``.
"""

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from monitor.notify.digest import (
        Digest,
        build_digest,
        digest_message,
        render_digest_html,
        render_digest_text,
        write_digest,
    )
    from monitor.notify.html import CHART_CAP, write_index, write_model_pages
    from monitor.notify.message import InlineImage, MessageContent, OwnerMessage
    from monitor.notify.report import PassReport, notify_pass, render_pass_report

# The names above, imported on first use (PEP 562): ``from monitor.notify.words import ...``
# then loads words.py alone, not the charts and numpy, so light commands stay light.
_WHERE = {
    "Digest": "digest", "build_digest": "digest", "digest_message": "digest",
    "render_digest_html": "digest", "render_digest_text": "digest", "write_digest": "digest",
    "CHART_CAP": "html", "write_index": "html", "write_model_pages": "html",
    "InlineImage": "message", "MessageContent": "message", "OwnerMessage": "message",
    "PassReport": "report", "notify_pass": "report", "render_pass_report": "report",
}


def __getattr__(name: str) -> Any:
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module 'monitor.notify' has no attribute {name!r}")
    import importlib

    return getattr(importlib.import_module(f"monitor.notify.{module}"), name)


__all__ = [
    "CHART_CAP",
    "Digest",
    "InlineImage",
    "MessageContent",
    "OwnerMessage",
    "PassReport",
    "build_digest",
    "digest_message",
    "notify_pass",
    "render_digest_html",
    "render_digest_text",
    "render_pass_report",
    "write_digest",
    "write_index",
    "write_model_pages",
]
