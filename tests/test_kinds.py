"""Each finding kind is declared once (``monitor.vocabulary.FindingKind``) and every layer reads
that declaration: its words, severity, cross-series family and rebaseline behaviour."""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, datetime

import numpy as np

from monitor.commands.rebaseline import BASELINE_KINDS
from monitor.findings import reject
from monitor.notify.words import KIND_WORDS, finding_headline, statistic_text
from monitor.store import FindingRecord
from monitor.vocabulary import EvidenceFamily, FindingKind, FindingState, KindDeclaration, Severity


class _Thresholds:
    significance = 0.05
    fdr = 0.10
    min_scored = 12
    min_r2 = None
    max_r2_drop = 0.2
    clear_after = 2


def test_every_kind_has_one_complete_declaration() -> None:
    words = set()
    for kind in FindingKind:
        declared = kind.declaration
        assert isinstance(declared, KindDeclaration)
        assert declared.words and declared.words not in words, kind
        words.add(declared.words)
        assert declared.severity in Severity
        if declared.raised_to is not None:
            assert declared.raised_to.rank > declared.severity.rank
            assert declared.raised_when
        # a feed-level kind compares with no baseline
        assert not (declared.scope == "feed" and declared.rebaseline), kind


def test_reports_and_rebaseline_read_the_declaration() -> None:
    assert {kind: kind.declaration.words for kind in FindingKind} == KIND_WORDS
    assert set(BASELINE_KINDS) == {k for k in FindingKind if k.declaration.rebaseline}
    assert FindingKind.STRUCTURAL_BREAK in BASELINE_KINDS
    assert FindingKind.COVERAGE not in BASELINE_KINDS


def test_statistic_words_follow_the_template() -> None:
    assert statistic_text(FindingKind.COVERAGE, 0.8123, 0.0012) == (
        "hit rate 81 %; cumulative-sum test of the errors' size, p 0.0012")
    assert statistic_text(FindingKind.SLOPE_SHIFT, -3.456, None) == (
        "slope differs by 3.46 combined standard errors between the periods compared")
    assert statistic_text(FindingKind.REJECTED_INPUT, 0.0, None) == "the whole file"
    assert statistic_text(FindingKind.REJECTED_INPUT, 3.0, None) == "3 rows rejected"
    assert statistic_text(FindingKind.NOT_ESTIMABLE, None, None).startswith("no statistic:")
    assert statistic_text(FindingKind.WEAK_FIT, None, None) == "no statistic recorded"
    for kind in FindingKind:  # every template formats
        assert statistic_text(kind, 1.5, 0.01)


def test_reject_follows_the_family() -> None:
    # Benjamini & Hochberg (1995), step-up at q = 0.10 over m = 4: thresholds 0.025, 0.05,
    # 0.075, 0.10. p = 0.04 alone is significant at 0.05 but not kept by BH with these four.
    p = np.array([0.04, 0.30, 0.50, 0.90])
    controlled = [k for k in FindingKind if k.declaration.family.controlled]
    own = [k for k in FindingKind if k.declaration.family is EvidenceFamily.OWN_LEVEL]
    assert controlled and own
    for kind in controlled:
        assert not reject(kind, p, _Thresholds()).any()
    for kind in own:
        assert reject(kind, p, _Thresholds()).tolist() == [True, False, False, False]
    # NaN is not tested and never rejects
    assert not reject(controlled[0], np.array([np.nan, 0.001]), _Thresholds())[0]



def test_every_headline_says_what_happened_with_or_without_a_date() -> None:
    """A headline is words, not a bare date; a finding with no date drops the words about it
    instead of printing a filler."""
    for kind in FindingKind:
        template = kind.declaration.headline
        assert len(template.replace("{since}", "").split()) >= 2, kind
        record = FindingRecord(
            id=1, model="m", series=None, feed="f", kind=kind, severity=Severity.NOTICE,
            state=FindingState.NEW, since_period=None, statistic=None, p_value=None,
            message="", action="", first_pass_id=1, last_pass_id=1, false_streak=0,
            created_at=datetime(2026, 1, 1, tzinfo=UTC), updated_at=datetime(2026, 1, 1,
                                                                             tzinfo=UTC),
            acknowledged_at=None, cleared_at=None, cleared_pass_id=None)
        undated = finding_headline(record)
        assert "None" not in undated and "undated" not in undated and "()" not in undated
        assert not undated.rstrip().endswith((",", "since", "from", "around")), undated
        dated = finding_headline(replace(record, since_period="2026-01-04"))
        assert "2026-01-04" in dated or "{since}" not in template
