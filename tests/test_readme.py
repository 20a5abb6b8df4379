"""The README against the program: every command documented, the JSON contracts of DESIGN.md
section 9 in the examples, every finding kind explained, the walk-through's config and outputs,
the figures of the two "Why" sections recomputed, and the digest picture present.

The figures the README states are recomputed here rather than trusted: the walk-through's first
``plumbline fit`` and ``plumbline pass`` outputs must appear in it verbatim, the mean-response
comparison is recomputed from ``plumbline fit --format json`` with scipy's t distribution, and
the false-alarm table of "Why Plumbline monitors sequentially" comes from a seeded simulation run
here with the package's own tests (sup-F, the slope comparison, sequential monitoring).
"""

from __future__ import annotations

import argparse
import importlib
import json
import math
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from PIL import Image
from scipy import stats

from monitor.cli import COMMAND_MODULES, main
from monitor.config import load_config
from monitor.stats.monitoring import monitor, start_monitoring
from monitor.stats.ols import fit_batch
from monitor.stats.shift import slope_shift
from monitor.stats.supf import break_tests
from monitor.vocabulary import FindingKind, FindingState, Severity

REPO_ROOT = Path(__file__).resolve().parent.parent
README = (REPO_ROOT / "README.md").read_text(encoding="utf-8")
DEVELOPERS = (REPO_ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
EXAMPLE = REPO_ROOT / "config" / "example_pick_hours.csv"
DIGEST_PNG = REPO_ROOT / "demo_feed" / "digest.png"

HEADING = re.compile(r"^(#{1,6}) (.*)$", re.M)
FENCE = re.compile(r"^```(\w*)\n(.*?)^```$", re.M | re.S)


# --------------------------------------------------------------------------- reading the README


def _headings(text: str) -> list[tuple[int, int, str]]:
    """(position, level, title) of every heading outside code blocks."""
    fenced = [(m.start(), m.end()) for m in FENCE.finditer(text)]
    return [
        (m.start(), len(m.group(1)), m.group(2))
        for m in HEADING.finditer(text)
        if not any(a <= m.start() < b for a, b in fenced)
    ]


def _section(text: str, predicate: Any) -> str:
    """The text under the first heading whose title satisfies ``predicate``, up to the next
    heading of the same or a higher level."""
    headings = _headings(text)
    for index, (start, level, title) in enumerate(headings):
        if predicate(title):
            end = next((s for s, lv, _ in headings[index + 1:] if lv <= level), len(text))
            return text[start:end]
    raise AssertionError(f"no README heading matches {predicate}")


def _command_section(command: str) -> str:
    return _section(README, lambda title: f"`plumbline {command}`" in title)


def _blocks(text: str, language: str) -> list[str]:
    return [m.group(2) for m in FENCE.finditer(text) if m.group(1) == language]


def _command_names(module_name: str) -> list[str]:
    """The command names a module under ``monitor.commands`` registers."""
    parser = argparse.ArgumentParser()
    subparsers = parser.add_subparsers()
    importlib.import_module(f"monitor.commands.{module_name}").register(subparsers)
    return list(subparsers.choices)


# --------------------------------------------------------------------------- commands


@pytest.mark.parametrize("module_name", COMMAND_MODULES)
def test_every_registered_command_has_a_readme_section(module_name: str) -> None:
    names = _command_names(module_name)
    assert names, f"monitor.commands.{module_name} registers no command"
    titles = [title for _, _, title in _headings(README)]
    for name in names:
        assert any(f"`plumbline {name}" in title for title in titles), (
            f"no README heading mentions `plumbline {name}`"
        )


# --------------------------------------------------------------------------- JSON contracts

# DESIGN.md section 9: the keys each --format json output must carry at least.
FIT_KEYS = {"n", "residual_df", "r_squared", "adj_r_squared", "residual_std_error",
            "f_statistic", "f_p_value", "exact_fit", "level", "coefficients", "predictions",
            "diagnostics"}
COEFFICIENT_KEYS = {"term", "estimate", "standard_error", "t", "p_value", "lower", "upper"}
PREDICTION_KEYS = {"at", "point", "mean_lower", "mean_upper", "lower", "upper", "leverage"}
AUDIT_KEYS = {"model", "series", "scored", "hits", "hit_rate", "hit_rate_lower",
              "hit_rate_upper", "misses_high", "misses_low", "nominal", "kupiec_p_value",
              "independence_p_value", "christoffersen_p_value", "zone", "mean_width",
              "interval_score"}
STATUS_FINDING_KEYS = {"id", "model", "series", "feed", "kind", "severity", "state",
                       "since_period", "statistic", "p_value", "message"}


def _json_examples(command: str) -> list[Any]:
    blocks = _blocks(_command_section(command), "json")
    assert blocks, f"the README section of `plumbline {command}` has no JSON example"
    return [json.loads(block) for block in blocks]


def test_fit_json_example_carries_the_contract() -> None:
    (example,) = _json_examples("fit")
    assert example.keys() >= FIT_KEYS
    terms = [c["term"] for c in example["coefficients"]]
    assert terms[0] == "intercept"
    for coefficient in example["coefficients"]:
        assert coefficient.keys() >= COEFFICIENT_KEYS
    assert example["predictions"], "the example shows no prediction"
    for prediction in example["predictions"]:
        assert prediction.keys() >= PREDICTION_KEYS
        # the prediction interval holds the mean-response interval (DESIGN.md section 4)
        assert prediction["lower"] < prediction["mean_lower"] < prediction["point"]
        assert prediction["point"] < prediction["mean_upper"] < prediction["upper"]
    diagnostics = example["diagnostics"]
    for test in ("durbin_watson", "breusch_pagan", "jarque_bera"):
        assert {"statistic", "p_value"} <= diagnostics[test].keys()
    assert set(diagnostics["vif"]) == set(example["predictors"])


def test_breaks_json_example_carries_the_contract() -> None:
    (example,) = _json_examples("breaks")
    assert {"statistic", "crossed", "first_crossing"} <= example["cusum"].keys()
    assert {"statistic", "p_value"} <= example["ols_cusum"].keys()
    assert {"statistic", "p_value", "break_index", "break_period"} <= example["sup_f"].keys()


def test_audit_json_example_carries_the_contract() -> None:
    for example in _json_examples("audit"):
        assert isinstance(example, list) and example
        for record in example:
            assert record.keys() >= AUDIT_KEYS
            assert record["hits"] + record["misses_high"] + record["misses_low"] == (
                record["scored"]
            )


def test_status_json_example_carries_the_contract() -> None:
    (example,) = _json_examples("status")
    assert {"findings", "passes", "next_runs"} <= example.keys()
    assert len(example["findings"]) == 2
    kinds = {kind.value for kind in FindingKind}
    for finding in example["findings"]:
        assert finding.keys() >= STATUS_FINDING_KEYS
        assert finding["kind"] in kinds
        assert finding["severity"] in {s.value for s in Severity}
        assert finding["state"] in {s.value for s in FindingState}
        # a finding names a model or, for a feed-level kind, a feed
        assert (finding["model"] is None) != (finding["feed"] is None)
    assert isinstance(example["passes"], list) and example["passes"]
    assert {"scan", "digest"} <= example["next_runs"].keys()


# --------------------------------------------------------------------------- findings table


def test_every_finding_kind_is_explained_in_the_findings_table() -> None:
    section = _section(README, lambda title: title.startswith("What each finding means"))
    rows: dict[str, list[str]] = {}
    for line in section.splitlines():
        match = re.match(r"^\| `(\w+)` \|(.*)\|$", line)
        if match:
            rows[match.group(1)] = [cell.strip() for cell in match.group(2).split(" | ")]
    assert set(rows) == {kind.value for kind in FindingKind}
    for kind, (severity, rule, action) in rows.items():
        assert any(s.value in severity for s in Severity), f"{kind}: no severity named"
        assert len(rule) > 40 and len(action) > 20, f"{kind}: rule or action missing"


def test_findings_table_agrees_with_each_kinds_declaration() -> None:
    """The README's row of a kind names the severities, the cross-series control and the
    rebaseline behaviour that its declaration in ``monitor.vocabulary`` gives."""
    section = _section(README, lambda title: title.startswith("What each finding means"))
    rows: dict[str, list[str]] = {}
    for line in section.splitlines():
        match = re.match(r"^\| `(\w+)` \|(.*)\|$", line)
        if match:
            rows[match.group(1)] = [cell.strip() for cell in match.group(2).split(" | ")]
    for kind in FindingKind:
        declared = kind.declaration
        severity, rule, _ = rows[kind.value]
        named = {s for s in Severity if f"`{s.value}`" in severity}
        assert named == set(declared.severities), f"{kind}: severities {named}"
        if declared.raised_when is not None:
            assert declared.raised_when in severity, f"{kind}: when it is raised higher"
        assert ("*BH*" in rule) == declared.family.controlled, f"{kind}: BH mark"
    rebaseline = re.search(r"`plumbline rebaseline MODEL` clears .*?\(([^)]*)\)", section, re.S)
    assert rebaseline is not None
    listed = set(re.findall(r"`(\w+)`", rebaseline.group(1)))
    assert listed == {kind.value for kind in FindingKind if kind.declaration.rebaseline}


def test_findings_table_states_the_thresholds_the_code_uses() -> None:
    from monitor import findings, passes

    section = _section(README, lambda title: title.startswith("What each finding means"))
    assert f"fewer than {findings.DIAGNOSTIC_MIN_ROWS} rows" in section
    assert f"more than {findings.STALE_CADENCES} × `cadence`" in section
    assert f"chance below {passes.EXTRAPOLATION_P_VALUE:.4f}" in section


# --------------------------------------------------------------------------- the walk-through


def _walkthrough() -> str:
    return _section(README, lambda title: title == "Your first model")


def _first_pass(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> tuple[Path, str]:
    """Steps 2-4 of the walk-through in ``tmp_path`` (the working folder): its config, the
    history with next week's plan row and its marker, and the first pass. Returns the config's
    path and what the pass printed."""
    (yaml_text,) = _blocks(_walkthrough(), "yaml")
    config_path = tmp_path / "plumbline.yaml"
    config_path.write_text(yaml_text, encoding="utf-8")
    inbox = tmp_path / "feeds" / "warehouse" / "inbox"
    inbox.mkdir(parents=True)
    history = EXAMPLE.read_text(encoding="utf-8").splitlines()[:31]
    (inbox / "history.csv").write_text("\n".join([*history, "2025-08-03,3900,118,"]) + "\n",
                                       encoding="utf-8")
    (inbox / "history.csv.ready").touch()
    capsys.readouterr()
    assert main(["pass", "-c", str(config_path), "--as-of", "2025-07-28T07:00"]) == 0
    return config_path, capsys.readouterr().out.strip()


def test_walkthrough_config_loads_and_its_first_pass_prints_what_the_readme_shows(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)  # the walk-through runs in its workspace folder
    config_path, printed = _first_pass(tmp_path, capsys)
    config = load_config(config_path)
    assert list(config.feeds) == ["warehouse"] and list(config.models) == ["pick_hours"]
    assert config.models["pick_hours"].predictors == ["order_lines"]
    assert printed in _walkthrough()
    assert "1 forecast(s) issued" in printed
    assert (tmp_path / "exports" / "pick_hours" / "pass-000001.csv").is_file()


def test_planners_week_runs_as_the_readme_shows(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """"A planner's week": drop the week's actual and plan rows, run the pass, take the
    forecasts; every output shown is the program's own, and the export equals the listing."""
    section = _section(README, lambda title: title.startswith("A planner's week"))
    monkeypatch.chdir(tmp_path)
    config_path, _ = _first_pass(tmp_path, capsys)
    texts = _blocks(section, "text")
    week_file = texts[0]
    assert week_file.startswith("week_ending,order_lines,pallets,pick_hours\n")
    name = re.search(r"Save it as `(feeds/warehouse/inbox/[\w.-]+\.csv)`", section)
    assert name, "the section does not say where the file goes"
    (tmp_path / name.group(1)).write_text(week_file, encoding="utf-8")
    touch = re.search(r"^\$ touch (\S+)$", texts[1], re.M)
    assert touch and touch.group(1) == name.group(1) + ".ready"
    (tmp_path / touch.group(1)).touch()

    run = re.search(r"^\$ plumbline pass --as-of (\S+)$", texts[1], re.M)
    assert run
    capsys.readouterr()
    assert main(["pass", "-c", str(config_path), "--as-of", run.group(1)]) == 0
    printed = capsys.readouterr().out
    assert printed in texts[1]
    assert "3 forecast(s) issued" in printed

    assert texts[2].startswith("$ plumbline forecasts --open\n")
    assert main(["forecasts", "-c", str(config_path), "--open"]) == 0
    assert "$ plumbline forecasts --open\n" + capsys.readouterr().out == texts[2]

    exported = re.search(r"\(`(exports/pick_hours/pass-\d+\.csv)`\)", section)
    assert exported
    export_text = (tmp_path / exported.group(1)).read_text(encoding="utf-8")
    assert export_text == texts[3]
    assert main(["forecasts", "-c", str(config_path), "--open", "--format", "csv"]) == 0
    listed = capsys.readouterr().out.splitlines()
    assert listed[0] == export_text.splitlines()[0] + ",actual,outcome,calibrated_outcome"
    assert [line + ",,," for line in export_text.splitlines()[1:]] == listed[1:]
    # the figures the prose reads off the first forecast, recomputed from the export
    first = dict(zip(listed[0].split(","), listed[1].split(","), strict=True))
    point, lower, upper = (round(float(first[c])) for c in ("point", "lower", "upper"))
    assert f"number for {first['target_period']} is {point} picking hours" in section
    assert f"between {lower} and {upper}" in section


def test_walkthrough_fit_outputs_are_the_commands_own(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    history = tmp_path / "history.csv"
    history.write_text("\n".join(EXAMPLE.read_text(encoding="utf-8").splitlines()[:31]) + "\n",
                       encoding="utf-8")
    for predictors in (["order_lines", "pallets"], ["order_lines"]):
        capsys.readouterr()
        assert main(["fit", str(history), "--response", "pick_hours",
                     "--predictors", *predictors]) == 0
        opening = capsys.readouterr().out.split("\n\n")[0]
        assert opening in _walkthrough(), f"fit with {predictors}: opening not in the README"


# --------------------------------------------------------------------------- the "Why" figures


def test_mean_response_comparison_is_recomputed_from_plumbline_fit(
    capsys: pytest.CaptureFixture[str]
) -> None:
    capsys.readouterr()
    assert main(["fit", str(EXAMPLE), "--response", "pick_hours", "--predictors", "order_lines",
                 "pallets", "--at", "order_lines=5200,pallets=140", "--format", "json"]) == 0
    result = json.loads(capsys.readouterr().out)
    (prediction,) = result["predictions"]
    ratio = (prediction["upper"] - prediction["lower"]) / (
        prediction["mean_upper"] - prediction["mean_lower"])
    # Under the model, (actual - point) / (s·sqrt(1 + h)) is Student t on residual_df; the
    # mean-response half-width is t*·s·sqrt(h), so it holds an actual with this probability.
    df, h = result["residual_df"], prediction["leverage"]
    cut = stats.t.ppf(1 - (1 - result["level"]) / 2, df) * math.sqrt(h / (1 + h))
    hold = 2 * stats.t.cdf(cut, df) - 1
    section = _section(README, lambda title: title.startswith("Why prediction intervals"))
    assert f"{ratio:.1f} times narrower" in section
    assert f"P(|T₃₇| ≤ {cut:.3f}) ≈ {hold:.2f}" in section
    assert df == 37 and f"h₀ = {h:.4f}" in section


def _false_alarm_rates(series: int = 1000, seed: int = 20261201) -> dict[str, float]:
    """Stable series, 52-week baseline, 104 weekly looks at the 5 % level: the share of series
    with at least one false alarm for a retrospective test re-run every week, and for sequential
    monitoring. Invented data: order lines ~ N(100, 20²), hours = 5 + 0.8·lines + N(0, 10²)."""
    rng = np.random.default_rng(seed)
    base_rows, horizon, recent, alpha = 52, 104, 26, 0.05
    n = base_rows + horizon
    x = rng.normal(100, 20, (series, n, 1))
    y = 5 + 0.8 * x[:, :, 0] + rng.normal(0, 10, (series, n))
    sup_f = np.zeros(series, dtype=bool)
    rolling = np.zeros(series, dtype=bool)
    base = fit_batch(x[:, :base_rows], y[:, :base_rows])
    for rows in range(base_rows + 1, n + 1):
        tests = break_tests(x[:, :rows], y[:, :rows])
        sup_f |= np.nan_to_num(tests.sup_f.p_value, nan=1.0) < alpha
        if rows - base_rows >= recent:
            latest = fit_batch(x[:, rows - recent:rows], y[:, rows - recent:rows])
            shift = slope_shift(base.coef[:, 1:], base.standard_error[:, 1:], base.residual_df,
                                latest.coef[:, 1:], latest.standard_error[:, 1:],
                                latest.residual_df)
            rolling |= np.nan_to_num(shift.p_value[:, 0], nan=1.0) < alpha
    state = start_monitoring(x[:, :base_rows], y[:, :base_rows])
    sequential = monitor(state, x[:, base_rows:], y[:, base_rows:], alpha=alpha,
                         horizon=horizon).crossed
    return {"sup_f": float(sup_f.mean()), "rolling": float(rolling.mean()),
            "sequential": float(sequential.mean())}


def test_false_alarm_table_is_what_the_simulation_gives() -> None:
    section = _section(README, lambda title: title.startswith("Why Plumbline monitors"))

    def stated(row_start: str) -> float:
        match = re.search(re.escape(row_start) + r"[^|]*\| ([\d.]+) % \|", section)
        assert match, f"no row starting {row_start!r}"
        return float(match.group(1)) / 100

    rates = _false_alarm_rates()
    # Same seed, same code: the figures agree up to a series or two whose p-value sits on 0.05.
    assert rates["sup_f"] == pytest.approx(stated("| sup-F on all rows so far"), abs=0.005)
    assert rates["rolling"] == pytest.approx(stated("| the latest 26 weeks' slope"), abs=0.005)
    assert rates["sequential"] == pytest.approx(stated("| sequential monitoring"), abs=0.005)
    # What the section claims: re-running inflates false alarms far beyond 5 %; sequential
    # monitoring keeps them at about 5 % (3 binomial standard errors at 1,000 series).
    assert rates["sup_f"] > 0.2 and rates["rolling"] > 0.2
    assert rates["sequential"] < 0.05 + 3 * math.sqrt(0.05 * 0.95 / 1000)


# --------------------------------------------------------------------------- the digest picture


def test_digest_picture_exists_is_embedded_and_is_not_blank() -> None:
    match = re.search(r"!\[([^\]]+)\]\(demo_feed/digest\.png\)", README)
    assert match, "the README does not embed demo_feed/digest.png"
    assert len(match.group(1)) > 80, "the picture's alt text does not say what it shows"
    assert DIGEST_PNG.exists(), "run tests/tools/screenshot_digest.py"
    with Image.open(DIGEST_PNG) as image:
        assert image.format == "PNG"
        assert image.width >= 800 and image.height >= 800
        grey = np.asarray(image.convert("L"), dtype=np.int64)
    low, high = int(grey.min()), int(grey.max())
    assert high - low > 150, "the picture has no contrast"
    background = np.bincount(grey.ravel()).argmax()
    ink = np.abs(grey - background) > 60
    assert 0.01 < ink.mean() < 0.5, "the picture is nearly empty or nearly solid"
    assert ink.mean(axis=1).astype(bool).mean() > 0.2, "text on too few rows"


def test_calibrated_interval_table_is_what_the_seeded_panels_give() -> None:
    # The table of "Calibrated intervals beside the model's own" comes from the seeded panels
    # that tests/stats/test_conformal.py pins (same seed, size and settings).
    import importlib.util
    import sys

    from monitor.stats.conformal import DEFAULT_GAMMA, DEFAULT_MIN_SCORES, DEFAULT_WINDOW

    spec = importlib.util.spec_from_file_location(
        "conformal_panels", REPO_ROOT / "tests" / "stats" / "conformal_panels.py")
    assert spec is not None and spec.loader is not None
    panels = sys.modules.get("conformal_panels") or importlib.util.module_from_spec(spec)
    sys.modules["conformal_panels"] = panels  # dataclasses look their module up there
    spec.loader.exec_module(panels)
    section = _section(README, lambda title: title.startswith("Calibrated intervals beside"))
    labels = {"iid": "independent, normal", "ar1": "autocorrelated (AR(1), ρ = 0.5)",
              "growing": "spread growing 2.5-fold", "t3": "heavy-tailed (t, 3 df)"}
    for kind, label in labels.items():
        r = panels.run_panel(kind, series=150, baseline=52, forecasts=300, level=0.95,
                             seed=20261202, gamma=DEFAULT_GAMMA, window=DEFAULT_WINDOW,
                             min_scores=DEFAULT_MIN_SCORES)
        row = (f"| {label} | {r.own_coverage:.3f} | {r.calibrated_coverage:.3f} | "
               f"{r.own_width_ratio:.2f} | {r.calibrated_width_ratio:.2f} |")
        assert row in section, f"README row for {kind} should read {row}"


# --------------------------------------------------------------------------- DEVELOPERS.md


def test_every_benchmark_is_listed_in_developers() -> None:
    start = DEVELOPERS.index("<!-- section: benchmarks -->")
    end = DEVELOPERS.index("<!-- end section: benchmarks -->")
    listed = DEVELOPERS[start:end]
    for bench in sorted((REPO_ROOT / "tests" / "benchmarks").glob("bench_*.py")):
        assert f"tests/benchmarks/{bench.name}" in listed, f"{bench.name} not in DEVELOPERS.md"


def test_forecasts_columns_table_is_the_codes() -> None:
    """The README's table of `plumbline forecasts` columns is monitor.exports' own list, in
    order, with the same words."""
    from monitor.exports import FORECAST_COLUMNS, SCORED_COLUMNS

    section = _command_section("forecasts")
    rows = re.findall(r"^\| `(\w+)` \| (.+) \|$", section, re.M)
    columns = [(name, meaning) for name, meaning in rows if name not in {"--model"}]
    expected = [(name, meaning) for name, meaning in FORECAST_COLUMNS + SCORED_COLUMNS]
    assert [c for c in columns if c[0] in dict(expected)] == expected
