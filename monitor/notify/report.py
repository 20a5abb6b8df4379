"""What a pass tells people: its page, and one message per recipient with new or cleared findings.

    render_pass_report(store, config, pass_id, *, out_dir=None, escalated=(),
                       write_models=True, messages=True) -> PassReport

writes ``pass-<id>.html`` (with ``write_models``, every model's page and the index too) and
returns the pass's new and cleared findings and, for each recipient, one ``OwnerMessage``
covering all their models (DESIGN.md section 5 step 7): a finding on a model goes to its
``owners``, a finding on a feed to the owners of every model that reads the feed. Findings
with an owner's note are never sent; ``escalated`` names open findings whose severity rose in
this pass (the pass knows; the database keeps only the new severity), which are sent again. A
recipient with nothing to hear about gets no message, and a pass with nothing new sends nothing.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from monitor.audit import summarise_coverage
from monitor.config import PlumblineConfig
from monitor.notify.charts import Chart
from monitor.notify.html import (
    CHART_CAP,
    ChartBudget,
    attention_sentence,
    coverage_sentence,
    model_page_name,
    pass_page_name,
    render,
    series_chart_data,
    write_index,
    write_model_pages,
    write_page,
)
from monitor.notify.mail import DeliveryReport, compose_owner_messages, deliver_outbox, enqueue
from monitor.notify.message import InlineImage, MessageContent, OwnerMessage
from monitor.notify.series import ModelHistories, ModelHistory
from monitor.notify.views import (
    ChartView,
    FindingView,
    ForecastView,
    chart_view,
    forecast_view,
    ordered_findings,
    severity_counts,
)
from monitor.notify.words import (
    CAUTION,
    join_words,
    local_date,
    local_time,
    plural,
    severity_count,
)
from monitor.store import FindingRecord, PassRecord, Store, StoreError

FORECASTS_CAP = 25  # forecasts listed per model on a pass page
EMAIL_CHART_CAP = 6  # PNG charts in one pass message


@dataclass(frozen=True)
class PassReport:
    pass_id: int
    path: Path
    new: tuple[FindingRecord, ...]
    cleared: tuple[FindingRecord, ...]
    escalated: tuple[FindingRecord, ...]
    messages: tuple[OwnerMessage, ...]


@dataclass(frozen=True)
class ModelSection:
    model: str
    sentence: str
    zone: str | None
    charts: list[ChartView]


def _recipients(config: PlumblineConfig, record: FindingRecord) -> set[str]:
    if record.model is not None:
        model = config.models.get(record.model)
        return set(model.owners or ()) if model is not None else set()
    return {owner for model in config.models.values() if model.feed == record.feed
            for owner in (model.owners or ())}  # fmt: skip


def _sentence(record: PassRecord, new: list[FindingView], cleared: list[FindingView],
              issued: int, clock: str) -> str:
    parts = []
    if new:
        counts = severity_counts(new)
        detail = join_words([severity_count(n, w) for w, n in counts.items() if n])
        top = new[0]
        parts.append(f"raised {plural(len(new), 'finding')} ({detail}; most urgent: "
                     f"{top.headline})")  # fmt: skip
    else:
        parts.append("raised no new finding")
    parts.append(f"found {len(cleared)} no longer seen")
    parts.append(f"issued {plural(issued, 'forecast')}")
    return f"Pass {record.id} (business clock {clock}, {record.status}) " + join_words(parts) + "."


def _model_sections(
    store: Store, config: PlumblineConfig, histories: dict[str, ModelHistory],
    new: list[FindingRecord], *, svg: bool, png: bool, total_cap: int | None,
) -> tuple[list[ModelSection], list[Chart]]:
    """Per model with news: its coverage over the latest 13 periods and the charts of the
    series concerned (at most ``CHART_CAP`` per model, ``total_cap`` in all)."""
    sections: list[ModelSection] = []
    drawn: list[Chart] = []
    models = [name for name in config.models if any(f.model == name for f in new)]
    for index, name in enumerate(models):
        history = histories[name]
        budget = ChartBudget(f"p{index + 1}", CHART_CAP, svg=svg, png=png)
        seen: set[str | None] = set()
        for finding in ordered_findings(f for f in new if f.model == name):
            if finding.series in seen:
                continue
            seen.add(finding.series)
            capped = total_cap is not None and len(drawn) + len(budget.drawn) >= total_cap
            if budget.full or capped:
                break
            for data in series_chart_data(store, history, finding.series, full=False):
                if total_cap is not None and len(drawn) + len(budget.drawn) >= total_cap:
                    break
                budget.add(data)
        if name not in history.summaries:
            history.summaries[name] = summarise_coverage(history.audit(store, config, 13))
        summary = history.summaries[name]
        sections.append(ModelSection(
            name, coverage_sentence(summary, "over the latest 13 scored periods"),
            None if summary is None else summary["zone"],
            [chart_view(c, email=png and not svg) for c in budget.drawn],
        ))
        drawn += budget.drawn
    return sections, drawn


def _render(
    template: str, store: Store, config: PlumblineConfig, record: PassRecord,
    histories: dict[str, ModelHistory], new: list[FindingRecord], cleared: list[FindingRecord],
    escalated: list[FindingRecord], *, email: bool, with_charts: bool = True,
) -> tuple[str, list[Chart]]:
    clock = local_time(record.as_of, config.zone)
    zone = config.zone
    new_views = ordered_findings(new, zone=zone)  # listed under "New findings": no tag needed
    cleared_views = ordered_findings(cleared, zone=zone)
    escalated_views = ordered_findings(escalated, zone=zone)
    issued = store.list_forecasts(pass_id=record.id)
    forecasts: list[ForecastView] = []
    notes: list[str] = []
    for name in config.models:
        rows = [f for f in issued if f.model == name]
        forecasts += [forecast_view(f) for f in rows[:FORECASTS_CAP]]
        if len(rows) > FORECASTS_CAP:
            notes.append(f"{name}: {len(rows) - FORECASTS_CAP} more forecasts on its page.")
    sections, charts = _model_sections(
        store, config, histories, new + escalated, svg=not email, png=email,
        total_cap=(EMAIL_CHART_CAP if email else None) if with_charts else 0,
    )
    open_views = ordered_findings(store.open_findings())
    text = render(
        template,
        record=record,
        sentence=_sentence(record, new_views, cleared_views, len(issued), clock),
        attention=attention_sentence(open_views, model_count=len(config.models)),
        new=new_views,
        cleared=cleared_views,
        escalated=escalated_views,
        sections=sections,
        forecasts=forecasts,
        forecast_notes=notes,
        counts=_work_done(record),
        caution=CAUTION,
        email=email,
        page_title=f"Pass {record.id}",
        masthead=f"pass {record.id}",
        clock=clock,
    )
    return text, charts


def render_pass_report(
    store: Store,
    config: PlumblineConfig,
    pass_id: int,
    *,
    out_dir: Path | None = None,
    escalated: Iterable[int] = (),
    notify: Iterable[int] | None = None,
    write_models: bool = True,
    messages: bool = True,
    before_pages: Callable[[tuple[OwnerMessage, ...]], None] | None = None,
    histories: ModelHistories | None = None,
) -> PassReport:
    """Write the pass's page (and the model pages and index) and build its messages.

    ``before_pages`` is called with the messages before any page is written (``notify_pass``
    queues them there), so a failure to write pages never loses a message.

    ``notify``, when given, is the pass's own list of findings to send (``findings_to_notify``:
    raised, more severe, no longer seen; those with an owner's note left out): the messages cover
    exactly those, and any among them neither raised nor cleared in this pass counts as more severe.

    ``messages=False`` writes the pages only (the report's ``messages`` are then empty): no
    e-mail is rendered and no PNG drawn, for a caller that would throw them away.

    ``histories``: models already read, shared with other pages written while the database
    stands still (by default each model is read once for this pass's pages).
    """
    record = store.get_pass(pass_id)
    if record is None:
        raise StoreError(f"no pass with id {pass_id}")
    folder = Path(out_dir or config.notify.html_dir)
    new = store.list_findings(raised_in_pass=pass_id)
    cleared = store.list_findings(cleared_in_pass=pass_id)
    raised = {f.id for f in new}
    closed = {f.id for f in cleared}
    wanted = None if notify is None else set(notify)
    rising = set(escalated) | ((wanted or set()) - raised - closed)
    rose = [f for f in (store.get_finding(i) for i in sorted(rising))
            if f is not None and f.id not in raised and f.state.value != "cleared"]
    if histories is None:
        histories = ModelHistories(store, config)  # each model read once, when first needed

    built = []
    recipients: dict[str, list[FindingRecord]] = {}
    for finding in (*new, *cleared, *rose) if messages else ():
        if finding.noted or (wanted is not None and finding.id not in wanted):
            continue
        for address in _recipients(config, finding):
            recipients.setdefault(address, []).append(finding)
    for address in sorted(recipients):
        mine = {f.id for f in recipients[address]}
        mine_new = [f for f in new if f.id in mine]
        mine_cleared = [f for f in cleared if f.id in mine]
        mine_rose = [f for f in rose if f.id in mine]
        html_part, charts = _render("pass.html", store, config, record, histories, mine_new,
                                    mine_cleared, mine_rose, email=True)
        text_part, _ = _render("pass.txt", store, config, record, histories, mine_new,
                               mine_cleared, mine_rose, email=True, with_charts=False)
        models = sorted({f.model for f in recipients[address] if f.model is not None})
        content = MessageContent(
            subject=_subject(record, config, mine_new, mine_cleared, mine_rose),
            text=text_part,
            html=html_part,
            images=tuple(InlineImage(c.cid, c.png, c.filename) for c in charts
                         if c.png is not None),
        )
        built.append(OwnerMessage(address, tuple(models), f"pass:{pass_id}:{address}",
                                  content))
    # The messages are handed over before any page is written: a reports folder that cannot be
    # written (full, read-only, permissions) then never costs a message.
    if before_pages is not None:
        before_pages(tuple(built))
    html, _ = _render("pass.html", store, config, record, histories, new, cleared, rose,
                      email=False)
    path = write_page(folder, pass_page_name(pass_id), html)
    if write_models:
        # Only the pages of models this pass changed (fits, forecasts, outcomes, findings), and
        # any page not written yet: the others would come out the same.
        changed = store.models_changed_in_pass(pass_id)
        changed |= {f.model for f in (*new, *cleared, *rose) if f.model is not None}
        # A feed's finding (gone quiet, files refused) is shown on its models' pages too.
        feeds = {f.feed for f in (*new, *cleared, *rose) if f.model is None and f.feed}
        changed |= {name for name, m in config.models.items() if m.feed in feeds}
        names = [name for name in config.models
                 if name in changed or not (folder / model_page_name(name)).exists()]
        if names:
            write_model_pages(store, config, folder, models=names, histories=histories)
    write_index(store, config, folder)
    return PassReport(pass_id, path, tuple(new), tuple(cleared), tuple(rose), tuple(built))


# Keys of a pass's counts that are bookkeeping rather than news for a reader.
_INTERNAL_COUNTS = {"observation_mark", "timings", "stopped_early", "skipped"}
# Counts whose key is not how a reader says it.
_COUNT_WORDS = {"findings_cleared": "findings no longer seen"}


def _work_done(record: PassRecord) -> list[tuple[str, str]]:
    """The pass's counts as (what, how many) lines: plain numbers and words only, plus what it
    skipped and why it stopped early, if it did."""
    counts = record.counts if isinstance(record.counts, dict) else {}
    lines = [(_COUNT_WORDS.get(str(key), str(key).replace("_", " ")), str(value))
             for key, value in sorted(counts.items())
             if key not in _INTERNAL_COUNTS and isinstance(value, int | float | str)
             and not isinstance(value, bool)]
    for item in counts.get("skipped") or ():
        lines.append(("skipped", str(item)))
    if counts.get("stopped_early"):
        lines.append(("stopped early", str(counts["stopped_early"])))
    return lines


def _subject(record: PassRecord, config: PlumblineConfig, new: list[FindingRecord],
             cleared: list[FindingRecord], rose: list[FindingRecord]) -> str:
    parts = []
    if new:
        worst = max(f.severity.rank for f in new)
        word = next(f.severity.value for f in new if f.severity.rank == worst)
        parts.append(f"{plural(len(new), 'finding')} raised (most severe: {word})")
    if rose:
        parts.append(f"{len(rose)} more severe")
    if cleared:
        parts.append(f"{len(cleared)} no longer seen")
    return (f"Plumbline: {', '.join(parts) or 'no change'}; pass {record.id}, "
            f"{local_date(record.as_of, config.zone)}")  # fmt: skip


def notify_pass(
    store: Store,
    config: PlumblineConfig,
    pass_id: int,
    *,
    now: datetime,
    notify: Iterable[int] | None = None,
    deliver: bool = True,
    stop: threading.Event | None = None,
) -> tuple[PassReport, DeliveryReport | None]:
    """DESIGN.md section 5 step 7 in one call: with ``notify.email``, queue one message per
    recipient in the outbox (dedupe key ``pass:<id>:<recipient>``, so a re-run queues nothing
    new), then write the pass's pages (a page that cannot be written never costs a message),
    and, with ``deliver``, send what is due. ``now`` is the real
    clock (the outbox's), ``notify`` the pass's ``findings_to_notify``."""
    email = config.notify.email

    def queue(messages: tuple[OwnerMessage, ...]) -> None:
        if email is not None and messages:
            enqueue(store, compose_owner_messages(email, messages, pass_id=pass_id,
                                                  created_at=now, identity=store.identity))

    try:
        report = render_pass_report(store, config, pass_id, notify=notify, before_pages=queue)
    except OSError:
        # The pages could not be written; the messages are queued. Send them anyway, then
        # report the pages' failure (the pass records it and tries the pages again).
        if email is not None and deliver:
            deliver_outbox(store, email, now=now, stop=stop)
        raise
    if email is None:
        return report, None
    return report, deliver_outbox(store, email, now=now, stop=stop) if deliver else None


__all__ = ["EMAIL_CHART_CAP", "FORECASTS_CAP", "PassReport", "notify_pass", "render_pass_report"]
