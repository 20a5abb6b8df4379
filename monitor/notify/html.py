"""HTML pages written to ``notify.html_dir``: one per model, one per pass, the digest, an index.

Rendering uses jinja2 with the templates inside the package (``monitor/notify/templates``,
partials start with ``_``) and autoescaping on for every ``.html`` template: series names,
period labels, file names and messages come from files people drop, and are always escaped.
The only markup a page takes as is, is chart SVG written by ``plot.to_svg`` (which escapes
every piece of text) and checked by ``charts.check_svg``. Pages carry their style inline and a
Content-Security-Policy that forbids scripts and outside fetches, so they work from a file with
no network.

Files are written atomically (a temporary file, then a rename): a reader never sees half a page.
File names: ``model-<name>.html``, ``pass-<id>.html``, ``digest-<YYYY-MM-DD>.html``,
``index.html``.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import re
import tempfile
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime
from functools import cache
from pathlib import Path
from typing import Any
from urllib.parse import quote

import jinja2

from monitor import __version__
from monitor.audit import (
    CALIBRATED_LINE,
    calibrated_sentence,
    calibrated_view,
    has_calibrated,
    summarise_coverage,
)
from monitor.config import PlumblineConfig
from monitor.notify.charts import Chart, ChartData, draw
from monitor.notify.fits import FitView, read_fit
from monitor.notify.series import (
    KIND_CHART,
    ModelHistory,
    actuals_data,
    coefficient_data,
    hit_rate_data,
    load_model,
    monitoring_data,
    scatter_data,
    series_label,
)
from monitor.notify.views import (
    ChartView,
    CoverageRow,
    FindingView,
    ForecastView,
    chart_view,
    coverage_row,
    forecast_view,
    ordered_findings,
    severity_counts,
)
from monitor.notify.words import (
    CAUTION,
    KUPIEC_VERSUS_FINDING,
    hit_rate_sentence,
    join_words,
    level_text,
    local_time,
    misses_text,
    number,
    percent,
    plural,
    severity_count,
)
from monitor.store import Store, fsync_file

# Charts drawn per model on a page or in a digest (DESIGN.md section 11: about 30 ms each).
CHART_CAP = 25
# Series whose newest fit a model page shows in full when the model has many.
DETAIL_CAP = 25
# Rows of a model page's per-series tables (coverage, fits, forecasts): the series with open
# findings and the worst coverage first; `plumbline audit --model M` lists every series.
TABLE_CAP = 200
_ZONE_ORDER = {"red": 0, "yellow": 1, "green": 2, None: 3}


# The environment's settings as plain data: they go into the name of each compiled template in
# the bytecode cache, so a cache written under other settings is never read.
_SETTINGS: dict[str, Any] = {
    "trim_blocks": True,
    "lstrip_blocks": True,
    "keep_trailing_newline": True,
}
_AUTOESCAPE: dict[str, Any] = {
    "enabled_extensions": ("html",),
    "disabled_extensions": ("txt", "css"),
    "default_for_string": True,
    "default": True,
}


class TemplateCache(jinja2.FileSystemBytecodeCache):
    """Compiled templates kept between processes, so a one-shot ``plumbline pass`` does not parse
    and compile the templates again (about 60 ms of a 200-series weekly pass; a daemon compiles
    them once anyway). jinja2's own per-user folder in the temp directory (mode 0700, its owner
    checked by jinja2); each file is named by the template's path, and its content checked
    against the template's source, so an edited template is compiled afresh. A cache that
    cannot be written is no failure: the template is used as compiled."""

    def dump_bytecode(self, bucket: jinja2.bccache.Bucket) -> None:
        with contextlib.suppress(OSError):
            super().dump_bytecode(bucket)


def template_cache(directory: str | None = None) -> TemplateCache | None:
    """The bytecode cache (``directory``: jinja2's default when None), or None when no safe
    folder can be had."""
    key = hashlib.sha256(
        repr((sorted(_SETTINGS.items()), sorted(_AUTOESCAPE.items()), __version__,
              jinja2.__version__)).encode()
    ).hexdigest()[:12]
    try:
        return TemplateCache(directory, pattern=f"plumbline-{key}-%s.cache")
    except (OSError, RuntimeError):  # RuntimeError: jinja2 found no safe folder
        return None


@cache
def environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.PackageLoader("monitor.notify", "templates"),
        autoescape=jinja2.select_autoescape(**_AUTOESCAPE),
        undefined=jinja2.StrictUndefined,
        bytecode_cache=template_cache(),
        **_SETTINGS,
    )
    env.globals["model_page"] = model_page_name
    env.globals["version"] = __version__
    env.globals["kupiec_versus_finding"] = KUPIEC_VERSUS_FINDING
    return env


def render(template: str, **context: Any) -> str:
    """Render one of the package's templates (autoescaped when it is ``.html``)."""
    context.setdefault("email", False)
    context.setdefault("clock", None)
    context.setdefault("masthead", "")
    return environment().get_template(template).render(**context)


def model_page_name(model: str) -> str:
    return f"model-{quote(model, safe='')}.html"


def pass_page_name(pass_id: int) -> str:
    return f"pass-{int(pass_id)}.html"


def digest_page_name(day: str) -> str:
    if not re.fullmatch(r"\d{4}-\d{2}-\d{2}", day):
        raise ValueError(f"digest day {day!r} is not YYYY-MM-DD")
    return f"digest-{day}.html"


def write_page(folder: Path, name: str, text: str) -> Path:
    """Write ``folder/name`` atomically (temporary file, fsync, rename)."""
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / name
    handle, temp = tempfile.mkstemp(prefix=f".{name}.", suffix=".part", dir=folder)
    try:
        with os.fdopen(handle, "w", encoding="utf-8", newline="\n") as out:
            out.write(text)
            out.flush()
            fsync_file(out.fileno())
        os.chmod(temp, 0o644)
        os.replace(temp, target)
    except BaseException:
        Path(temp).unlink(missing_ok=True)
        raise
    return target


# ------------------------------------------------------------------------------ shared pieces


def attention_sentence(findings: list[FindingView], *, model_count: int) -> str:
    """The opening sentence of a page: what needs attention, most urgent first. A finding with
    an owner's note has been looked at, so it never heads the sentence."""
    if not findings:
        return (
            f"Nothing needs attention: no open findings across {plural(model_count, 'model')}."
        )
    counts = severity_counts(findings)
    parts = [severity_count(n, word) for word, n in counts.items() if n]
    noted = sum(1 for f in findings if f.noted)
    waiting = [f for f in findings if not f.noted]
    if not waiting:
        each = "it has" if len(findings) == 1 else "each has"
        return (
            f"{plural(len(findings), 'open finding')} ({join_words(parts)}); {each} an owner's "
            "note, so none is waiting to be looked at."
        )
    top = waiting[0]
    verb = "needs" if len(findings) == 1 else "need"
    with_notes = "" if not noted else (
        f", {noted} of them with an owner's note" if noted > 1 else ", 1 with an owner's note")
    most = "most urgent without a note" if noted else "most urgent"
    return (
        f"{plural(len(findings), 'open finding')} {verb} attention ({join_words(parts)}"
        f"{with_notes}); {most}: {top.headline} ({top.severity})."
    )


def coverage_sentence(summary: dict[str, Any] | None, what: str) -> str:
    """One model's pooled coverage over a window, as a sentence that says in words whether the
    misses are about as many as the nominal level expects (the count's zone, ``MISS_WORDS``)."""
    if summary is None:
        return f"Nothing scored {what} yet."
    series = "" if summary["series_count"] == 1 else f" across {summary['series_count']} series"
    zones = summary["zones"]
    spread = ""
    if summary["series_count"] > 1 and (zones["yellow"] or zones["red"]):
        spread = (f"; series with more misses than expected: {zones['yellow']}, with far "
                  f"more: {zones['red']}")
    return (
        f"{what[:1].upper()}{what[1:]}: "
        f"{hit_rate_sentence(summary['hits'], summary['scored'], summary['nominal'])}{series} "
        f"(hit rate {percent(summary['hit_rate'], 1)}, interval "
        f"{percent(summary['hit_rate_lower'], 1)} to {percent(summary['hit_rate_upper'], 1)}"
        f"{spread}): {misses_text(summary['zone'])}."
    )


class ChartBudget:
    """Charts drawn for one model, up to ``cap`` (DESIGN.md section 11)."""

    def __init__(self, prefix: str, cap: int, *, svg: bool, png: bool) -> None:
        self.prefix, self.cap, self.svg, self.png = prefix, cap, svg, png
        self.drawn: list[Chart] = []
        self.skipped = 0  # series whose charts were not drawn because the cap was reached

    @property
    def full(self) -> bool:
        return len(self.drawn) >= self.cap

    def add(self, data: ChartData | None) -> Chart | None:
        if data is None:
            return None
        if self.full:
            return None
        key = f"{self.prefix}-{len(self.drawn) + 1}"
        chart = draw(data, key=key, svg=self.svg, png=self.png)
        self.drawn.append(chart)
        return chart


def series_chart_data(
    store: Store, history: ModelHistory, series: str | None, *, full: bool
) -> list[ChartData]:
    """Charts for one series: its actuals against intervals, then the chart each open finding's
    kind calls for; ``full`` (a model's only series) adds the scatter, the first slope and the
    monitoring path."""
    wanted: list[str] = ["actuals"]
    for finding in history.findings_of(series):
        kind_chart = KIND_CHART.get(finding.kind)
        if kind_chart is not None and kind_chart not in wanted:
            wanted.append(kind_chart)
    if full:
        wanted += [k for k in ("scatter", "coefficient", "monitoring") if k not in wanted]
    slopes = list(history.model.predictors or ())
    out: list[ChartData] = []
    for kind in wanted:
        data: ChartData | None
        if kind == "actuals":
            data = actuals_data(history, series) if len(history.scored_rows(series)) else None
        elif kind == "coefficient":
            data = coefficient_data(store, history, series, slopes[0]) if slopes else None
        elif kind == "monitoring":
            data = monitoring_data(store, history, series)
        else:
            data = scatter_data(store, history, series)
        if data is not None:
            out.append(data)
    return out


# ------------------------------------------------------------------------------ model pages


@dataclass(frozen=True)
class CoverageLine:
    sentence: str
    zone: str | None  # the pooled zone, shown beside the sentence


@dataclass(frozen=True)
class SeriesDetail:
    label: str
    fit: FitView | None
    findings: list[FindingView]
    charts: list[ChartView]
    warming: str = ""  # without a fit: how many rows it has, and how many the first fit needs


@dataclass(frozen=True)
class SeriesRow:
    series: str
    window: str
    n: str
    r_squared: str
    slope: str
    interval: str
    open_findings: int


@dataclass(frozen=True)
class ModelPage:
    name: str
    sentence: str
    facts: str
    findings: list[FindingView]
    coverage_sentences: list[CoverageLine]
    coverage_rows: list[CoverageRow]
    coverage_chart: ChartView | None
    series_rows: list[SeriesRow]
    details: list[SeriesDetail]
    details_note: str
    forecasts: list[ForecastView]
    charts_note: str
    table_note: str
    warming_note: str = ""


def build_model_page(
    store: Store,
    config: PlumblineConfig,
    name: str,
    *,
    history: ModelHistory | None = None,
    chart_cap: int = CHART_CAP,
) -> ModelPage:
    """Everything a model's page shows, with its charts drawn (SVG)."""
    history = history or load_model(store, config, name)
    model = history.model
    # The feed's own open findings (gone quiet, files refused) belong on the page too: a model
    # whose feed is silent is never shown as having "no open findings".
    feed_findings = [f for f in store.open_findings(feed=model.feed) if f.model is None]
    findings = ordered_findings([*history.open_findings, *feed_findings])
    # Each window audits the scored forecasts load_model read, once for all pages.
    windows = {last: history.audit(store, config, last) for last in (13, 52, None)}
    # The coverage finding audits each series' latest ``recent`` scored forecasts: that window
    # is shown beside 13 and 52, so the page's figures and the finding's can be compared.
    finding_window = model.recent
    spans: tuple[tuple[int | None, str], ...] = (
        (13, "over the latest 13 scored periods"), (52, "over the latest 52 scored periods"))
    if finding_window in (13, 52):
        spans = tuple((k, f"{w} (the coverage finding's window)" if k == finding_window else w)
                      for k, w in spans)
    else:
        windows[finding_window] = history.audit(store, config, finding_window)
        spans = (*spans, (finding_window, f"over the latest {finding_window} scored periods "
                                          "(the coverage finding's window)"))
    spans = (*spans, (None, "over every scored period"))
    sentences = []
    for key, what in spans:
        summary = summarise_coverage(windows[key])
        sentences.append(CoverageLine(coverage_sentence(summary, what),
                                      None if summary is None else summary["zone"]))
        calibrated = calibrated_sentence(windows[key], what)
        if calibrated is not None:  # the calibrated intervals, beside the model's own
            sentences.append(CoverageLine(calibrated, None))
    if has_calibrated(windows[None]):
        sentences.append(CoverageLine(CALIBRATED_LINE, None))
    budget = ChartBudget(f"m-{_css_key(name)}", chart_cap, svg=True, png=False)
    coverage_chart = None
    if len(history.scored):
        pooled = hit_rate_data(history, pooled=True)
        chart = budget.add(pooled)
        coverage_chart = None if chart is None else chart_view(chart)
    single = history.series == [None] or model.per is None
    featured = [None] if single else history.flagged[:DETAIL_CAP]
    needed = max(model.min_rows, model.parameter_count + 2) if model.fitted else 0
    counts = store.actual_row_counts(model.feed) if model.fitted else {}
    warming = {s: n for s, n in sorted(counts.items(), key=lambda kv: kv[0] or "")
               if s not in history.latest_fits and n < needed}
    details = []
    for series in featured:
        fit = history.latest_fits.get(series)
        if budget.full:
            budget.skipped += 1
            charts = []
        else:
            charts = [budget.add(d) for d in series_chart_data(store, history, series,
                                                               full=single)]
        details.append(SeriesDetail(
            label=series_label(series),
            fit=None if fit is None else read_fit(fit, response=model.response,
                                                  significance=model.thresholds.significance),
            findings=ordered_findings(history.findings_of(series)),
            charts=[chart_view(c) for c in charts if c is not None],
            warming="" if fit is not None else warming_text(counts.get(series, 0), needed),
        ))
    flagged_count = len(history.flagged)
    if single:
        details_note = ""
    elif not flagged_count:
        details_note = ("No series has an open finding; the table above lists each series' "
                        "newest fit.")  # fmt: skip
    elif flagged_count > DETAIL_CAP:
        details_note = (f"Shown in full: the {DETAIL_CAP} most urgent of the {flagged_count} "
                        "series with open findings.")  # fmt: skip
    else:
        details_note = (f"Shown in full: the {plural(flagged_count, 'series', 'series')} with "
                        "open findings.")  # fmt: skip
    predictors = ", ".join(model.predictors or ()) or "none (an interval forecast made elsewhere)"
    version = store.current_model_version(name)
    facts = (
        f"Feed {model.feed}; response {model.response}; predictors {predictors}"
        + (f"; one series per {model.per}" if model.per else "")
        + f"; intervals at {level_text(model.nominal_level)}; window {model.window}"
        + (f"; version {version.version}" if version else "")
        + (f"; owners {', '.join(model.owners)}" if model.owners else "")
        + "."
    )
    return ModelPage(
        name=name,
        sentence=_model_sentence(name, history, findings, windows[13]),
        facts=facts,
        findings=findings,
        coverage_sentences=sentences,
        coverage_rows=_with_calibrated_rows(_first_rows(windows[52], history)),
        coverage_chart=coverage_chart,
        series_rows=_series_rows(history, _ranked_series(history, windows[52])[:TABLE_CAP]),
        details=details,
        details_note=details_note,
        forecasts=[forecast_view(f) for f in _first_forecasts(history, windows[52])],
        table_note=_table_note(history),
        warming_note="" if single or not warming else (
            f"Warming up ({plural(len(warming), 'series', 'series')} with fewer than {needed} rows "
            "with an actual, the first fit's minimum): "
            + ", ".join(f"{series_label(s)} {n}" for s, n in list(warming.items())[:20])
            + (" …" if len(warming) > 20 else "") + "."),
        charts_note=(
            "" if not budget.skipped else
            f"No charts for {plural(budget.skipped, 'further series', 'further series')} (at most "
            f"{chart_cap} charts per model)."
        ),
    )


def warming_text(rows: int, needed: int) -> str:
    """What a series without a fit is waiting for."""
    if needed and rows < needed:
        return (f"Warming up: {plural(rows, 'row')} with an actual so far; the first fit needs "
                f"{needed} (min_rows, and at least p + 2), so {needed - rows} more.")
    return "No fit recorded yet: the next pass with new rows for this series fits it."


def _with_calibrated_rows(records: list[dict[str, Any]]) -> list[CoverageRow]:
    """Each record's row, followed, for a model with calibrated intervals, by the row of the
    calibrated interval over the same periods."""
    rows: list[CoverageRow] = []
    for record in records:
        rows.append(coverage_row(record))
        if has_calibrated([record]) and record.get("calibrated_scored"):
            view = calibrated_view(record)
            label = "whole model" if record["series"] is None else str(record["series"])
            view["series"] = f"{label}, calibrated interval"
            rows.append(coverage_row(view))
    return rows


def _css_key(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9-]", "-", name)


def _model_sentence(
    name: str, history: ModelHistory, findings: list[FindingView], last13: list[dict[str, Any]]
) -> str:
    count = len(history.series)
    opening = f"{plural(count, 'series', 'series')}" if history.model.per else "One series"
    summary = summarise_coverage(last13)
    coverage = (
        "Nothing scored yet." if summary is None else
        f"{summary['hits']} of the latest {summary['scored']} actuals inside their "
        f"{level_text(summary['nominal'])} prediction intervals: {misses_text(summary['zone'])}."
    )
    if not findings:
        return f"{opening}, no open findings. {coverage}"
    counts = severity_counts(findings)
    parts = join_words([severity_count(n, word) for word, n in counts.items() if n])
    top = findings[0]
    where = (f" of feed {top.feed}" if top.model is None and top.feed
             else "" if top.series is None else f" in series {top.series}")
    since = f" since {top.since}" if top.since else ""
    # The worst current figure first: the most urgent finding with the number behind it.
    return (
        f"Most urgent: {top.kind_words}{where}{since} ({top.statistic}). {opening}; "
        f"{plural(len(findings), 'open finding')} ({parts}). {coverage}"
    )


def _ranked_series(history: ModelHistory, records: list[dict[str, Any]]) -> list[str | None]:
    """Series with open findings first (most severe first), then by zone (red first), then name."""
    flagged = {s: i for i, s in enumerate(history.flagged)}
    zones = {r["series"]: r["zone"] for r in records}
    return sorted(history.series, key=lambda s: (
        flagged.get(s, len(flagged)), _ZONE_ORDER.get(zones.get(s), 3),
        (0, "") if s is None else (1, s)))


def _first_rows(records: list[dict[str, Any]], history: ModelHistory) -> list[dict[str, Any]]:
    if len(records) <= TABLE_CAP:
        return records
    by_series = {r["series"]: r for r in records}
    ranked = [s for s in _ranked_series(history, records) if s in by_series]
    return [by_series[s] for s in ranked[:TABLE_CAP]]


def _first_forecasts(history: ModelHistory, records: list[dict[str, Any]]) -> list[Any]:
    shown = set(_ranked_series(history, records)[:TABLE_CAP])
    return [f for f in history.open_forecasts() if f.series in shown]


def _table_note(history: ModelHistory) -> str:
    count = len(history.series)
    if count <= TABLE_CAP:
        return ""
    return (f"The tables on this page show {TABLE_CAP} of the model's {count} series: those with "
            "open findings first, then those with the worst coverage. 'plumbline audit --model "
            f"{history.name} --format csv' lists every series.")


def _series_rows(history: ModelHistory, series_list: list[str | None]) -> list[SeriesRow]:
    rows = []
    counts: dict[str | None, int] = {}
    for finding in history.open_findings:
        counts[finding.series] = counts.get(finding.series, 0) + 1
    for series in series_list:
        fit = history.latest_fits.get(series)
        view = None if fit is None else read_fit(fit, response=history.model.response)
        slope = None if view is None else view.slope()
        rows.append(SeriesRow(
            series="whole model" if series is None else series,
            window="no fit yet" if fit is None else f"{fit.window_first} to {fit.window_last}",
            n="" if fit is None else str(fit.n),
            r_squared="" if view is None or view.r_squared is None else f"{view.r_squared:.2f}",
            slope="" if slope is None else number(slope.estimate),
            interval="" if slope is None else f"{number(slope.lower)} to {number(slope.upper)}",
            open_findings=counts.get(series, 0),
        ))
    return rows


def render_model_page(page: ModelPage, *, clock: str | None) -> str:
    return render("model.html", page=page, page_title=f"Model {page.name}",
                  masthead=f"model {page.name}", clock=clock, caution=CAUTION)


def write_model_pages(
    store: Store,
    config: PlumblineConfig,
    out_dir: Path | None = None,
    *,
    models: Iterable[str] | None = None,
    chart_cap: int = CHART_CAP,
    histories: dict[str, ModelHistory] | None = None,
) -> list[Path]:
    """Write ``model-<name>.html`` for each model (or those named); returns the paths.
    ``histories`` reuses models already read (``load_model``) in this pass or digest."""
    folder = Path(out_dir or config.notify.html_dir)
    clock = business_clock_text(store, config)
    paths = []
    for name in models if models is not None else config.models:
        page = build_model_page(store, config, name, chart_cap=chart_cap,
                                history=(histories or {}).get(name))
        paths.append(write_page(folder, model_page_name(name),
                                render_model_page(page, clock=clock)))
    return paths


def business_clock_text(store: Store, config: PlumblineConfig) -> str | None:
    latest = store.latest_pass()
    return None if latest is None else local_time(latest.as_of, config.zone)


# ------------------------------------------------------------------------------ index


@dataclass(frozen=True)
class IndexEntry:
    href: str
    label: str
    note: str


def write_index(store: Store, config: PlumblineConfig, out_dir: Path | None = None) -> Path:
    """``index.html``: the digests, the models and the passes whose pages are in the folder."""
    folder = Path(out_dir or config.notify.html_dir)
    folder.mkdir(parents=True, exist_ok=True)
    present = {p.name for p in folder.glob("*.html")}
    digests = sorted((n for n in present if re.fullmatch(r"digest-\d{4}-\d{2}-\d{2}\.html", n)),
                     reverse=True)
    models = []
    feed_open: dict[str, int] = {}
    for finding in store.open_findings():
        if finding.model is None and finding.feed is not None:
            feed_open[finding.feed] = feed_open.get(finding.feed, 0) + 1
    for name in config.models:
        count = len(store.open_findings(model=name))
        feed = config.models[name].feed
        on_feed = feed_open.get(feed, 0)
        note = "no open findings" if not count else f"{plural(count, 'open finding')}"
        if on_feed:
            note = ("" if not count else note + "; ") + (
                f"its feed {feed} has {plural(on_feed, 'open finding')}")
        if model_page_name(name) in present:
            models.append(IndexEntry(model_page_name(name), name, note))
    # Every pass whose page is in the folder, newest first (the latest 60 of them).
    page_ids = sorted((int(m.group(1)) for n in present
                       if (m := re.fullmatch(r"pass-(\d+)\.html", n))), reverse=True)
    passes = []
    for pass_id in page_ids[:60]:
        record = store.get_pass(pass_id)
        if record is None:
            continue
        passes.append(IndexEntry(pass_page_name(record.id), f"Pass {record.id}",
                                 f"business clock {local_time(record.as_of, config.zone)}, "
                                 f"{record.status}"))
    text = render(
        "index.html",
        page_title="Reports",
        masthead="reports",
        clock=business_clock_text(store, config),
        digests=[IndexEntry(n, n[len("digest-"):-len(".html")], "") for n in digests],
        models=models,
        passes=passes,
    )
    return write_page(folder, "index.html", text)


def generated_at(moment: datetime, config: PlumblineConfig) -> str:
    return local_time(moment, config.zone)


__all__ = [
    "CHART_CAP",
    "DETAIL_CAP",
    "ChartBudget",
    "ModelPage",
    "attention_sentence",
    "build_model_page",
    "business_clock_text",
    "coverage_sentence",
    "digest_page_name",
    "environment",
    "model_page_name",
    "pass_page_name",
    "render",
    "render_model_page",
    "series_chart_data",
    "write_index",
    "write_model_pages",
    "write_page",
]
