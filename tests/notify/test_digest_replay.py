"""The digest of the replayed demo scenario (issue 5): it mentions every finding kind the scenario
plants, on the right model or feed, and its coverage figures equal ``plumbline audit --format
json --last 13`` and ``--last 52`` for the same database."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from test_html import Page

from monitor.audit import summarise_coverage
from monitor.cli import main
from monitor.demo import planted_changes
from monitor.demo.replay import ReplayResult, replay_scenario
from monitor.notify import build_digest, write_digest
from monitor.store import Store


@pytest.fixture(scope="module")
def replayed(tmp_path_factory: pytest.TempPathFactory) -> ReplayResult:
    return replay_scenario(tmp_path_factory.mktemp("demo"))


def test_the_digest_names_every_planted_kind(replayed: ReplayResult) -> None:
    with Store.open(replayed.config.database) as store:
        path = write_digest(store, replayed.config, record=False)
    page = Page(path.read_text(encoding="utf-8"))
    items = [e for e in page.elements if "data-kind" in e.attrs]
    found = {(e.attrs["data-kind"], scope) for e in items
             for scope in [" ".join("".join(e.text).split())]}
    for change in planted_changes():
        record = change.as_record()
        places = [p for p in (change.model, change.feed and f"feed {change.feed}") if p]
        assert any(kind in record["accepted_kinds"] and any(p in scope for p in places)
                   for kind, scope in found), (record["accepted_kinds"], places)


def test_replayed_digest_coverage_equals_the_audit_command(
    replayed: ReplayResult, capsys: pytest.CaptureFixture[str]
) -> None:
    config = str(Path(replayed.root) / "plumbline.yaml")
    audits = {}
    for last in (13, 52):
        assert main(["audit", "-c", config, "--format", "json", "--last", str(last)]) == 0
        audits[last] = json.loads(capsys.readouterr().out)
    with Store.open(replayed.config.database, readonly=True) as store:
        digest = build_digest(store, replayed.config)
    assert [c.model for c in digest.coverage] == list(replayed.config.models)
    for item in digest.coverage:
        for last, summary, flagged in ((13, item.last13, item.flagged13),
                                       (52, item.last52, item.flagged52)):
            records = [r for r in audits[last] if r["model"] == item.model]
            assert summary == summarise_coverage(records)
            for record in flagged:
                assert record in records
