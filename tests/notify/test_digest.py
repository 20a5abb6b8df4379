"""The digest: its content (changes since the last digest, coverage equal to the audit, coming
forecasts, the caution), its page, text and e-mail forms, and ``plumbline digest``."""

from __future__ import annotations

import json
import re
from email import message_from_bytes, policy
from pathlib import Path

import pytest
from report_history import (
    CONFIG_TEXT,
    DIGEST_WEEK,
    SCRIPT_SERIES,
    History,
    as_of,
    build_history,
    copy_history,
)
from test_html import Page, _assert_safe, text_of

from monitor.audit import audit_models, summarise_coverage
from monitor.cli import main
from monitor.commands.digest import send_scheduled_digest
from monitor.notify import build_digest, digest_message, render_digest_text, write_digest
from monitor.notify.digest import EMAIL_CHART_CAP, render_digest_html
from monitor.notify.mail import compose_digest
from monitor.store import Store


@pytest.fixture(scope="module")
def built_history(tmp_path_factory: pytest.TempPathFactory) -> History:
    return build_history(tmp_path_factory.mktemp("history"))


@pytest.fixture
def history(built_history: History, tmp_path: Path) -> History:
    return copy_history(built_history, tmp_path / "workspace")


def test_digest_coverage_equals_the_audit(history: History,
                                          capsys: pytest.CaptureFixture[str]) -> None:
    with history.open() as store:
        digest = build_digest(store, history.config)
        audits = {last: audit_models(store, history.config, last=last) for last in (13, 52)}
    # The same records as the command prints.
    for last in (13, 52):
        assert main(["audit", "-c", str(history.root / "plumbline.yaml"), "--format", "json",
                     "--last", str(last)]) == 0
        assert json.loads(capsys.readouterr().out) == audits[last]
    assert [c.model for c in digest.coverage] == ["pick_hours", "delivery_hours"]
    for item in digest.coverage:
        for last, summary, flagged in ((13, item.last13, item.flagged13),
                                       (52, item.last52, item.flagged52)):
            records = [r for r in audits[last] if r["model"] == item.model]
            assert summary == summarise_coverage(records)
            open_series = {f.series for f in digest.open_findings if f.model == item.model}
            assert {r["series"] for r in flagged} == open_series & {r["series"] for r in records}
            assert open_series  # each model has a flagged series in this history
            for record in flagged:
                assert record in records  # listed per series exactly as audited
    html, _ = render_digest_html(digest)
    page = Page(html)
    for item in digest.coverage:
        assert item.last13 is not None and item.last52 is not None
        for summary in (item.last13, item.last52):
            assert (f"{summary['hits']} of {summary['scored']} actuals inside their "
                    f"{summary['nominal'] * 100:g} % prediction intervals") in page.text
            assert f"hit rate {summary['hit_rate'] * 100:.1f} %" in page.text
    south = next(r for r in audits[52] if r["series"] == "South")
    assert f"{south['hit_rate'] * 100:.1f} %" in page.text


def test_digest_changes_since_the_last_digest(history: History) -> None:
    with history.open() as store:
        digest = build_digest(store, history.config)
        open_now = store.open_findings()
        every = store.list_findings()
    assert digest.period_end == as_of(59)
    assert digest.previous_period_end == as_of(DIGEST_WEEK)
    window = set(range(DIGEST_WEEK + 2, 61))  # pass ids after the one recorded with the digest
    assert {f.id for f in digest.new_findings} == {
        f.id for f in open_now if f.first_pass_id in window}
    assert {f.id for f in digest.cleared_findings} == {
        f.id for f in every if f.cleared_pass_id in window}
    assert digest.new_findings and digest.cleared_findings
    assert [(v.model, v.version) for v in digest.versions] == [("pick_hours", 2)]
    assert "predictors changed" in digest.versions[0].what
    assert digest.open_total == len(open_now)
    ranks = [f.rank for f in digest.open_findings]
    assert ranks == sorted(ranks, reverse=True)
    assert digest.sentence.startswith(
        f"{len(open_now)} open findings need attention (1 critical, 1 warning and 2 notices); "
        "most urgent: South (delivery_hours): the relationship changed around ")
    assert digest.sentence.endswith(
        "(critical). Since the last digest (2025-01-06 08:00 Europe/Berlin): 1 newly raised and "
        "still open, 1 no longer seen.")


def test_digest_forecasts_for_the_coming_period(history: History) -> None:
    with history.open() as store:
        digest = build_digest(store, history.config)
        latest = store.list_forecasts(pass_id=history.pass_ids[-1])
    assert {(f.model, f.series, f.period) for f in digest.forecasts} == {
        (f.model, "whole model" if f.series is None else f.series, f.target_period)
        for f in latest}
    assert {f.period for f in digest.forecasts} == {"2025-03-02"}
    # Flagged series first within a model.
    depots = [f.series for f in digest.forecasts if f.model == "delivery_hours"]
    assert depots[-1] == "North"


def test_digest_page_and_text(history: History) -> None:
    with history.open() as store:
        path = write_digest(store, history.config)
        recorded = store.latest_digest()
        again = build_digest(store, history.config)
    assert path.name == "digest-2025-02-24.html"
    assert recorded is not None and recorded.period_end == as_of(59)
    assert recorded.path == str(path)
    # Re-rendering the recorded digest still reports what changed since the one before.
    assert again.previous_period_end == as_of(DIGEST_WEEK)
    raw = path.read_text(encoding="utf-8")
    page = Page(raw)
    _assert_safe(page, raw)
    assert text_of(page.find("p", "lede")[0]) == again.sentence
    headings = [text_of(h) for h in page.find("h2")]
    assert headings[0] == "What needs attention"
    assert headings[1].startswith("What changed since the last digest")
    assert headings[2:] == ["Coverage against nominal", "Forecasts for the coming periods"]
    assert "A finding is a statistical signal, not proof" in page.text
    assert "Decisions stay with the model's owner." in page.text
    assert SCRIPT_SERIES in page.text
    figures = page.find("figure", "chart")
    assert figures and len(page.find("svg", "chart-svg")) == len(figures)
    for name in ("index.html", "model-pick_hours.html", "model-delivery_hours.html"):
        assert (path.parent / name).exists()  # the digest's links lead somewhere
    text = render_digest_text(again)
    assert text.startswith("PLUMBLINE DIGEST FOR THE PERIOD ENDING 2025-02-24")
    assert "<" + "span" not in text and "&lt;" not in text and "&#39;" not in text
    assert SCRIPT_SERIES in text  # plain text is not escaped: it is not HTML
    # each finding leads with what and where (the wording changed with issue 10)
    flat = " ".join(text.split())
    assert "▲ critical: South (delivery_hours): the relationship changed around " in flat, text
    assert "Structural break, finding " in flat
    assert "A finding is a statistical signal, not proof" in text


def test_digest_email_form(history: History) -> None:
    with history.open() as store:
        digest = build_digest(store, history.config)
    content = digest_message(digest)
    assert content.subject == "Plumbline digest of 2025-02-24: 4 open findings, 1 new"
    page = Page(content.html)
    assert not page.find("svg", "chart-svg")
    cids = [e.attrs["src"][4:] for e in page.find("img") if e.attrs["src"].startswith("cid:")]
    assert cids and sorted(cids) == sorted(i.cid for i in content.images)
    assert len(content.images) <= EMAIL_CHART_CAP
    assert all(re.fullmatch(r"[a-z0-9-]+@plumbline", cid) for cid in cids)
    assert not any(e.tag == "a" and e.attrs.get("href", "").endswith(".html")
                   for e in page.elements)  # no links to local files in a message
    email = history.config.notify.email
    assert email is not None
    composed = compose_digest(email, content, period_end=digest.period_end,
                              created_at=as_of(59))
    message = message_from_bytes(composed.body, policy=policy.default)
    assert message.get_content_type() == "multipart/alternative"
    kinds = [part.get_content_type() for part in message.walk()]
    assert "text/plain" in kinds and "text/html" in kinds
    assert kinds.count("image/png") == len(content.images)


def _config_variant(history: History, email: str | None) -> Path:
    text = CONFIG_TEXT.split("notify:")[0] + "notify:\n  html_dir: reports\n"
    if email is not None:
        text += email
    path = history.root / "variant.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def test_cli_digest_writes_and_records(history: History,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    config = str(history.root / "plumbline.yaml")
    assert main(["digest", "-c", config]) == 0
    out = capsys.readouterr().out.strip().splitlines()
    assert out == [str(history.root / "reports" / "digest-2025-02-24.html")]
    with Store.open(history.database, readonly=True) as store:
        recorded = store.latest_digest()
    assert recorded is not None and recorded.period_end == as_of(59)


def test_cli_digest_dry_run_writes_eml_and_changes_nothing(
    history: History, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_dir = tmp_path / "out"
    assert main(["digest", "-c", str(history.root / "plumbline.yaml"), "--dry-run",
                 "--out", str(out_dir)]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert lines[0] == str(out_dir / "digest-2025-02-24.html")
    eml = Path(lines[1])
    assert eml.parent == out_dir and eml.suffix == ".eml"
    message = message_from_bytes(eml.read_bytes(), policy=policy.default)
    assert message["To"] == "planning@example.org"
    with Store.open(history.database, readonly=True) as store:
        assert store.latest_digest().period_end == as_of(DIGEST_WEEK)  # type: ignore[union-attr]
        assert store.unsent_messages() == []
        assert store.table_counts()["outbox"] == 0


def test_cli_digest_send_delivers_once(history: History, smtp_server: object,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    port = smtp_server.port  # type: ignore[attr-defined]
    config = _config_variant(history, (
        "  email:\n    to: [planning@example.org]\n    sender: plumbline@example.org\n"
        f"    smtp_host: 127.0.0.1\n    smtp_port: {port}\n    timeout: 5s\n"))
    assert main(["digest", "-c", str(config), "--send"]) == 0
    assert "sent 1 message(s)" in capsys.readouterr().out
    received = smtp_server.received  # type: ignore[attr-defined]
    assert len(received) == 1 and received[0].rcpt_tos == ("planning@example.org",)
    mail = message_from_bytes(received[0].data, policy=policy.default)
    assert mail["Subject"].strip().startswith("Plumbline digest of 2025-02-24")
    assert main(["digest", "-c", str(config), "--send"]) == 0
    out = capsys.readouterr().out
    assert "queued before" in out and "sent 0 message(s)" in out
    assert len(received) == 1  # never twice


def test_cli_digest_exit_codes(history: History, tmp_path: Path,
                               capsys: pytest.CaptureFixture[str]) -> None:
    config = _config_variant(history, None)
    assert main(["digest", "-c", str(config), "--send"]) == 2
    assert "--send needs notify.email" in capsys.readouterr().err
    # --dry-run needs no SMTP settings: the message is written, to placeholder addresses
    out_dir = tmp_path / "preview"
    assert main(["digest", "-c", str(config), "--dry-run", "--out", str(out_dir)]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    (eml,) = out_dir.glob("*.eml")
    assert lines[1] == str(eml) and "nothing was sent" in lines[2]
    message = message_from_bytes(eml.read_bytes(), policy=policy.default)
    assert message["To"].endswith("@example.invalid")
    assert message["Subject"].strip().startswith("Plumbline digest of 2025-02-24")
    fresh = tmp_path / "fresh"
    fresh.mkdir()
    (fresh / "plumbline.yaml").write_text(CONFIG_TEXT, encoding="utf-8")
    assert main(["digest", "-c", str(fresh / "plumbline.yaml")]) == 2
    assert "no database at" in capsys.readouterr().err
    assert send_scheduled_digest(history.config.model_copy(
        update={"database": fresh / "state" / "none.sqlite"})) is None
    Store.open(fresh / "state" / "plumbline.sqlite").close()
    assert main(["digest", "-c", str(fresh / "plumbline.yaml")]) == 2
    assert "no pass has run yet" in capsys.readouterr().err


def test_scheduled_digest(history: History, smtp_server: object) -> None:
    port = smtp_server.port  # type: ignore[attr-defined]
    config = _config_variant(history, (
        "  email:\n    to: [planning@example.org]\n    sender: plumbline@example.org\n"
        f"    smtp_host: 127.0.0.1\n    smtp_port: {port}\n    timeout: 5s\n"))
    from monitor.config import load_config

    done = send_scheduled_digest(load_config(config))
    assert done is not None
    assert done["sent"] == 1 and done["newly_queued"] is True
    assert Path(done["digest"]).exists()
    assert len(smtp_server.received) == 1  # type: ignore[attr-defined]
