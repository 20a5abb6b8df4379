"""The coverage audit over the database (``monitor.audit``) and ``plumbline audit``.

The database is the 60-week history of ``tests/notify/report_history.py``: real passes, fits,
forecasts and outcomes written through the Store API. Counts are checked against an independent
count of the scorings as the history made them; the hit-rate interval against scipy's exact
binomial interval; Kupiec's p-value against its formula written out here (Kupiec 1995); the
interval score against Gneiting & Raftery (2007, section 6.2) written out here.
"""

from __future__ import annotations

import csv
import io
import itertools
import json
import math
import sys
from collections import defaultdict
from pathlib import Path

import pytest
from _looks import assert_no_borrowed_looks
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parent / "notify"))

from report_history import CONFIG_TEXT, History, build_history, copy_history

from monitor.audit import AUDIT_COLUMNS, audit_models, summarise_coverage
from monitor.cli import main
from monitor.errors import UsageError
from monitor.notify.series import ModelHistories
from monitor.stats.coverage import audit_coverage
from monitor.store import Store


@pytest.fixture(scope="module")
def built_history(tmp_path_factory: pytest.TempPathFactory) -> History:
    return build_history(tmp_path_factory.mktemp("history"))


@pytest.fixture
def history(built_history: History, tmp_path: Path) -> History:
    return copy_history(built_history, tmp_path / "workspace")


def _independent_counts(
    log: list[tuple[str, str | None, str, float, float, float]], last: int | None = None
) -> dict[tuple[str, str | None], dict[str, object]]:
    """Hits and misses per (model, series) counted straight from the scorings."""
    rows: dict[tuple[str, str | None], list[tuple[float, float, float]]] = defaultdict(list)
    for model, series, _period, actual, lower, upper in log:
        rows[(model, series)].append((actual, lower, upper))
    counts = {}
    for key, items in rows.items():
        chosen = items[-last:] if last else items
        counts[key] = {
            "scored": len(chosen),
            "hits": sum(lo <= a <= hi for a, lo, hi in chosen),
            "misses_high": sum(a > hi for a, lo, hi in chosen),
            "misses_low": sum(a < lo for a, lo, hi in chosen),
            "rows": chosen,
        }
    return counts


def _kupiec_p(misses: int, scored: int, level: float) -> float:
    """Kupiec (1995) proportion-of-failures LR on χ²(1), with 0·log 0 = 0."""
    p = 1 - level

    def loglik(rate: float) -> float:
        total = 0.0
        if scored - misses:
            total += (scored - misses) * math.log(1 - rate)
        if misses:
            total += misses * math.log(rate)
        return total

    statistic = -2 * (loglik(p) - loglik(misses / scored))
    return float(stats.chi2.sf(max(statistic, 0.0), 1))


@pytest.mark.parametrize("last", [None, 13, 52])
def test_audit_counts_equal_an_independent_count(history: History, last: int | None) -> None:
    with history.open() as store:
        records = audit_models(store, history.config, last=last)
    expected = _independent_counts(history.scored_log, last)
    assert {(r["model"], r["series"]) for r in records} == set(expected)
    for record in records:
        want = expected[(record["model"], record["series"])]
        for key in ("scored", "hits", "misses_high", "misses_low"):
            assert record[key] == want[key], (record["model"], record["series"], key)
        assert list(record)[: len(AUDIT_COLUMNS)] == list(AUDIT_COLUMNS)
        if last is None:
            assert "window" not in record
        else:
            assert record["window"] == last
        nominal = history.config.models[record["model"]].level
        assert record["nominal"] == nominal
        # scipy's exact (Clopper–Pearson) interval, the named reference.
        ci = stats.binomtest(record["hits"], record["scored"]).proportion_ci(
            confidence_level=0.95, method="exact")
        assert record["hit_rate_lower"] == pytest.approx(ci.low, abs=1e-12)
        assert record["hit_rate_upper"] == pytest.approx(ci.high, abs=1e-12)
        misses = record["misses_high"] + record["misses_low"]
        assert record["kupiec_p_value"] == pytest.approx(
            _kupiec_p(misses, record["scored"], nominal), rel=1e-9)
        rows = want["rows"]
        alpha = 1 - nominal
        scores = [(hi - lo) + 2 / alpha * max(lo - a, 0) + 2 / alpha * max(a - hi, 0)
                  for a, lo, hi in rows]  # type: ignore[union-attr]
        assert record["interval_score"] == pytest.approx(sum(scores) / len(scores), rel=1e-12)
        assert record["mean_width"] == pytest.approx(
            sum(hi - lo for _a, lo, hi in rows) / len(rows), rel=1e-12)  # type: ignore[union-attr]
        # The same rows through the one-series audit of monitor.stats give the same record.
        single = audit_coverage([a for a, _, _ in rows], [lo for _, lo, _ in rows],  # type: ignore[union-attr]
                                [hi for _, _, hi in rows], nominal).as_record()  # type: ignore[union-attr]
        for key in ("independence_p_value", "christoffersen_p_value", "zone"):
            assert record[key] == single[key]


def test_the_planted_coverage_loss_shows(history: History) -> None:
    """pick_hours' errors triple from week 40: its 52-period hit rate is clearly below 95 %,
    while the stable depot North stays near its 90 % nominal."""
    with history.open() as store:
        records = {(r["model"], r["series"]): r
                   for r in audit_models(store, history.config, last=52)}
    assert records[("pick_hours", None)]["hit_rate"] < 0.9
    assert records[("pick_hours", None)]["zone"] in ("yellow", "red")
    assert records[("delivery_hours", "North")]["zone"] == "green"


def test_by_lead_and_model_filter(history: History) -> None:
    with history.open() as store:
        by_lead = audit_models(store, history.config, model="delivery_hours", by_lead=True)
        plain = audit_models(store, history.config, model="delivery_hours")
    assert {r["model"] for r in by_lead} == {"delivery_hours"}
    assert all(r["lead"] == 1 for r in by_lead)  # every forecast of the history has lead 1
    assert [r["series"] for r in by_lead] == [r["series"] for r in plain]
    assert [r["scored"] for r in by_lead] == [r["scored"] for r in plain]


def test_unknown_model_and_bad_last(history: History) -> None:
    with history.open() as store:
        with pytest.raises(UsageError, match="did you mean 'pick_hours'"):
            audit_models(store, history.config, model="pick_hour")
        with pytest.raises(ValueError, match="positive"):
            audit_models(store, history.config, last=0)


def test_scored_forecasts_read_once_give_the_same_records(history: History) -> None:
    # The pages hand audit_models the history they read once; every window's records must be
    # those of a fresh read.
    with history.open() as store:
        for name in history.config.models:
            scored = store.scored_forecasts(name)
            for last in (None, 1, 3, 13, 52):
                assert audit_models(store, history.config, model=name, last=last,
                                    scored=scored) == audit_models(
                    store, history.config, model=name, last=last), (name, last)
        with pytest.raises(ValueError, match="one model"):
            audit_models(store, history.config, scored=scored)
        with pytest.raises(ValueError, match="by_lead"):
            audit_models(store, history.config, model=name, by_lead=True, scored=scored)


def test_a_model_history_audits_each_window_once_for_every_page(history: History) -> None:
    # The pass page, the model pages and the digest ask the shared ModelHistory for their
    # windows: the records are a fresh audit's, the same however often asked, and a page that
    # changes its records does not change another page's.
    with history.open() as store:
        histories = ModelHistories(store, history.config)
        for name in history.config.models:
            model = histories[name]
            for last in (13, 52, None, 13):
                assert model.audit(store, history.config, last) == audit_models(
                    store, history.config, model=name, last=last), (name, last)
            first = model.audit(store, history.config, 13)
            assert first, name
            first[0]["hits"] = -1
            first.pop()
            again = model.audit(store, history.config, 13)
            assert again == audit_models(store, history.config, model=name, last=13)
            assert sorted(model._audits, key=str) == sorted([13, 52, None], key=str)


def test_summary_pools_the_records(history: History) -> None:
    with history.open() as store:
        records = audit_models(store, history.config, model="delivery_hours", last=13)
    summary = summarise_coverage(records)
    assert summary is not None
    assert summary["scored"] == sum(r["scored"] for r in records)
    assert summary["hits"] == sum(r["hits"] for r in records)
    assert summary["series_count"] == 3
    ci = stats.binomtest(summary["hits"], summary["scored"]).proportion_ci(method="exact")
    assert summary["hit_rate_lower"] == pytest.approx(ci.low, abs=1e-12)
    assert sum(summary["zones"].values()) == 3
    with pytest.raises(ValueError, match="one model"):
        summarise_coverage([*records, {**records[0], "model": "other"}])
    assert summarise_coverage([]) is None


# ------------------------------------------------------------------------- the command


def _run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_cli_json_is_the_audit(history: History, capsys: pytest.CaptureFixture[str]) -> None:
    config = str(history.root / "plumbline.yaml")
    for extra, kwargs in (((), {}), (("--last", "13"), {"last": 13}),
                          (("--by-lead",), {"by_lead": True}),
                          (("--model", "pick_hours"), {"model": "pick_hours"})):
        code, out, _ = _run(capsys, "audit", "-c", config, "--format", "json", *extra)
        assert code == 0
        with history.open() as store:
            expected = audit_models(store, history.config, **kwargs)  # type: ignore[arg-type]
        assert json.loads(out) == expected
        assert "NaN" not in out


def test_cli_csv_has_the_same_columns_and_values(
    history: History, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = _run(capsys, "audit", "-c", str(history.root / "plumbline.yaml"),
                        "--format", "csv", "--last", "52")
    assert code == 0
    rows = list(csv.DictReader(io.StringIO(out)))
    with history.open() as store:
        expected = audit_models(store, history.config, last=52)
    assert list(rows[0]) == [*AUDIT_COLUMNS, "window"]
    assert len(rows) == len(expected)
    for row, record in zip(rows, expected, strict=True):
        for key, value in record.items():
            if value is None:
                assert row[key] == ""
            elif isinstance(value, str):
                assert row[key] == value
            else:
                assert float(row[key]) == value  # numbers in full: the round trip is exact


def test_cli_table_opens_with_a_sentence_and_plain_columns(
    history: History, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = _run(capsys, "audit", "-c", str(history.root / "plumbline.yaml"),
                        "--last", "13")
    assert code == 0
    first = out.splitlines()[0]
    assert first.startswith("Coverage audit of 2 models, as of the latest pass (business clock "
                            "2025-02-24 08:00 Europe/Berlin)")
    assert "pick_hours (nominal 95 %): " in out
    assert "delivery_hours (nominal 90 %): " in out
    header = next(line for line in out.splitlines() if line.strip().startswith("series"))
    for column in ("scored", "hits", "hit rate", "interval", "above", "below", "Kupiec p",
                   "indep. p", "misses", "width", "score"):
        assert column in header
    assert "(whole model)" in out and "North" in out
    # The legend says the coverage finding's p-value comes from another test than Kupiec's.
    legend = " ".join(out.split())
    assert "the coverage finding is decided by another test, a cumulative sum of the errors' " \
           "size over the monitoring horizon, and quotes that test's p-value" in legend
    with history.open() as store:
        records = audit_models(store, history.config, last=13)
    for record in records:
        assert f"{record['hit_rate'] * 100:.1f} %" in out
    assert_no_borrowed_looks(out)  # last: it skips where ../shared is absent


def test_cli_exit_codes(history: History, tmp_path: Path,
                        capsys: pytest.CaptureFixture[str]) -> None:
    config = str(history.root / "plumbline.yaml")
    code, _, err = _run(capsys, "audit", "-c", config, "--model", "delivery_hour")
    assert code == 2 and "did you mean 'delivery_hours'" in err
    code, _, err = _run(capsys, "audit", "-c", config, "--last", "0")
    assert code == 2 and "below 1" in err
    empty = tmp_path / "fresh"
    empty.mkdir()
    (empty / "plumbline.yaml").write_text(CONFIG_TEXT, encoding="utf-8")
    code, _, err = _run(capsys, "audit", "-c", str(empty / "plumbline.yaml"))
    assert code == 2 and "no database at" in err and "plumbline pass" in err
    assert not (empty / "state").exists()  # the audit made nothing
    code, _, err = _run(capsys, "audit", "-c", str(tmp_path / "missing.yaml"))
    assert code == 2


def test_cli_before_anything_is_scored(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "plumbline.yaml").write_text(CONFIG_TEXT, encoding="utf-8")
    Store.open(tmp_path / "state" / "plumbline.sqlite").close()
    config = str(tmp_path / "plumbline.yaml")
    code, out, _ = _run(capsys, "audit", "-c", config, "--format", "json")
    assert code == 0 and json.loads(out) == []
    code, out, _ = _run(capsys, "audit", "-c", config)
    assert code == 0
    assert "no pass has run yet: nothing scored yet." in out
    assert "pick_hours: no forecasts scored yet." in out


@pytest.mark.parametrize("last", [None, 13])
def test_point_accuracy_equals_a_count_by_hand(
    history: History, last: int | None, capsys: pytest.CaptureFixture[str]
) -> None:
    # Issue 14, item 9: mean error (actual − point), mean absolute error, and the MASE of
    # Hyndman & Koehler (2006) against the naive last-value forecast on the same periods,
    # counted here straight from the scored forecasts.
    with history.open() as store:
        records = audit_models(store, history.config, last=last)
        for record in records:
            scored = store.scored_forecasts(record["model"])
            rows = [i for i, s in enumerate(scored.series) if s == record["series"]]
            if last:
                rows = rows[-last:]
            errors = [scored.actual[i] - scored.point[i] for i in rows]
            actuals = [scored.actual[i] for i in rows]
            mae = sum(abs(e) for e in errors) / len(errors)
            assert record["mean_error"] == pytest.approx(sum(errors) / len(errors), rel=1e-12)
            assert record["mean_absolute_error"] == pytest.approx(mae, rel=1e-12)
            steps = [abs(b - a) for a, b in itertools.pairwise(actuals)]
            if steps:
                assert record["mase"] == pytest.approx(mae / (sum(steps) / len(steps)),
                                                       rel=1e-12)
    code, out, _ = _run(capsys, "audit", "-c", str(history.root / "plumbline.yaml"))
    assert code == 0
    assert any(line.strip().startswith("point accuracy") and "MASE" in line
               for line in out.splitlines())
