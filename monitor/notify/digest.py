"""The digest: the scheduled summary of findings, coverage and forecasts, as a page and a message.

    build_digest(store, config, *, as_of=None) -> Digest
    render_digest_html(digest, store, *, email=False) -> (html, charts)
    render_digest_text(digest) -> str
    digest_message(digest, store) -> MessageContent          the e-mail form (cid: PNG charts)
    write_digest(store, config, out_dir=None, *, as_of=None, now=None) -> Path

The period end is the latest pass's business clock (DESIGN.md section 6) unless ``as_of`` is
given. "Since the last digest" means the passes whose business clock lies after the previous
digest's period end and at or before this one. Coverage is ``monitor.audit.audit_models`` with
``last=13`` and ``last=52``, pooled per model and listed per series for the series with open
findings, so the digest's figures equal ``plumbline audit --format json --last 13`` / ``--last
52``. Coverage, open findings and open forecasts are read as the database holds them when the
digest is built (the default period end, the latest pass, makes that the same moment).

``write_digest`` writes ``digest-<YYYY-MM-DD>.html`` (the period end's date in the config's time
zone), the index, and the page of any model whose page is not in the folder yet (the digest links
to them), then records the digest in the database.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime
from itertools import pairwise
from pathlib import Path
from typing import Any

from monitor.audit import (
    CALIBRATED_LINE,
    calibrated_sentence,
    has_calibrated,
    summarise_coverage,
)
from monitor.config import PlumblineConfig
from monitor.errors import UsageError
from monitor.notify.charts import Chart, ChartData
from monitor.notify.html import (
    CHART_CAP,
    ChartBudget,
    attention_sentence,
    coverage_sentence,
    digest_page_name,
    model_page_name,
    render,
    write_index,
    write_model_pages,
    write_page,
)
from monitor.notify.message import InlineImage, MessageContent
from monitor.notify.series import ModelHistory, actuals_data, hit_rate_data, load_model
from monitor.notify.views import (
    CoverageRow,
    FindingView,
    ForecastView,
    chart_view,
    coverage_row,
    forecast_view,
    ordered_findings,
)
from monitor.notify.words import CAUTION, local_date, local_time, plural
from monitor.store import DigestRecord, Store, parse_utc, utc_text

FINDINGS_CAP = 25  # open findings listed per model; the model page lists them all
CLEARED_CAP = 40  # rows of cleared findings (grouped by model and kind), most severe first
FORECASTS_CAP = 25  # coming forecasts listed per model
EMAIL_CHART_CAP = 12  # PNG charts in one digest e-mail


@dataclass(frozen=True)
class ModelCoverage:
    model: str
    last13: dict[str, Any] | None
    last52: dict[str, Any] | None
    sentences: tuple[str, str]
    flagged13: tuple[dict[str, Any], ...]  # audit records (last 13) of the flagged series
    flagged52: tuple[dict[str, Any], ...]
    rows: tuple[CoverageRow, ...]  # flagged13 and flagged52 as table rows
    more_flagged: int
    charts: tuple[ChartData, ...]
    # interval_method: calibrated: the calibrated intervals' coverage over the same windows and
    # the line that says what they are; empty for other models.
    calibrated: tuple[str, ...] = ()


@dataclass(frozen=True)
class ClearedGroup:
    """Cleared findings of one kind on one model (or feed), as one row of the digest."""

    severity: str  # the most severe among them
    rank: int
    kind: str
    kind_words: str
    scope: str
    count: int
    first_since: str | None
    last_cleared: str | None


def group_cleared(views: tuple[FindingView, ...] | list[FindingView]) -> list[ClearedGroup]:
    """One row per (model or feed, kind): how many cleared, since when, last cleared when."""
    groups: dict[tuple[str, str], list[FindingView]] = {}
    for view in views:
        owner = view.model if view.model is not None else f"feed {view.feed}"
        groups.setdefault((owner, view.kind), []).append(view)
    rows = []
    for (owner, _kind), items in groups.items():
        top = max(items, key=lambda v: v.rank)
        series = {v.series for v in items if v.series is not None}
        if len(series) > 1:
            scope = f"{owner}, {len(series)} series"
        elif len(series) == 1:
            scope = f"{owner}, series {next(iter(series))}"
        else:
            scope = owner
        since = [v.since for v in items if v.since]
        cleared = [v.cleared for v in items if v.cleared]
        rows.append(ClearedGroup(top.severity, top.rank, top.kind, top.kind_words, scope,
                                 len(items), min(since) if since else None,
                                 max(cleared) if cleared else None))
    rows.sort(key=lambda r: (-r.rank, r.scope, r.kind))
    return rows


@dataclass(frozen=True)
class VersionChange:
    model: str
    version: int
    created: str
    what: str


@dataclass(frozen=True)
class Digest:
    period_end: datetime
    period_end_text: str
    day: str
    timezone: str
    previous_period_end: datetime | None
    previous_text: str | None
    pass_id: int | None
    sentence: str
    models: tuple[str, ...]
    open_findings: tuple[FindingView, ...]  # capped per model
    open_total: int
    hidden_notes: tuple[str, ...]
    new_findings: tuple[FindingView, ...]  # raised since the last digest and still open
    raised_then_cleared: int  # raised since the last digest and already no longer seen
    cleared_findings: tuple[FindingView, ...]
    versions: tuple[VersionChange, ...]
    coverage: tuple[ModelCoverage, ...]
    forecasts: tuple[ForecastView, ...]
    forecast_notes: tuple[str, ...]
    caution: str

    @property
    def cleared_groups(self) -> list[ClearedGroup]:
        return group_cleared(self.cleared_findings)

    @property
    def subject(self) -> str:
        counts = f"{plural(self.open_total, 'open finding')}, {len(self.new_findings)} new"
        return f"Plumbline digest of {self.day}: {counts}"


def _previous_digest(store: Store, period_end: datetime) -> DigestRecord | None:
    latest = store.latest_digest()
    if latest is None or latest.period_end < period_end:
        return latest
    # Re-rendering a digest already recorded (or an earlier one): the digest before it.
    # Store has no public query for this yet; the digests table is read directly.
    rows = store._dicts(
        "SELECT * FROM digests WHERE period_end < ? ORDER BY period_end DESC LIMIT 1",
        (utc_text(period_end),),
    )
    if not rows:
        return None
    row = rows[0]
    return DigestRecord(row["id"], parse_utc(row["period_end"]), parse_utc(row["created_at"]),
                        row["pass_id"], row["path"])


def _version_change(store: Store, config: PlumblineConfig, name: str, since: datetime | None,
                    until: datetime) -> list[VersionChange]:
    versions = store.model_versions(name)
    out = []
    for before, after in pairwise(versions):
        if (since is not None and after.created_at <= since) or after.created_at > until:
            continue
        changed = [key for key in ("response", "predictors", "per", "intercept", "interval")
                   if before.config.get(key) != after.config.get(key)]
        what = (
            f"{', '.join(changed)} changed" if changed else "its definition changed"
        ) + "; history is kept and monitoring starts afresh"
        out.append(VersionChange(name, after.version, local_time(after.created_at, config.zone),
                                 what))
    return out


def build_digest(
    store: Store, config: PlumblineConfig, *, as_of: datetime | None = None,
    histories: dict[str, ModelHistory] | None = None,
) -> Digest:
    """The digest's content for the period ending ``as_of`` (default: the latest pass's
    business clock). Raises ``UsageError`` when no pass has run and no ``as_of`` is given."""
    latest = store.latest_pass()
    if as_of is None:
        if latest is None:
            raise UsageError("no pass has run yet, so there is nothing to digest")
        as_of = latest.as_of
    if as_of.tzinfo is None:
        raise ValueError("as_of must carry a time zone")
    zone = config.zone
    previous = _previous_digest(store, as_of)
    since = None if previous is None else previous.period_end
    passes = store.list_passes(limit=100_000)
    window = {p.id for p in passes if p.as_of <= as_of and (since is None or p.as_of > since)}
    pass_id = max((p.id for p in passes if p.as_of <= as_of), default=None)

    every = store.list_findings(state="all")
    new_ids = {f.id for f in every if f.first_pass_id in window}
    still_open = [f for f in every if f.state.value != "cleared"]
    # Marked "new" only against a previous digest: in the first one everything would be.
    open_views = ordered_findings(still_open, new_ids=new_ids if since is not None else (),
                                  zone=zone)
    cleared_views = ordered_findings(
        (f for f in every if f.cleared_pass_id is not None and f.cleared_pass_id in window),
        zone=zone,
    )
    new_views = ordered_findings((f for f in still_open if f.id in new_ids), new_ids=new_ids,
                                 zone=zone)

    # Up to FINDINGS_CAP open findings per model, most severe first; a finding raised since
    # the last digest is always listed, so the count of newly raised ones is the count marked.
    shown: list[FindingView] = []
    hidden: list[str] = []
    listed: dict[str | None, int] = {}
    left_out: dict[str, int] = {}
    for view in open_views:
        count = listed.get(view.model, 0)
        if view.model is None or view.is_new or count < FINDINGS_CAP:
            shown.append(view)
            listed[view.model] = count + 1
        else:
            left_out[view.model] = left_out.get(view.model, 0) + 1
    for model, count in left_out.items():
        hidden.append(f"{model}: {count} more open findings on its page "
                      f"({model_page_name(model)}).")  # fmt: skip
    raised_then_cleared = sum(1 for f in every if f.id in new_ids and f.state.value == "cleared")

    histories = histories if histories is not None else {
        name: load_model(store, config, name) for name in config.models
    }
    coverage = []
    forecasts: list[ForecastView] = []
    forecast_notes: list[str] = []
    versions: list[VersionChange] = []
    for name in config.models:
        history = histories[name]
        coverage.append(_model_coverage(store, config, history))
        versions += _version_change(store, config, name, since, as_of)
        coming = history.open_forecasts(as_of)
        flagged = set(history.flagged)
        coming.sort(key=lambda f: (f.series not in flagged,
                                   (0, "") if f.series is None else (1, f.series),
                                   f.target_period_key))
        forecasts += [forecast_view(f) for f in coming[:FORECASTS_CAP]]
        if len(coming) > FORECASTS_CAP:
            forecast_notes.append(f"{name}: {len(coming) - FORECASTS_CAP} more forecasts on its "
                                  f"page ({model_page_name(name)}).")  # fmt: skip

    since_text = None if since is None else local_time(since, zone)
    change = (
        f" Since the last digest ({since_text}): {len(new_views)} newly raised and still open, "
        f"{len(cleared_views)} no longer seen." if since_text
        else f" This is the first digest: {len(new_views)} raised so far and still open, "
             f"{len(cleared_views)} no longer seen."
    )
    return Digest(
        period_end=as_of,
        period_end_text=local_time(as_of, zone),
        day=local_date(as_of, zone),
        timezone=zone.key,
        previous_period_end=since,
        previous_text=since_text,
        pass_id=pass_id,
        sentence=attention_sentence(open_views, model_count=len(config.models)) + change,
        models=tuple(config.models),
        open_findings=tuple(shown),
        open_total=len(open_views),
        hidden_notes=tuple(hidden),
        new_findings=tuple(new_views),
        raised_then_cleared=raised_then_cleared,
        cleared_findings=tuple(cleared_views),
        versions=tuple(versions),
        coverage=tuple(coverage),
        forecasts=tuple(forecasts),
        forecast_notes=tuple(forecast_notes),
        caution=CAUTION,
    )


def _model_coverage(
    store: Store, config: PlumblineConfig, history: ModelHistory
) -> ModelCoverage:
    name = history.name
    last13 = history.audit(store, config, 13)
    last52 = history.audit(store, config, 52)
    flagged = history.flagged
    listed = flagged[:FINDINGS_CAP]
    by13 = {r["series"]: r for r in last13}
    by52 = {r["series"]: r for r in last52}
    flagged13 = tuple(by13[s] for s in listed if s in by13)
    flagged52 = tuple(by52[s] for s in listed if s in by52)
    rows = []
    for series in listed:
        for table in (by13, by52):
            if series in table:
                rows.append(coverage_row(table[series]))
    charts: list[ChartData] = []
    if len(history.scored):
        charts.append(hit_rate_data(history, pooled=True))
        for series in flagged:
            if len(charts) >= CHART_CAP:
                break
            if len(history.scored_rows(series)):
                charts.append(actuals_data(history, series))
    return ModelCoverage(
        model=name,
        last13=summarise_coverage(last13),
        last52=summarise_coverage(last52),
        sentences=(
            coverage_sentence(summarise_coverage(last13), "over the latest 13 scored periods"),
            coverage_sentence(summarise_coverage(last52), "over the latest 52 scored periods"),
        ),
        flagged13=flagged13,
        flagged52=flagged52,
        rows=tuple(rows),
        more_flagged=max(0, len(flagged) - len(listed)),
        charts=tuple(charts),
        calibrated=tuple(
            line for line in (
                calibrated_sentence(last13, "over the latest 13 scored periods"),
                calibrated_sentence(last52, "over the latest 52 scored periods"),
                CALIBRATED_LINE if has_calibrated(last52) else None,
            ) if line is not None
        ),
    )


# ------------------------------------------------------------------------------ rendering


def _draw_charts(digest: Digest, *, svg: bool, png: bool,
                 total_cap: int | None) -> dict[str, list[Chart]]:
    drawn: dict[str, list[Chart]] = {}
    count = 0
    for index, item in enumerate(digest.coverage):
        budget = ChartBudget(f"d{index + 1}", CHART_CAP, svg=svg, png=png)
        for data in item.charts:
            if total_cap is not None and count >= total_cap:
                break
            if budget.add(data) is not None:
                count += 1
        drawn[item.model] = budget.drawn
    return drawn


def render_digest_html(digest: Digest, *, email: bool = False) -> tuple[str, list[Chart]]:
    """The digest as an HTML page (inline SVG charts), or with ``email`` as the HTML part of a
    message whose charts are ``cid:`` PNG attachments; returns the HTML and the charts drawn."""
    drawn = _draw_charts(digest, svg=not email, png=email,
                         total_cap=EMAIL_CHART_CAP if email else None)
    charts = {model: [chart_view(c, email=email) for c in items] for model, items in drawn.items()}
    html = render(
        "digest.html",
        digest=digest,
        cleared_cap=CLEARED_CAP,
        charts=charts,
        email=email,
        page_title=f"Digest for the period ending {digest.day}",
        masthead=f"digest for the period ending {digest.day}",
        clock=digest.period_end_text,
    )
    return html, [c for items in drawn.values() for c in items]


def render_digest_text(digest: Digest) -> str:
    """The plain-text digest (the text part of the e-mail)."""
    return render("digest.txt", digest=digest, cleared_cap=CLEARED_CAP)


def digest_message(digest: Digest) -> MessageContent:
    """The digest's e-mail: subject, text part, HTML part and its inline PNG charts."""
    html, charts = render_digest_html(digest, email=True)
    images = tuple(
        InlineImage(chart.cid, chart.png, chart.filename) for chart in charts
        if chart.png is not None
    )
    return MessageContent(digest.subject, render_digest_text(digest), html, images)


def write_digest(
    store: Store,
    config: PlumblineConfig,
    out_dir: Path | None = None,
    *,
    as_of: datetime | None = None,
    now: datetime | None = None,
    digest: Digest | None = None,
    record: bool = True,
    histories: dict[str, ModelHistory] | None = None,
) -> Path:
    """Write the digest page (building the digest unless given), then record it in the database
    (unless ``record`` is False, as for a dry run); returns the page's path. ``histories``:
    models already read (``ModelHistories``), for the digest and the model pages it writes."""
    folder = Path(out_dir or config.notify.html_dir)
    digest = digest if digest is not None else build_digest(store, config, as_of=as_of,
                                                             histories=histories)
    html, _ = render_digest_html(digest)
    path = write_page(folder, digest_page_name(digest.day), html)
    missing = [name for name in config.models if not (folder / model_page_name(name)).exists()]
    if missing:
        write_model_pages(store, config, folder, models=missing, histories=histories)
    write_index(store, config, folder)
    if record:
        store.record_digest(period_end=digest.period_end, created_at=now or datetime.now(UTC),
                            pass_id=digest.pass_id, path=path)
    return path


__all__ = [
    "CLEARED_CAP",
    "EMAIL_CHART_CAP",
    "FINDINGS_CAP",
    "FORECASTS_CAP",
    "ClearedGroup",
    "Digest",
    "ModelCoverage",
    "VersionChange",
    "build_digest",
    "digest_message",
    "group_cleared",
    "render_digest_html",
    "render_digest_text",
    "write_digest",
]
