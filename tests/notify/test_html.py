"""HTML pages: the opening sentence, findings in order of severity with a shape per severity,
zone words beside their colours, autoescaped user text, no outside resources, and the pass's
messages (one per recipient, findings with an owner's note left out). Pages are parsed with
``html.parser``, so "no such element" means no element the browser would build either."""

from __future__ import annotations

import os
import re
import subprocess
import sys
import tempfile
from dataclasses import dataclass, field
from html.parser import HTMLParser
from pathlib import Path

import jinja2
import pytest
from _looks import assert_no_borrowed_looks
from report_history import (
    IMG_FILE,
    SCRIPT_SERIES,
    History,
    as_of,
    build_history,
    copy_history,
)

from monitor.notify import html, render_pass_report, write_index, write_model_pages
from monitor.notify.html import attention_sentence, environment, render, template_cache
from monitor.notify.words import KUPIEC_VERSUS_FINDING, MISS_WORDS
from monitor.store import Store
from monitor.vocabulary import Finding, FindingKind, Severity


@pytest.fixture(scope="module")
def built_history(tmp_path_factory: pytest.TempPathFactory) -> History:
    return build_history(tmp_path_factory.mktemp("history"))


@pytest.fixture
def history(built_history: History, tmp_path: Path) -> History:
    return copy_history(built_history, tmp_path / "workspace")


@dataclass
class Element:
    tag: str
    attrs: dict[str, str]
    ancestors: list[tuple[str, dict[str, str]]]
    parents: list[Element] = field(default_factory=list)
    text: list[str] = field(default_factory=list)

    def within(self, other: Element) -> bool:
        return any(parent is other for parent in self.parents)

    @property
    def classes(self) -> set[str]:
        return set(self.attrs.get("class", "").split())


class Page(HTMLParser):
    """Every element with its attributes, ancestors and text; the page's text as data."""

    VOID = frozenset({"meta", "link", "img", "br", "hr", "input", "path", "circle", "use"})

    def __init__(self, text: str) -> None:
        super().__init__(convert_charrefs=True)
        self.elements: list[Element] = []
        self.stack: list[Element] = []
        self.data: list[str] = []
        self.feed(text)
        self.close()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        element = Element(tag, {k: v or "" for k, v in attrs},
                          [(e.tag, e.attrs) for e in self.stack], list(self.stack))
        self.elements.append(element)
        if tag not in self.VOID:
            self.stack.append(element)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.elements.append(Element(tag, {k: v or "" for k, v in attrs},
                                     [(e.tag, e.attrs) for e in self.stack], list(self.stack)))

    def handle_endtag(self, tag: str) -> None:
        for i in range(len(self.stack) - 1, -1, -1):
            if self.stack[i].tag == tag:
                del self.stack[i:]
                break

    def handle_data(self, data: str) -> None:
        self.data.append(data)
        for element in self.stack:
            element.text.append(data)

    def find(self, tag: str, cls: str | None = None) -> list[Element]:
        return [e for e in self.elements if e.tag == tag and (cls is None or cls in e.classes)]

    @property
    def text(self) -> str:
        return " ".join(" ".join(self.data).split())


def text_of(element: Element) -> str:
    return " ".join("".join(element.text).split())


def _assert_safe(page: Page, raw: str) -> None:
    """No script, no event handler, no outside fetch; the user text stays text."""
    assert not page.find("script")
    assert not page.find("link")
    assert not page.find("iframe")
    for element in page.elements:
        for name, value in element.attrs.items():
            assert not name.startswith("on"), (element.tag, name)
            if name in ("src", "href"):
                assert not re.match(r"^(https?:|//|javascript:)", value), value
    assert not any(e.tag == "img" and "onerror" in e.attrs for e in page.elements)
    assert "@import" not in raw and "url(http" not in raw
    csp = [e for e in page.find("meta") if e.attrs.get("http-equiv") == "Content-Security-Policy"]
    assert csp and "default-src 'none'" in csp[0].attrs["content"]


def _severity_sequence(page: Page) -> list[str]:
    return [e.attrs["data-severity"] for e in page.find("li", "finding")]


RANK = {"critical": 2, "warning": 1, "notice": 0}


def _extra_findings(store: Store, pass_id: int) -> None:
    """More kinds in the last pass, so its page has every severity and a feed-level finding."""
    at = as_of(59)
    for finding in (
        Finding("pick_hours", None, None, FindingKind.SIGN_FLIP, Severity.CRITICAL, "2025-02-16",
                -0.0412, 0.003, "The slope on order_lines is now significant with the opposite "
                "sign to the baseline's.", "Stop using this model's forecasts until the reversal "
                "is understood."),
        Finding("delivery_hours", "North", None, FindingKind.NOT_ESTIMABLE, Severity.WARNING,
                "2025-02-23", None, None, "The model for North can no longer be fitted: drops "
                "is constant in the window.", "Check the feed for a predictor that stopped "
                "varying."),
        Finding(None, None, "warehouse", FindingKind.STALE_FEED, Severity.WARNING, "2025-02-23",
                12.0, None, "Feed warehouse has delivered nothing newer than 2025-02-23.",
                "Check the upstream export."),
        Finding("delivery_hours", "South", None, FindingKind.HETEROSCEDASTICITY,
                Severity.NOTICE, "2025-02-23", 13.1, 0.0003, "The spread of the errors for "
                "South changes with the predictors.", "Expect misses at the high end."),
    ):
        store.upsert_finding(finding, pass_id=pass_id, at=at)


def test_pass_page_orders_by_severity_with_shapes(history: History) -> None:
    last = history.pass_ids[-1]
    with history.open() as store:
        _extra_findings(store, last)
        report = render_pass_report(store, history.config, last, write_models=False)
    raw = report.path.read_text(encoding="utf-8")
    page = Page(raw)
    _assert_safe(page, raw)
    lede = page.find("p", "lede")[0]
    assert text_of(lede).startswith(f"Pass {last} (business clock 2025-02-24 08:00 "
                                    "Europe/Berlin, finished) raised 4 findings (1 critical, 2 "
                                    "warnings and 1 notice; most urgent: pick_hours: a slope "
                                    "reversed its sign (fit to ")
    assert text_of(lede).endswith("), found 0 no longer seen and issued 4 forecasts.")
    sequence = _severity_sequence(page)
    assert sequence == ["critical", "warning", "warning", "notice"]  # the new findings
    assert [RANK[s] for s in sequence] == sorted((RANK[s] for s in sequence), reverse=True)
    shapes = {"critical": ("path", "currentColor"), "warning": ("path", "none"),
              "notice": ("circle", "currentColor")}
    for item in page.find("li", "finding"):
        severity = item.attrs["data-severity"]
        inside = [e for e in page.elements if (item.tag, item.attrs) in e.ancestors]
        svg = [e for e in inside if e.tag == "svg" and f"shape-{severity}" in e.classes]
        assert len(svg) == 1, severity
        tag, fill = shapes[severity]
        drawn = [e for e in inside if e.tag == tag
                 and (e.tag, e.attrs) != (svg[0].tag, svg[0].attrs)
                 and ("svg", svg[0].attrs) in e.ancestors]
        assert drawn and drawn[0].attrs["fill"] == fill
        word = [e for e in inside if "severity-word" in e.classes]
        assert text_of(word[0]) == severity  # the word, never the shape or a colour alone
    assert "feed warehouse" in page.text and "Behind it" in page.text and "Consider" in page.text
    assert "12 days since the latest period" in page.text


def test_pass_messages_one_per_recipient(history: History) -> None:
    last = history.pass_ids[-1]
    with history.open() as store:
        _extra_findings(store, last)
        report = render_pass_report(store, history.config, last, write_models=False)
    by_recipient = {m.recipient: m for m in report.messages}
    assert set(by_recipient) == {"warehouse@example.org", "depots@example.org"}
    both = by_recipient["warehouse@example.org"]
    assert both.models == ("delivery_hours", "pick_hours")
    assert both.dedupe_key == f"pass:{last}:warehouse@example.org"
    depots = by_recipient["depots@example.org"]
    assert depots.models == ("delivery_hours",)
    # The stale warehouse feed reaches the owners of models on that feed only.
    assert "Feed warehouse has delivered nothing" in both.content.text
    assert "Feed warehouse" not in depots.content.text
    # findings lead with what and where; the subject counts what was raised (issue 10 wording)
    assert "pick_hours: a slope reversed its sign" in " ".join(both.content.text.split())
    assert "reversed its sign" not in depots.content.text
    assert depots.content.subject.startswith("Plumbline: 2 findings raised (most severe: warning)")
    for message in report.messages:
        content = message.content
        assert "\n" not in content.subject and content.subject.startswith("Plumbline: ")
        page = Page(content.html)
        assert not page.find("svg")  # e-mail clients do not draw inline SVG: PNG by cid
        cids = {e.attrs["src"][4:] for e in page.find("img") if e.attrs["src"].startswith("cid:")}
        assert cids == {image.cid for image in content.images}
        for image in content.images:
            assert image.png.startswith(b"\x89PNG")
    assert depots.content.images  # the depots' new findings come with their charts


def test_pages_only_build_no_message(history: History) -> None:
    """``messages=False`` (the demo's pass pages) writes the same page and builds no e-mail."""
    last = history.pass_ids[-1]
    with history.open() as store:
        _extra_findings(store, last)
        full = render_pass_report(store, history.config, last, write_models=False)
        page = full.path.read_text(encoding="utf-8")
        full.path.unlink()
        quiet = render_pass_report(store, history.config, last, write_models=False,
                                   messages=False)
    assert full.messages and quiet.messages == ()
    assert quiet.path == full.path and quiet.path.read_text(encoding="utf-8") == page
    assert quiet.new == full.new and quiet.cleared == full.cleared


def test_findings_with_an_owners_note_are_not_sent(history: History) -> None:
    week = 50  # pass 51 raised only the rejected file on feed depots
    pass_id = history.pass_ids[week]
    with history.open() as store:
        raised = store.list_findings(raised_in_pass=pass_id)
        assert [f.kind for f in raised] == [FindingKind.REJECTED_INPUT]
        report = render_pass_report(store, history.config, pass_id, write_models=False)
        assert {m.recipient for m in report.messages} == {"depots@example.org",
                                                          "warehouse@example.org"}
        store.note_finding(raised[0].id, at=as_of(week), by="owner", text="a known export fault")
        quiet = render_pass_report(store, history.config, pass_id, write_models=False)
    assert quiet.messages == ()
    assert quiet.path.exists()  # the page is written all the same


def test_notify_list_and_escalation(history: History) -> None:
    last = history.pass_ids[-1]
    with history.open() as store:
        coverage = store.open_findings(model="pick_hours", kind=FindingKind.COVERAGE)[0]
        nothing = render_pass_report(store, history.config, last, write_models=False)
        assert nothing.messages == ()  # the last pass raised and cleared nothing
        rose = render_pass_report(store, history.config, last, write_models=False,
                                  notify=[coverage.id])
    assert [f.id for f in rose.escalated] == [coverage.id]
    assert [m.recipient for m in rose.messages] == ["warehouse@example.org"]
    assert "became more severe" in rose.messages[0].content.html


def test_autoescaping_of_series_and_file_names(history: History) -> None:
    with history.open() as store:
        report = render_pass_report(store, history.config, history.pass_ids[50],
                                    write_models=False)
        paths = write_model_pages(store, history.config)
    for path in [report.path, *paths]:
        raw = path.read_text(encoding="utf-8")
        page = Page(raw)
        _assert_safe(page, raw)
    model_page = Page((history.root / "reports" / "model-delivery_hours.html").read_text())
    assert SCRIPT_SERIES in model_page.text  # shown as text
    pass_page = Page(report.path.read_text(encoding="utf-8"))
    assert IMG_FILE in pass_page.text
    assert "&lt;img src=x onerror=alert(1)&gt;" in report.path.read_text(encoding="utf-8")


def test_model_page_content(history: History) -> None:
    with history.open() as store:
        (path,) = write_model_pages(store, history.config, models=["pick_hours"])
    raw = path.read_text(encoding="utf-8")
    page = Page(raw)
    assert page.find("h1")[0].text == ["pick_hours"]
    lede = text_of(page.find("p", "lede")[0])
    # The page opens with its worst current figure: the most urgent finding and its number.
    assert re.match(r"Most urgent: coverage below nominal since \d{4}-\d\d-\d\d \(hit rate "
                    r"\d+ %; cumulative-sum test of the errors' size, p [<\d. ]+\)\. One "
                    r"series; 2 open findings \(1 warning and 1 notice\)\.", lede), lede
    # The newest fit: a sentence with the result, plain columns with the level in the caption.
    assert re.search(r"R² 0\.\d\d on 52 periods \(2024-03-03 to 2025-02-23\); slope [\d.]+ per "
                     r"order_lines, 95 % interval [\d.]+ to [\d.]+\.", page.text)
    headers = [text_of(th) for th in page.find("th")]
    for column in ("term", "estimate", "standard error", "t", "p-value", "lower", "upper"):
        assert column in headers
    assert "Coefficients with 95 % confidence intervals (lower, upper); t and p-values on 50 " \
           "degrees of freedom." in page.text
    assert "Durbin–Watson" in page.text and "Breusch–Pagan" in page.text
    # The coverage table's Kupiec p and the coverage finding's p-value (the lede's) are
    # different tests; the table's caption says so, so a reader does not take them for one.
    assert "Kupiec p" in headers
    assert " ".join(KUPIEC_VERSUS_FINDING.split()) in " ".join(page.text.split())
    # The miss count in words; its colour (a rule under the words) never stands alone, and no
    # colour word or coloured square stands in for it.
    labels = page.find("span", "misses")
    assert labels
    for label in labels:
        zone = label.attrs["data-zone"]
        assert text_of(label) == MISS_WORDS[zone]
        assert f"misses-{zone}" in label.attrs["class"].split()
    assert not page.find("span", "swatch")
    assert "zone" not in " ".join(text_of(th) for th in page.find("th"))
    # Charts: inline SVG, each with a caption stating its message and an accessible label.
    figures = page.find("figure", "chart")
    assert len(figures) >= 3
    for figure in figures:
        label = [e for e in page.elements if (figure.tag, figure.attrs) in e.ancestors
                 and e.attrs.get("role") == "img"]
        assert label and re.search(r"\d", label[0].attrs["aria-label"])
    ids = [e.attrs["id"] for e in page.elements if "id" in e.attrs]
    assert len(ids) == len(set(ids))
    # The forecasts awaiting their actuals: prediction interval, and the narrower mean response.
    assert "mean-response interval" in page.text and "never used for scoring" in page.text
    assert_no_borrowed_looks(raw)  # last: it skips where ../shared is absent


def test_index_links_what_is_there(history: History) -> None:
    with history.open() as store:
        write_model_pages(store, history.config)
        render_pass_report(store, history.config, history.pass_ids[-1], write_models=False)
        index = write_index(store, history.config)
    page = Page(index.read_text(encoding="utf-8"))
    hrefs = {e.attrs["href"] for e in page.find("a")}
    assert {"model-pick_hours.html", "model-delivery_hours.html",
            f"pass-{history.pass_ids[-1]}.html"} <= hrefs
    for href in hrefs:
        assert (index.parent / href).exists()


def test_templates_autoescape_and_sentences() -> None:
    env = environment()
    assert env.autoescape is not False
    text = render("index.html", page_title="<b>x</b>", masthead="", digests=[], models=[],
                  passes=[])
    assert "<title>&lt;b&gt;x&lt;/b&gt; · Plumbline</title>" in text
    assert attention_sentence([], model_count=3) == (
        "Nothing needs attention: no open findings across 3 models.")


@pytest.mark.parametrize("template", ["model.html", "pass.html", "digest.html", "index.html"])
def test_templates_ship_in_the_package(template: str) -> None:
    import monitor.notify

    folder = Path(monitor.notify.__file__).parent / "templates"
    assert (folder / template).exists()
    assert all(p.name.startswith("_") for p in folder.iterdir()
               if p.suffix in (".html", ".txt", ".css") and p.stem not in
               ("model", "pass", "digest", "index"))


def test_model_page_tables_are_capped_for_large_models(
    history: History, monkeypatch: pytest.MonkeyPatch
) -> None:
    """With more series than the cap, the tables keep the series with open findings first."""
    import monitor.notify.html as html_module

    monkeypatch.setattr(html_module, "TABLE_CAP", 2)
    with history.open() as store:
        (path,) = write_model_pages(store, history.config, models=["delivery_hours"])
        flagged = {f.series for f in store.open_findings(model="delivery_hours")}
    page = Page(path.read_text(encoding="utf-8"))
    assert "The tables on this page show 2 of the model's 3 series" in page.text
    assert "plumbline audit --model delivery_hours --format csv" in page.text
    tables = page.find("table")
    for table in tables:
        rows = [e for e in page.elements if e.tag == "tr" and e.within(table)
                and not any(t == "thead" for t, _ in e.ancestors)]
        if "interval of the hit rate" in text_of(table) or "open findings" in text_of(table):
            assert len(rows) == 2
            names = {text_of(cell) for row in rows for cell in page.elements
                     if cell.tag == "td" and cell.within(row)}
            assert flagged <= names  # South and the script-named depot, not North


_RENDER_INDEX = (
    "import sys\n"
    "from monitor.notify.html import environment, render\n"
    "env = environment()\n"
    "print(type(env.bytecode_cache).__name__, env.bytecode_cache.directory)\n"
    "sys.stdout.write(render('index.html', page_title='<b>x</b>', masthead='', digests=[],"
    " models=[], passes=[]))\n"
)


def _fresh_process(temp: Path) -> tuple[str, str]:
    """(cache line, page) from a new interpreter whose temp directory is ``temp``."""
    root = Path(__file__).resolve().parents[2]
    result = subprocess.run([sys.executable, "-c", _RENDER_INDEX], capture_output=True,
                            text=True, check=True, cwd=root,
                            env={**os.environ, "PYTHONPATH": str(root), "TMPDIR": str(temp)})
    first, _, page = result.stdout.partition("\n")
    return first, page


def test_compiled_templates_are_kept_between_processes(tmp_path: Path) -> None:
    """A one-shot pass reads the compiled templates a previous process wrote (jinja2's
    per-user folder in the temp directory) and renders the same page from them."""
    line, cold = _fresh_process(tmp_path)
    kind, folder = line.split(" ", 1)
    assert kind == "TemplateCache" and Path(folder).parent == tmp_path
    written = sorted(Path(folder).glob("plumbline-*.cache"))
    assert {p.stat().st_size > 0 for p in written} == {True}
    assert len(written) >= 2  # index.html and the layout it extends
    stamps = [p.stat().st_mtime_ns for p in written]
    _, warm = _fresh_process(tmp_path)
    assert warm == cold and "&lt;b&gt;x&lt;/b&gt;" in warm
    assert [p.stat().st_mtime_ns for p in written] == stamps  # read, not written again


def test_a_cache_that_cannot_be_written_is_no_failure(tmp_path: Path) -> None:
    cache = template_cache(str(tmp_path / "missing"))  # dumps fail: the folder does not exist
    assert cache is not None
    env = jinja2.Environment(loader=jinja2.DictLoader({"t.html": "{{ x }}!"}),
                             bytecode_cache=cache, autoescape=True)
    assert env.get_template("t.html").render(x="<a>") == "&lt;a&gt;!"


def test_cache_names_change_with_the_settings() -> None:
    one = template_cache(tempfile.gettempdir())
    assert one is not None
    html._SETTINGS["trim_blocks"] = False
    try:
        other = template_cache(tempfile.gettempdir())
    finally:
        html._SETTINGS["trim_blocks"] = True
    assert other is not None and one.pattern != other.pattern
