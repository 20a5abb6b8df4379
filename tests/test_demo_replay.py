"""The demo replayed end to end: every planted change is found, the healthy models stay quiet,
the digest renders, ``plumbline status`` lists what was found (DESIGN.md section 10), and every
page, printout and e-mail the demo produces speaks Plumbline's own words (``tests/_looks.py``).

The planted changes are the oracle (``monitor.demo.planted_changes``): for each, a finding of
an accepted kind on the right model and series (or feed), raised by a pass between the first
week that could show it and its detection deadline, whose stated period lies within the
planted week's tolerance.
"""

from __future__ import annotations

import csv
import io
import json
import re
import sqlite3
from datetime import date, datetime
from pathlib import Path

import pytest
from _looks import assert_no_borrowed_looks, assert_own_words, page_words

from monitor.cli import main
from monitor.commands.demo import findings_summary, render_digest
from monitor.demo import healthy_series, planted_changes
from monitor.demo.replay import ReplayResult, replay_scenario
from monitor.notify import render_pass_report
from monitor.notify.digest import build_digest, digest_message, render_digest_text
from monitor.store import FindingRecord, Store


@pytest.fixture(scope="module")
def replayed(tmp_path_factory: pytest.TempPathFactory) -> ReplayResult:
    return replay_scenario(tmp_path_factory.mktemp("demo"))


@pytest.fixture(scope="module")
def findings(replayed: ReplayResult) -> list[FindingRecord]:
    with Store.open(replayed.config.database, readonly=True) as store:
        return store.list_findings(state="all")


def _pass_clock(replayed: ReplayResult, pass_id: int) -> str:
    with Store.open(replayed.config.database, readonly=True) as store:
        record = store.get_pass(pass_id)
    assert record is not None
    return record.as_of.isoformat()


@pytest.mark.parametrize("change", planted_changes(), ids=lambda c: f"{c.kind.value}-{c.model}")
def test_every_planted_change_is_found_in_time(
    change, replayed: ReplayResult, findings: list[FindingRecord]
) -> None:
    record = change.as_record()
    feed_level = change.kind.value == "stale_feed"
    candidates = [
        f for f in findings
        if f.kind.value in record["accepted_kinds"]
        and (f.feed == change.feed if feed_level else
             (f.model == change.model and f.series == change.series))
    ]
    assert candidates, f"no {record['accepted_kinds']} finding for {change.model}/{change.series}"
    in_time = [
        f for f in candidates
        if datetime.fromisoformat(record["earliest_pass"])
        <= _pass_moment(replayed, f.first_pass_id)
        <= datetime.fromisoformat(record["latest_pass"])
    ]
    assert in_time, (
        f"{change.kind.value} on {change.model}/{change.series} raised only at "
        f"{[_pass_clock(replayed, f.first_pass_id) for f in candidates]}, expected between "
        f"{record['earliest_pass']} and {record['latest_pass']}"
    )
    tolerance = change.period_tolerance_weeks
    if tolerance is not None:
        planted = change.week
        near = [
            f for f in in_time
            if f.since_period is not None
            and abs((date.fromisoformat(f.since_period) - planted).days)
            <= tolerance * 7
        ]
        assert near, (
            f"stated periods {[f.since_period for f in in_time]} are not within {tolerance} "
            f"week(s) of the planted week {planted}"
        )


def _pass_moment(replayed: ReplayResult, pass_id: int) -> datetime:
    with Store.open(replayed.config.database, readonly=True) as store:
        record = store.get_pass(pass_id)
    assert record is not None
    return record.as_of


def test_healthy_models_raise_no_relationship_finding(findings: list[FindingRecord]) -> None:
    for healthy in healthy_series():
        if not healthy.strict:
            continue
        wrong = [
            (f.kind.value, f.since_period) for f in findings
            if f.model == healthy.model and f.series == healthy.series
            and f.kind in healthy.absent_kinds
        ]
        assert wrong == [], f"{healthy.model} is healthy but raised {wrong}"


def test_the_quiet_feed_is_the_only_stale_one(findings: list[FindingRecord]) -> None:
    stale = {f.feed for f in findings if f.kind.value == "stale_feed"}
    quiet = {c.feed for c in planted_changes() if c.kind.value == "stale_feed"}
    assert stale == quiet


def test_the_digest_renders_and_status_lists_the_findings(
    replayed: ReplayResult, findings: list[FindingRecord], capsys: pytest.CaptureFixture[str]
) -> None:
    digest = render_digest(replayed.config)
    text = Path(digest).read_text(encoding="utf-8")
    for change in planted_changes():
        assert change.model in text or change.feed in text
    capsys.readouterr()
    assert main(["status", "--all", "--format", "json",
                 "-c", str(replayed.root / "plumbline.yaml")]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert {f["id"] for f in listed["findings"]} == {f.id for f in findings}
    for change in planted_changes():
        assert any(
            f["kind"] in change.as_record()["accepted_kinds"]
            and (f["model"] == change.model or f["feed"] == change.feed)
            for f in listed["findings"]
        )


def test_forecasts_answer_each_plan_row_once(replayed: ReplayResult) -> None:
    with Store.open(replayed.config.database, readonly=True) as store:
        forecasts = store.list_forecasts()
    keys = [(f.model, f.series, f.target_period) for f in forecasts]
    assert len(keys) == len(set(keys))
    # weekly plans: each forecast targets the week after the latest actual (lead 1)
    assert {f.lead for f in forecasts} == {1}


# --------------------------------------------------------------------------- forecasts out


def test_forecasts_csv_lists_exactly_the_forecasts_in_the_database(
    replayed: ReplayResult, capsys: pytest.CaptureFixture[str]
) -> None:
    # Counted straight from the SQLite file, not through the store's own query.
    with sqlite3.connect(f"file:{replayed.config.database}?mode=ro", uri=True) as conn:
        expected = dict(conn.execute(
            "SELECT f.id, o.actual FROM forecasts AS f LEFT JOIN outcomes AS o "
            "ON o.forecast_id = f.id").fetchall())
    assert len(expected) > 1000
    capsys.readouterr()
    assert main(["forecasts", "--format", "csv",
                 "-c", str(replayed.root / "plumbline.yaml")]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert len(rows) == len(expected)
    assert {int(r["forecast_id"]) for r in rows} == set(expected)
    for row in rows:
        actual = expected[int(row["forecast_id"])]
        assert (row["actual"] == "") == (actual is None)
        assert row["outcome"] in ({""} if actual is None else {"hit", "miss_high", "miss_low"})
        if actual is not None:
            assert float(row["actual"]) == actual
        assert float(row["lower"]) <= float(row["point"]) <= float(row["upper"])


def test_export_folder_holds_one_file_per_pass_and_model_equal_to_the_command(
    replayed: ReplayResult, capsys: pytest.CaptureFixture[str]
) -> None:
    config = replayed.config
    capsys.readouterr()
    assert main(["forecasts", "--format", "csv", "-c", str(replayed.root / "plumbline.yaml")]) == 0
    listed = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    by_file: dict[tuple[str, int], list[dict[str, str]]] = {}
    for row in listed:
        by_file.setdefault((row["model"], int(row["pass_id"])), []).append(row)
    exported: dict[tuple[str, int], list[dict[str, str]]] = {}
    for path in sorted(config.export.folder.rglob("*")):
        if path.is_dir():
            continue
        assert not path.name.startswith("."), f"temporary file left behind: {path}"
        match = re.fullmatch(r"pass-(\d{6})\.csv", path.name)
        assert match, path.name
        with path.open(encoding="utf-8", newline="") as handle:
            exported[(path.parent.name, int(match.group(1)))] = list(csv.DictReader(handle))
    assert set(exported) == set(by_file)
    for key, rows in exported.items():
        assert rows, f"{key}: an empty export file"
        columns = list(rows[0])
        assert columns == list(by_file[key][0])[: len(columns)]
        assert list(by_file[key][0])[len(columns):] == ["actual", "outcome", "calibrated_outcome"]
        assert rows == [{c: r[c] for c in columns} for r in by_file[key]]
    # the passes' own records name the files they wrote
    written = {Path(p) for report in replayed.passes for p in
               (str(e.path) for e in report.exports)}
    assert written == {config.export.model_folder(m) / f"pass-{p:06d}.csv" for m, p in exported}


def test_the_demo_index_links_the_pass_pages_it_wrote(replayed: ReplayResult) -> None:
    from monitor.commands.demo import DEMO_PASS_PAGES, render_pass_pages

    pages = render_pass_pages(replayed.config)
    render_digest(replayed.config)  # writes the index too
    assert 1 < len(pages) <= DEMO_PASS_PAGES
    folder = replayed.config.notify.html_dir
    index = (folder / "index.html").read_text(encoding="utf-8")
    linked = set(re.findall(r'href="(pass-\d+\.html)"', index))
    assert linked == {page.name for page in pages}
    for page in pages:
        assert page.is_file()
        assert page.stem.split("-")[1] in page.read_text(encoding="utf-8")


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> str:
    capsys.readouterr()
    assert main(list(argv)) == 0, argv
    return capsys.readouterr().out


def test_every_page_printout_and_email_speaks_its_own_words(
    replayed: ReplayResult, findings: list[FindingRecord], capsys: pytest.CaptureFixture[str],
    tmp_path: Path,
) -> None:
    config, yaml = replayed.config, str(replayed.root / "plumbline.yaml")
    outputs: dict[str, tuple[str, str | None]] = {}  # name -> (text, markup)
    # An owner's note on the most urgent open finding, so the pages show one.
    urgent = next(f for f in findings if f.state.value != "cleared"
                  and f.severity.value == "critical")
    outputs["note"] = (_run(capsys, "note", str(urgent.id), "Roadworks; expected", "--by", "ana",
                            "-c", yaml), None)
    outputs["note again"] = (_run(capsys, "note", str(urgent.id), "Checked again", "-c", yaml),
                             None)
    outputs["note history"] = (_run(capsys, "note", str(urgent.id), "--history", "-c", yaml),
                               None)
    # Pages: the digest, the index and every model page.
    render_digest(config)
    for page in sorted((replayed.root / "reports").glob("*.html")):
        raw = page.read_text(encoding="utf-8")
        outputs[page.name] = (page_words(raw), raw)
    # The digest's text and e-mail forms, and a pass's page and owners' messages.
    with Store.open(config.database) as store:
        digest = build_digest(store, config)
        outputs["digest.txt"] = (render_digest_text(digest), None)
        mail = digest_message(digest)
        outputs["digest e-mail"] = (mail.subject + "\n" + mail.text + "\n" + page_words(mail.html),
                                    mail.html)
        busiest = max({f.first_pass_id for f in findings},
                      key=lambda p: sum(f.first_pass_id == p for f in findings))
        report = render_pass_report(store, config, busiest, out_dir=tmp_path, write_models=False)
    raw = report.path.read_text(encoding="utf-8")
    outputs["pass page"] = (page_words(raw), raw)
    assert report.messages, "the busiest pass has owners to tell"
    for message in report.messages:
        content = message.content
        outputs[f"pass e-mail to {message.recipient}"] = (
            content.subject + "\n" + content.text + "\n" + page_words(content.html), content.html)
    # Printouts: status, the audit, the demo's closing list, fit and breaks on the examples.
    outputs["status"] = (_run(capsys, "status", "--all", "-c", yaml), None)
    outputs["audit"] = (_run(capsys, "audit", "--last", "13", "-c", yaml), None)
    outputs["demo list"] = ("\n".join(findings_summary(findings)), None)
    examples = Path(__file__).resolve().parent.parent / "config"
    outputs["fit"] = (_run(capsys, "fit", str(examples / "example_pick_hours.csv"), "--response",
                           "pick_hours", "--predictors", "order_lines", "pallets"), None)
    outputs["breaks"] = (_run(capsys, "breaks", str(examples / "example_receiving_hours.csv"),
                              "--response", "receiving_hours", "--predictors", "inbound_pallets",
                              "--period", "week_ending"), None)
    # What they say instead: the what and where of a finding, its state, the note, the misses.
    status = outputs["status"][0]
    assert "depot-11 (delivery_hours): the relationship changed around 2026-01-25" in status
    assert "still open" in status and "no longer seen" in status
    assert "ana: Roadworks; expected" in outputs["note history"][0]
    digest_page = " ".join(outputs["digest-2027-05-24.html"][0].split())
    assert ": Checked again (latest of 2)" in digest_page  # the latest note, on the page
    assert "already had a note" in outputs["note again"][0]
    assert "misses far more than expected" in " ".join(outputs["model-fuel_litres.html"][0].split())
    assert "the periods monitoring started from" in status
    assert "most urgent without a note" in digest.sentence
    for name, (text, markup) in outputs.items():
        assert text.strip(), name
        try:
            assert_own_words(text, markup=markup)
        except AssertionError as error:
            raise AssertionError(f"{name}: {error}") from None
    for text, _ in outputs.values():
        assert_no_borrowed_looks(text)  # last: it skips where ../shared is absent


def test_the_digests_counts_agree_with_its_lists(
    replayed: ReplayResult, tmp_path: Path
) -> None:
    """With a previous digest recorded twenty passes before the end, the digest's counts of
    findings raised and no longer seen equal its lists and the database's own rows (counted
    here with SQL), and every finding raised since is listed and marked."""
    database = tmp_path / "copy.sqlite"
    with sqlite3.connect(f"file:{replayed.config.database}?mode=ro", uri=True) as source, \
            sqlite3.connect(database) as target:
        source.backup(target)
    passes = [p for p in replayed.passes if p.pass_id is not None]
    since = passes[-21]
    assert since.pass_id is not None
    with sqlite3.connect(database) as conn:
        window = [i for (i,) in conn.execute("SELECT id FROM passes WHERE id > ?",
                                             (since.pass_id,))]
        marks = ",".join("?" * len(window))
        raised_open = conn.execute(
            f"SELECT count(*) FROM findings WHERE first_pass_id IN ({marks}) "
            "AND state <> 'cleared'", window).fetchone()[0]
        raised_cleared = conn.execute(
            f"SELECT count(*) FROM findings WHERE first_pass_id IN ({marks}) "
            "AND state = 'cleared'", window).fetchone()[0]
        cleared = conn.execute(
            f"SELECT count(*) FROM findings WHERE cleared_pass_id IN ({marks})",
            window).fetchone()[0]
    assert raised_open and cleared, "a window with nothing raised or cleared proves nothing"
    with Store.open(database) as store:
        store.record_digest(period_end=since.as_of, created_at=since.as_of)
        digest = build_digest(store, replayed.config)
    assert len(digest.new_findings) == raised_open
    assert [v.id for v in digest.open_findings if v.is_new] == [v.id for v in
                                                                digest.new_findings]
    assert digest.raised_then_cleared == raised_cleared
    assert len(digest.cleared_findings) == cleared
    assert sum(g.count for g in digest.cleared_groups) == cleared
    assert f"{raised_open} newly raised and still open, {cleared} no longer seen." in (
        digest.sentence)
    text = " ".join(render_digest_text(digest).split())
    assert f"{raised_open} raised and still open (listed above, marked newly raised)" in text
    if raised_cleared:
        assert f"{raised_cleared} raised and already no longer seen" in text
    assert f"{cleared} no longer seen." in text


def test_every_finding_names_the_pass_its_figures_came_from(replayed: ReplayResult) -> None:
    """Each finding on the pages and in the digest says which pass (and its date, in the
    config's time zone) last computed the figures behind it: read here straight from SQLite."""
    zone = replayed.config.zone
    with sqlite3.connect(f"file:{replayed.config.database}?mode=ro", uri=True) as conn:
        expected = {
            finding_id: f"pass {pass_id} on "
                        f"{datetime.fromisoformat(as_of).astimezone(zone):%Y-%m-%d}"
            for finding_id, pass_id, as_of in conn.execute(
                "SELECT f.id, f.last_pass_id, p.as_of FROM findings AS f "
                "JOIN passes AS p ON p.id = f.last_pass_id")
        }
    with Store.open(replayed.config.database, readonly=True) as store:
        digest = build_digest(store, replayed.config)
    assert digest.open_findings
    for view in digest.open_findings:
        assert view.checked == expected[view.id]
    text = " ".join(render_digest_text(digest).split())
    assert all(f"(checked by {expected[v.id]})" in text for v in digest.open_findings)


def test_a_findings_message_and_its_statistic_give_one_figure(
    findings: list[FindingRecord],
) -> None:
    """The number the message quotes and the one under "Behind it" are the same figure with the
    same precision (one rule per quantity, ``monitor.figures``), for the kinds that quote it."""
    from monitor.figures import statistic_number
    from monitor.notify.words import statistic_text
    from monitor.vocabulary import FindingKind

    quoting = {FindingKind.STRUCTURAL_BREAK, FindingKind.SLOPE_SHIFT, FindingKind.FORECAST_BIAS}
    checked = 0
    for finding in findings:
        if finding.kind not in quoting or finding.statistic is None:
            continue
        figure = statistic_number(abs(finding.statistic))
        assert re.search(rf"(?<![\d.]){re.escape(figure)}(?![\d])", finding.message), (
            figure, finding.message)
        assert figure in statistic_text(finding.kind, finding.statistic, finding.p_value)
        checked += 1
    assert checked >= 5
