"""The config file (DESIGN.md section 8): examples, defaults, errors with path and line, paths,
the README's reference against the models, schedules, signatures."""

from __future__ import annotations

import re
import types
import typing
from datetime import date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from pydantic import BaseModel

from monitor.config import (
    SETTINGS,
    SETTINGS_BY_PATH,
    CronSchedule,
    PlumblineConfig,
    feed_columns,
    load_config,
    lookup_model,
    model_signature,
    parse_config,
    parse_schedule,
)
from monitor.errors import ConfigError, UsageError

REPO = Path(__file__).resolve().parent.parent
EXAMPLES = sorted((REPO / "config").glob("*.yaml"))

# A valid config with a known layout; tests edit one line of it and check the message for it.
BASE = """\
timezone: Europe/Berlin
feeds:
  depot_weekly:
    inbox: feeds/depot/inbox
    period: week_ending
    cadence: 7d
    columns: [week_ending, depot, order_lines, pallets, pick_hours, fc_point, fc_lower, fc_upper]
models:
  pick_hours:
    feed: depot_weekly
    response: pick_hours
    predictors: [order_lines]
    per: depot
    thresholds:
      fdr: 0.10
  external:
    feed: depot_weekly
    response: pick_hours
    interval: {point: fc_point, lower: fc_lower, upper: fc_upper, level: 0.9}
schedule:
  digest: "0 8 * * mon"
"""


def problems(text: str) -> list[str]:
    """The lines of the ConfigError that ``text`` raises."""
    with pytest.raises(ConfigError) as caught:
        parse_config(text, source="plumbline.yaml", base_dir=Path("/srv/plumbline"))
    return str(caught.value).splitlines()


def edit(old: str, new: str, text: str = BASE) -> str:
    assert text.count(old) == 1, old
    return text.replace(old, new)


def line_of(text: str, fragment: str) -> int:
    """1-based number of the only line of ``text`` that contains ``fragment``."""
    numbers = [i for i, line in enumerate(text.splitlines(), 1) if fragment in line]
    assert len(numbers) == 1, (fragment, numbers)
    return numbers[0]


def line_is(text: str, whole: str) -> int:
    """1-based number of the only line of ``text`` that is exactly ``whole``."""
    numbers = [i for i, line in enumerate(text.splitlines(), 1) if line == whole]
    assert len(numbers) == 1, (whole, numbers)
    return numbers[0]


# ---------------------------------------------------------------------------------------------
# Examples and defaults


def test_the_examples_are_found() -> None:
    names = {path.name for path in EXAMPLES}
    assert {"plumbline.example.yaml", "minimal.yaml"} <= names


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda path: path.name)
def test_every_example_config_loads(path: Path) -> None:
    config = load_config(path)
    assert config.feeds and config.models
    assert config.source == path
    for model in config.models.values():
        assert model.feed in config.feeds
        assert set(model.columns) <= feed_columns(config, model.feed)


def test_the_full_example_uses_every_section() -> None:
    config = load_config(REPO / "config" / "plumbline.example.yaml")
    kinds = {model.fitted for model in config.models.values()}
    assert kinds == {True, False}  # fitted models and an audited interval
    assert {feed.period_type for feed in config.feeds.values()} == {"date", "integer"}
    assert config.notify.email is not None
    assert any(model.baseline is not None for model in config.models.values())


def test_defaults_of_a_minimal_config(tmp_path: Path) -> None:
    path = tmp_path / "plumbline.yaml"
    path.write_text(
        "feeds:\n  f:\n    inbox: in/f\n    period: week\n    cadence: 7d\n"
        "models:\n  m:\n    feed: f\n    response: y\n    predictors: [x]\n",
        encoding="utf-8",
    )
    config = load_config(path)
    # Values from DESIGN.md section 8 (the shape) and section 7 (the thresholds' defaults).
    assert config.database == tmp_path / "state" / "plumbline.sqlite"
    assert config.timezone == "UTC"
    feed = config.feeds["f"]
    assert feed.archive == tmp_path / "in" / "archive"
    assert feed.rejected == tmp_path / "in" / "rejected"
    assert (feed.format, feed.period_type, feed.columns) == ("csv", "date", None)
    assert feed.settle == timedelta(seconds=30)
    assert feed.cadence == timedelta(days=7)
    model = config.models["m"]
    assert model.intercept is True
    assert model.level == 0.95
    assert (model.window, model.recent, model.min_rows) == (104, 26, 10)
    assert model.horizon is None  # None means twice the baseline's length
    assert model.baseline is None and model.per is None and model.interval is None
    assert model.owners == []  # no e-mail configured, so nobody by default
    thresholds = model.thresholds
    assert thresholds.significance == 0.05
    assert thresholds.fdr == 0.10
    assert thresholds.min_scored == 12
    assert thresholds.min_r2 is None
    assert thresholds.max_r2_drop == 0.2
    assert thresholds.clear_after == 2
    assert (config.schedule.scan, config.schedule.digest) == ("30s", "0 8 * * mon")
    assert config.notify.html_dir == tmp_path / "reports"
    assert config.notify.email is None


def test_integer_periods_default_to_a_cadence_of_one() -> None:
    text = edit("    cadence: 7d\n", "    period_type: integer\n")
    text = text.replace("week_ending", "year")
    config = parse_config(text)
    assert config.feeds["depot_weekly"].cadence == 1


def test_owners_default_to_the_digest_recipients() -> None:
    text = BASE + "notify:\n  email:\n    to: [plan@example.org]\n    sender: pl@example.org\n"
    text = edit("    per: depot\n", "    per: depot\n    owners: [lead@example.org]\n", text)
    config = parse_config(text)
    assert config.models["pick_hours"].owners == ["lead@example.org"]
    assert config.models["external"].owners == ["plan@example.org"]


@pytest.mark.parametrize(("security", "port"), [("none", 25), ("starttls", 587), ("tls", 465)])
def test_smtp_port_follows_security(security: str, port: int) -> None:
    text = BASE + (
        "notify:\n  email:\n    to: [a@example.org]\n    sender: b@example.org\n"
        f"    security: {security}\n"
    )
    email = parse_config(text).notify.email
    assert email is not None and email.smtp_port == port


# ---------------------------------------------------------------------------------------------
# Errors: each names the file, the line and the YAML path, and suggests the nearest name


def test_misspelt_column_against_declared_columns() -> None:
    text = edit("predictors: [order_lines]", "predictors: [order_line]")
    line = line_of(text, "[order_line]")
    # The exact message of DESIGN.md section 8.
    assert problems(text) == [
        f"plumbline.yaml line {line}: models.pick_hours.predictors[0]: column 'order_line' "
        "not in feed depot_weekly (did you mean 'order_lines'?)"
    ]


def test_misspelt_response_and_per_are_both_reported() -> None:
    text = edit("    per: depot\n", "    per: depto\n")
    text = edit("response: pick_hours\n    predictors", "response: pick_hour\n    predictors", text)
    assert problems(text) == [
        f"plumbline.yaml line {line_is(text, '    response: pick_hour')}: "
        "models.pick_hours.response: column 'pick_hour' not in feed depot_weekly "
        "(did you mean 'pick_hours'?)",
        f"plumbline.yaml line {line_of(text, 'depto')}: models.pick_hours.per: column 'depto' "
        "not in feed depot_weekly (did you mean 'depot'?)",
    ]


def test_misspelt_feed_name_in_a_model() -> None:
    text = edit("  external:\n    feed: depot_weekly", "  external:\n    feed: depot_weekley")
    (message,) = problems(text)
    assert message.startswith(f"plumbline.yaml line {line_of(text, 'depot_weekley')}: ")
    assert "models.external.feed: feed 'depot_weekley' is not declared" in message
    assert "(did you mean 'depot_weekly'?)" in message


def test_misspelt_feed_is_reported_beside_other_errors() -> None:
    text = edit("  external:\n    feed: depot_weekly", "  external:\n    feed: depot_weekley")
    text = edit("    cadence: 7d\n", "    cadence: 7 days\n", text)
    found = problems(text)
    assert len(found) == 2
    assert any("feeds.depot_weekly.cadence" in line for line in found)
    assert any("(did you mean 'depot_weekly'?)" in line for line in found)


@pytest.mark.parametrize(
    ("old", "new", "path", "suggestion"),
    [
        ("timezone: Europe/Berlin", "timezon: Europe/Berlin", "timezon", "timezone"),
        ("    period: week_ending", "    perod: week_ending", "feeds.depot_weekly.perod", "period"),
        ("      fdr: 0.10", "      fdrr: 0.10", "models.pick_hours.thresholds.fdrr", "fdr"),
        ("    per: depot", "    pre: depot", "models.pick_hours.pre", "per"),
        ("  digest:", "  digets:", "schedule.digets", "digest"),
    ],
)
def test_misspelt_key(old: str, new: str, path: str, suggestion: str) -> None:
    text = edit(old, new)
    found = problems(text)
    line = line_of(text, new.strip())
    expected = (
        f"plumbline.yaml line {line}: {path}: unknown key '{path.split('.')[-1]}' "
        f"(did you mean '{suggestion}'?)"
    )
    assert expected in found


def test_an_unknown_key_with_nothing_near_lists_the_known_ones() -> None:
    text = edit("    per: depot\n", "    per: depot\n    colour: blue\n")
    (message,) = problems(text)
    assert f"line {line_of(text, 'colour')}: models.pick_hours.colour: unknown key" in message
    assert "known keys: feed, response, predictors" in message


def test_bad_duration() -> None:
    text = edit("    cadence: 7d\n", "    cadence: 7d\n    settle: 30 seconds\n")
    (message,) = problems(text)
    assert message.startswith(
        f"plumbline.yaml line {line_of(text, 'settle')}: feeds.depot_weekly.settle: "
        "'30 seconds' is not a duration"
    )


def test_cadence_is_required_for_date_periods() -> None:
    text = edit("    cadence: 7d\n", "")
    (message,) = problems(text)
    # The key is missing, so the line is that of the feed that lacks it.
    assert message.startswith(
        f"plumbline.yaml line {line_of(text, 'depot_weekly:')}: feeds.depot_weekly.cadence: "
        "required for date periods"
    )


@pytest.mark.parametrize(
    ("schedule", "reason"),
    [
        ('"0 25 * * mon"', "hour field '25': 25 is outside 0–23"),
        ('"0 8 * * 8"', "8 is outside 0–7"),
        ('"0 8 * *"', "neither a duration"),
        ('"0 8 31 feb *"', "never fires"),
        ('"0 8 * * mno"', "(did you mean 'mon'?)"),
        ('"0 8 * jann *"', "(did you mean 'jan'?)"),
        ('"*/0 * * * *"', "step"),
        ("30", "is not a schedule"),
    ],
)
def test_bad_cron(schedule: str, reason: str) -> None:
    text = edit('  digest: "0 8 * * mon"', f"  digest: {schedule}")
    (message,) = problems(text)
    assert message.startswith(f"plumbline.yaml line {line_of(text, 'digest')}: schedule.digest: ")
    assert reason in message


def test_unquoted_cron_starting_with_a_star_gets_a_hint() -> None:
    text = edit('  digest: "0 8 * * mon"', "  digest: */5 * * * *")
    (message,) = problems(text)
    assert message.startswith(f"plumbline.yaml line {line_of(text, 'digest')}: not valid YAML")
    assert "must be quoted" in message


def test_bad_timezone() -> None:
    text = edit("timezone: Europe/Berlin", "timezone: Europe/Berlni")
    assert problems(text) == [
        "plumbline.yaml line 1: timezone: unknown time zone 'Europe/Berlni' (did you mean "
        "'Europe/Berlin'?); write an IANA name such as Europe/Berlin or UTC"
    ]


@pytest.mark.parametrize("level", ["1.5", "1", "0", "-0.1"])
def test_level_out_of_range(level: str) -> None:
    text = edit("    per: depot\n", f"    per: depot\n    level: {level}\n")
    (message,) = problems(text)
    assert message.startswith(
        f"plumbline.yaml line {line_is(text, '    level: ' + level)}: models.pick_hours.level: "
    )
    assert "should be" in message and ("less than 1" in message or "greater than 0" in message)


def test_interval_level_out_of_range() -> None:
    text = edit("level: 0.9}", "level: 90}")
    (message,) = problems(text)
    assert f"line {line_of(text, 'level: 90')}: models.external.interval.level: " in message


@pytest.mark.parametrize(
    ("predictors", "intercept", "smallest"),
    [
        ("[order_lines]", "true", 4),
        ("[order_lines, pallets]", "true", 5),
        ("[pallets]", "false", 3),
    ],
)
def test_min_rows_must_exceed_p_plus_one(predictors: str, intercept: str, smallest: int) -> None:
    text = edit("predictors: [order_lines]", f"predictors: {predictors}")
    text = edit("    per: depot\n", f"    per: depot\n    intercept: {intercept}\n", text)
    too_small = edit("    per: depot\n", f"    per: depot\n    min_rows: {smallest - 1}\n", text)
    (message,) = problems(too_small)
    assert message.startswith(
        f"plumbline.yaml line {line_of(too_small, 'min_rows')}: models.pick_hours.min_rows: "
        f"min_rows {smallest - 1} is too small"
    )
    assert f"at least {smallest}" in message
    enough = edit("    per: depot\n", f"    per: depot\n    min_rows: {smallest}\n", text)
    assert parse_config(enough).models["pick_hours"].min_rows == smallest


def test_window_shorter_than_min_rows() -> None:
    text = edit("    per: depot\n", "    per: depot\n    window: 8\n")
    (message,) = problems(text)
    assert f"line {line_of(text, 'window: 8')}: models.pick_hours.window: window 8 is shorter" in (
        message
    )


def test_both_predictors_and_interval() -> None:
    text = edit(
        "    per: depot\n",
        "    per: depot\n    interval: {point: fc_point, lower: fc_lower, upper: fc_upper, "
        "level: 0.9}\n",
    )
    # The first of the two interval lines is pick_hours's; the second is the audited model's.
    line = next(i for i, s in enumerate(text.splitlines(), 1) if "interval:" in s)
    assert problems(text) == [
        f"plumbline.yaml line {line}: models.pick_hours.interval: give predictors or interval, "
        "not both"
    ]


def test_neither_predictors_nor_interval() -> None:
    text = edit("    predictors: [order_lines]\n", "")
    (message,) = problems(text)
    assert message.startswith(f"plumbline.yaml line {line_of(text, '  pick_hours:')}: ")
    assert "models.pick_hours: give predictors (columns to fit) or interval" in message


def test_fit_only_keys_on_an_audited_interval() -> None:
    text = edit(
        "    response: pick_hours\n    interval",
        "    window: 52\n    response: pick_hours\n    interval",
    )
    (message,) = problems(text)
    assert f"line {line_of(text, 'window: 52')}: models.external.window: window applies to" in (
        message
    )


def test_several_problems_come_one_per_line_in_file_order() -> None:
    text = edit("timezone: Europe/Berlin", "timezone: Mars/Olympus")
    text = edit("    cadence: 7d\n", "    cadence: 7d\n    format: xlsx\n", text)
    text = edit('  digest: "0 8 * * mon"', '  digest: "0 8 * * 9"', text)
    found = problems(text)
    assert [line.split(":")[0] for line in found] == [
        "plumbline.yaml line 1",
        f"plumbline.yaml line {line_of(text, 'xlsx')}",
        f"plumbline.yaml line {line_of(text, 'digest')}",
    ]
    assert "timezone: unknown time zone 'Mars/Olympus'" in found[0]
    assert "'xlsx' is not one of csv, parquet" in found[1]
    assert "day of week field '9': 9 is outside 0–7" in found[2]


def test_duplicate_keys_are_errors() -> None:
    text = edit("    per: depot\n", "    per: depot\n    per: depot\n")
    first, second = (i for i, s in enumerate(text.splitlines(), 1) if "per: depot" in s)
    assert problems(text) == [
        f"plumbline.yaml line {second}: models.pick_hours.per: key 'per' appears twice (first on "
        f"line {first})"
    ]


def test_baseline_bounds_follow_the_period_type() -> None:
    text = edit("    per: depot\n", "    per: depot\n    baseline: {start: 2024, end: 2025}\n")
    found = problems(text)
    assert len(found) == 2
    assert all(f"line {line_of(text, 'baseline')}: models.pick_hours.baseline." in s for s in found)
    assert "must be a date" in found[0]
    good = edit("start: 2024, end: 2025", "start: 2024-01-07, end: 2024-12-29", text)
    baseline = parse_config(good).models["pick_hours"].baseline
    assert baseline is not None and baseline.start == date(2024, 1, 7)


def test_baseline_end_before_start() -> None:
    text = edit(
        "    per: depot\n",
        "    per: depot\n    baseline:\n      start: 2024-06-02\n      end: 2024-01-07\n",
    )
    (message,) = problems(text)
    assert f"line {line_of(text, 'end: 2024')}: models.pick_hours.baseline.end: end " in message


def test_email_problems() -> None:
    text = BASE + (
        "notify:\n  email:\n    to: plan@example.org\n    sender: nobody\n"
        "    password_env: PLUMBLINE_SMTP_PASSWORD\n"
    )
    found = problems(text)
    assert found[0].startswith(f"plumbline.yaml line {line_of(text, 'to: plan')}: notify.email.to")
    assert "should be a list in brackets, e.g. [plan@example.org]" in found[0]
    assert "notify.email.sender: 'nobody' is not an e-mail address" in found[1]


def test_credentials_come_in_pairs() -> None:
    text = BASE + (
        "notify:\n  email:\n    to: [plan@example.org]\n    sender: pl@example.org\n"
        "    password_env: PLUMBLINE_SMTP_PASSWORD\n"
    )
    (message,) = problems(text)
    assert "notify.email.username_env: give username_env and password_env together" in message


def test_file_level_problems(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="no such file"):
        load_config(tmp_path / "absent.yaml")
    (tmp_path / "empty.yaml").write_text("# nothing\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="the file is empty"):
        load_config(tmp_path / "empty.yaml")
    (tmp_path / "list.yaml").write_text("- feeds\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="must be a mapping"):
        load_config(tmp_path / "list.yaml")
    (tmp_path / "latin1.yaml").write_bytes(b"timezone: Europe/Z\xfcrich\n")
    with pytest.raises(ConfigError, match="not UTF-8"):
        load_config(tmp_path / "latin1.yaml")


def test_empty_and_misshapen_sections() -> None:
    text = edit("      fdr: 0.10\n", "")  # leaves "thresholds:" with nothing under it
    found = problems(text)
    assert found == [
        f"plumbline.yaml line {line_of(text, 'thresholds:')}: models.pick_hours.thresholds: is "
        "empty: write its keys below it, indented, or leave it out for the defaults"
    ]
    text = edit("    per: depot\n", "    per: depot\n    intercept: maybe\n")
    assert problems(text) == [
        f"plumbline.yaml line {line_of(text, 'maybe')}: models.pick_hours.intercept: should be "
        "true or false, not 'maybe'"
    ]


def test_an_alias_cycle_is_refused() -> None:
    assert problems("feeds: &loop [*loop]\n") == [
        "plumbline.yaml line 1: an alias refers to the value that contains it"
    ]


def test_feeds_do_not_share_an_inbox_or_file_into_one() -> None:
    second = (
        "  other:\n    inbox: feeds/depot/inbox\n    archive: feeds/depot/done\n"
        "    period: week_ending\n    cadence: 7d\n"
    )
    text = edit("models:\n", second + "models:\n")
    inbox_line = [i for i, s in enumerate(text.splitlines(), 1) if "inbox: feeds/depot" in s][1]
    assert problems(text) == [
        f"plumbline.yaml line {inbox_line}: feeds.other.inbox: /srv/plumbline/feeds/depot/inbox "
        "is also the inbox of feed depot_weekly; give each feed its own"
    ]
    looping = edit("    cadence: 7d\n", "    cadence: 7d\n    archive: inbox\n")
    looping = edit("    inbox: feeds/depot/inbox\n", "    inbox: inbox\n", looping)
    (message,) = problems(looping)
    assert f"line {line_of(looping, 'archive: inbox')}: feeds.depot_weekly.archive: " in message
    assert "would be read again as new" in message


def test_yaml_is_loaded_safely() -> None:
    text = BASE + "database: !!python/object/apply:os.system [echo unsafe]\n"
    (message,) = problems(text)
    assert message.startswith(f"plumbline.yaml line {line_of(text, 'database')}: not valid YAML")


def test_a_missing_required_key_points_at_its_parent() -> None:
    text = edit("    response: pick_hours\n    interval", "    interval")
    (message,) = problems(text)
    assert message == (
        f"plumbline.yaml line {line_of(text, '  external:')}: models.external.response: "
        "required key is missing"
    )


# ---------------------------------------------------------------------------------------------
# Paths


def test_relative_paths_resolve_against_the_config_folder(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    folder = tmp_path / "etc" / "plumbline"
    folder.mkdir(parents=True)
    (folder / "plumbline.yaml").write_text(
        "database: ../../var/state.sqlite\n"
        "feeds:\n"
        "  a:\n    inbox: drop/a\n    period: week\n    cadence: 7d\n"
        f"  b:\n    inbox: {tmp_path / 'abs' / 'inbox'}\n    archive: kept\n    period: week\n"
        "    cadence: 7d\n"
        "models:\n  m:\n    feed: a\n    response: y\n    predictors: [x]\n"
        "notify:\n  html_dir: ~/reports\n",
        encoding="utf-8",
    )
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)  # relative to the file's folder, not to the working directory
    config = load_config(Path("../etc/plumbline/plumbline.yaml"))
    assert config.database == tmp_path / "var" / "state.sqlite"
    assert config.feeds["a"].inbox == folder / "drop" / "a"
    assert config.feeds["a"].archive == folder / "drop" / "archive"
    assert config.feeds["b"].inbox == tmp_path / "abs" / "inbox"
    assert config.feeds["b"].archive == folder / "kept"
    assert config.feeds["b"].rejected == tmp_path / "abs" / "rejected"
    assert config.notify.html_dir == Path.home() / "reports"


# ---------------------------------------------------------------------------------------------
# The README's reference against the models


def _readme_reference() -> dict[str, tuple[str, str]]:
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    section = readme.split("<!-- section: config -->")[1].split("<!-- end section: config -->")[0]
    rows: dict[str, tuple[str, str]] = {}
    for line in section.splitlines():
        match = re.match(r"^\| `([^`]+)` \| (.*?) \| (.*) \|$", line)
        if match:
            assert match[1] not in rows, f"{match[1]} documented twice"
            rows[match[1]] = (match[2], match[3])
    return rows


def _walk(model: type[BaseModel], prefix: str) -> dict[str, typing.Any]:
    """Every field of the file, by dotted path, from the pydantic models themselves."""
    fields: dict[str, typing.Any] = {}
    for name, info in model.model_fields.items():
        path = f"{prefix}{name}"
        fields[path] = info
        for nested, is_mapping in _nested_models(info.annotation):
            fields.update(_walk(nested, f"{path}.NAME." if is_mapping else f"{path}."))
    return fields


def _nested_models(annotation: typing.Any) -> list[tuple[type[BaseModel], bool]]:
    found: list[tuple[type[BaseModel], bool]] = []
    origin = typing.get_origin(annotation)
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        found.append((annotation, False))
    elif origin is dict:
        value = typing.get_args(annotation)[1]
        found += [(model, True) for model, _ in _nested_models(value)]
    elif origin in (typing.Union, types.UnionType):
        for arg in typing.get_args(annotation):
            found += _nested_models(arg)
    return found


def _shown(value: typing.Any) -> str:
    """A default as the README writes it: `null`, `true`, `0.95`, `30s`."""
    if value is None:
        return "`null`"
    if isinstance(value, bool):
        return f"`{str(value).lower()}`"
    return f"`{value}`"


def test_readme_documents_every_field_with_its_default() -> None:
    documented = _readme_reference()
    fields = _walk(PlumblineConfig, "")
    assert set(documented) == set(fields), (
        f"undocumented: {sorted(set(fields) - set(documented))}; "
        f"documented but not a field: {sorted(set(documented) - set(fields))}"
    )
    for path, info in fields.items():
        default_cell, meaning_cell = documented[path]
        assert meaning_cell == info.description, path
        if info.is_required():
            assert default_cell == "required", path
        elif SETTINGS_BY_PATH[path].computed is not None:
            # A default worked out from other keys; test_defaults_of_a_minimal_config and the
            # tests beside it check what these defaults come to.
            assert default_cell == SETTINGS_BY_PATH[path].computed, path
        else:
            assert default_cell == _shown(info.default), path


def test_the_settings_table_and_the_models_list_the_same_keys() -> None:
    assert [s.path for s in SETTINGS] == list(dict.fromkeys(s.path for s in SETTINGS))
    assert set(SETTINGS_BY_PATH) == set(_walk(PlumblineConfig, ""))


# ---------------------------------------------------------------------------------------------
# Schedules, helpers, signatures


@pytest.mark.parametrize(
    ("text", "hours"),
    [
        ("0 8 * * mon", {8}),
        ("*/5 * * * *", set(range(24))),
        ("30 6,18 * * mon-fri", {6, 18}),
        ("0 9-17/4 1 jan,jul *", {9, 13, 17}),
        ("15 2 * * sun", {2}),
        ("0 7 * * 1-5", {7}),  # cron's numbers: Monday to Friday
        ("0 7 * * 0,7", {7}),  # both Sunday
        ("0 7 1,15 * mon", {7}),  # both day fields: either day counts, as in cron
        ("0 23 last * *", {23}),
        ("0 12 * * mon-fri/2", {12}),
        ("0 5/10 * * *", {5, 15}),  # from 5 to the end of the field, every 10
    ],
)
def test_cron_expressions(text: str, hours: set[int]) -> None:
    schedule = parse_schedule(text)
    assert isinstance(schedule, CronSchedule)
    assert schedule.expression == text
    assert schedule.hours == hours


def test_accepted_cron_expressions_mean_the_same_to_the_scheduler() -> None:
    # APScheduler 3.x is the scheduler under the daemon (DESIGN.md section 13): the hours we
    # compute must be the hours it fires at. Day names mean the same to it and to cron (numbers
    # do not, which the daemon's own trigger deals with), so these use names.
    from apscheduler.triggers.cron import CronTrigger

    utc = ZoneInfo("UTC")
    for text in (
        "0 8 * * mon",
        "*/20 9-17/4 * jan,jul mon-fri",
        "5 0,12 1-7 * *",
        "0 6 * * sat,sun",
    ):
        schedule = parse_schedule(text)
        assert isinstance(schedule, CronSchedule)
        trigger = CronTrigger.from_crontab(text, timezone=utc)
        fired: set[int] = set()
        moment = datetime(2025, 1, 1, tzinfo=utc)
        for _ in range(200):
            moment = trigger.get_next_fire_time(None, moment + timedelta(seconds=1))
            fired.add(moment.hour)
        assert fired == schedule.hours, text
    assert (
        trigger.get_next_fire_time(None, datetime(2025, 1, 1, tzinfo=utc)).strftime("%a") == "Sat"
    )


def test_a_step_after_a_month_name_is_refused() -> None:
    # APScheduler 3 would drop the step silently and fire every month from January to June.
    with pytest.raises(ValueError, match="step"):
        parse_schedule("0 8 * jan-jun/2 *")


@pytest.mark.parametrize(
    "text",
    [
        "0 8 * * mon",
        "*/5 * * * *",
        "0 8 * * 0",
        "0 8 * * 7",
        "0 8 * * 1-5",
        "0 8 1,15 * mon",
        "0 23 last * *",
        "0 12 * * mon-fri/2",
        "0 5/10 * * *",
        "0 8 * jan,jul *",
        "0 8 * * */2",
        "0 8 1-31/2 * *",
        "0 8 * * sun-sat",
        "0 8 31 feb *",
        "0 8 * * 8",
        "0 25 * * *",
        "0 8 * *",
        "0 8 * * mno",
        "*/0 * * * *",
        "0 8 L * *",
        "0 8 * * sat-sun",
        "60 * * * *",
        "0 8 0 * *",
        "0 8 * 13 *",
        "30s",
        "0s",
    ],
)
def test_the_config_accepts_the_schedules_the_daemon_runs(text: str) -> None:
    from monitor.daemon import validate_schedule

    try:
        validate_schedule(text)
        daemon_runs = True
    except ConfigError:
        daemon_runs = False
    try:
        parse_schedule(text)
        config_accepts = True
    except ValueError:
        config_accepts = False
    assert config_accepts == daemon_runs


def test_durations_as_schedules() -> None:
    assert parse_schedule("30s") == timedelta(seconds=30)
    assert parse_schedule("5m") == timedelta(minutes=5)
    with pytest.raises(ValueError, match="longer than 0s"):
        parse_schedule("0s")


def test_feed_columns() -> None:
    config = parse_config(BASE)
    assert feed_columns(config, "depot_weekly") == {
        "week_ending",
        "depot",
        "order_lines",
        "pick_hours",
        "fc_point",
        "fc_lower",
        "fc_upper",
    }


def test_lookup_suggests_the_nearest_model() -> None:
    config = parse_config(BASE)
    with pytest.raises(UsageError, match=r"no model 'pick_hour' .*\(did you mean 'pick_hours'\?\)"):
        lookup_model(config, "pick_hour")


def test_model_signature_changes_with_what_defines_a_version() -> None:
    signature = model_signature(parse_config(BASE).models["pick_hours"])
    assert re.fullmatch(r"[0-9a-f]{16}", signature)
    assert model_signature(parse_config(BASE).models["pick_hours"]) == signature  # stable
    same = [
        edit("      fdr: 0.10", "      fdr: 0.05"),
        edit("    per: depot\n", "    per: depot\n    level: 0.8\n    window: 52\n"),
        edit("    per: depot\n", "    per: depot\n    owners: [x@example.org]\n"),
    ]
    for text in same:
        assert model_signature(parse_config(text).models["pick_hours"]) == signature
    different = [
        edit("predictors: [order_lines]", "predictors: [order_lines, pallets]"),
        edit("predictors: [order_lines]", "predictors: [pallets]"),
        edit("    per: depot\n", ""),
        edit("    per: depot\n", "    per: depot\n    intercept: false\n"),
        edit("    response: pick_hours\n    predictors", "    response: pallets\n    predictors"),
    ]
    signatures = {model_signature(parse_config(text).models["pick_hours"]) for text in different}
    assert signature not in signatures and len(signatures) == len(different)
