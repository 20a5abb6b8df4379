"""The one table of the config file's keys: each key's default and meaning.

The pydantic models (``monitor.config.models``) take their defaults and descriptions from
``SETTINGS`` through ``setting_field``; ``reference_markdown`` renders the same table for the README
and ``plumbline schema --format markdown``; ``tests/test_config.py`` checks the README's copy
against the models. To add a key: add its row here, then the field that reads it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from pydantic import Field


@dataclass(frozen=True)
class Setting:
    """One key of the file. ``default`` is ``...`` for a required key; ``computed`` says how the
    default is worked out when it depends on other keys (then ``default`` is None)."""

    path: str
    default: Any
    meaning: str
    computed: str | None = None

    @property
    def required(self) -> bool:
        return self.default is ...

    def default_markdown(self) -> str:
        if self.required:
            return "required"
        if self.computed is not None:
            return self.computed
        return f"`{_yaml_text(self.default)}`"


def _yaml_text(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    return str(value)


_SEE_BELOW = "the keys below"

SETTINGS: tuple[Setting, ...] = (
    Setting("database", "state/plumbline.sqlite",
            "The SQLite file holding rows, fits, forecasts, outcomes and findings. Relative "
            "paths in this file resolve against the config file's folder."),
    Setting("timezone", "UTC",
            "IANA time-zone name such as `Europe/Berlin`. Cron schedules run in it, an `--as-of` "
            "time without an offset is read in it, and dates shown to people use it."),
    Setting("feeds", ...,
            "The drop folders, by name (letters, digits, `_`, `-`, `.`). At least one."),
    Setting("models", ...,
            "The regressions to monitor, by name (same characters as feed names). At least one."),
    Setting("schedule", None, "When the daemon scans the inboxes and builds the digest.",
            computed=_SEE_BELOW),
    Setting("notify", None, "Where findings and digests go.", computed=_SEE_BELOW),
    Setting("export", None, "Where each pass writes the forecasts it issued, for other jobs "
            "to take.", computed=_SEE_BELOW),
    Setting("compute", None, "Where the analysis step of a pass runs.", computed=_SEE_BELOW),
    # feeds.NAME
    Setting("feeds.NAME.inbox", ..., "Folder where new data files land."),
    Setting("feeds.NAME.archive", None, "Folder that ingested files move to, byte for byte.",
            computed="`archive` beside the inbox"),
    Setting("feeds.NAME.rejected", None,
            "Folder for files that cannot be used, each with a `NAME.errors.txt` saying why.",
            computed="`rejected` beside the inbox"),
    Setting("feeds.NAME.format", "csv", "`csv` (UTF-8 with a header line) or `parquet`."),
    Setting("feeds.NAME.delimiter", ",",
            "The character between a CSV file's fields: `,`, `;` or a tab (`\"\\t\"`). Files "
            "saved by a spreadsheet in many locales use `;`."),
    Setting("feeds.NAME.decimal", ".",
            "The decimal mark of a CSV file's numbers: `.` or `,` (`1234,5`; then the delimiter "
            "cannot be `,`). Thousands separators are refused either way."),
    Setting("feeds.NAME.period", ..., "Column holding each row's period."),
    Setting("feeds.NAME.period_type", "date",
            "`date` (ISO 8601, e.g. 2024-01-07) or `integer` (years, sequence numbers)."),
    Setting("feeds.NAME.settle", "30s",
            "A file is complete once unchanged this long on the real clock, or at once when "
            "`NAME.ready` stands beside it."),
    Setting("feeds.NAME.cadence", None,
            "Expected spacing of periods: a duration for dates (`7d` weekly; `30d` monthly, leads "
            "then round to whole steps), a whole number of periods for integers. A feed is stale "
            "after 1.5 cadences without a new period; leads count cadence steps.",
            computed="required for date periods; `1` for integer periods"),
    Setting("feeds.NAME.columns", None,
            "Every column a file must have. When given, the models' columns are checked against "
            "it as the config loads, and a file lacking one is rejected whole."),
    # models.NAME
    Setting("models.NAME.feed", ..., "Name of the feed the model reads."),
    Setting("models.NAME.response", ..., "Column of the quantity forecast (y)."),
    Setting("models.NAME.predictors", None,
            "List of predictor columns (x), one or more. Give `predictors` or `interval`, not "
            "both."),
    Setting("models.NAME.interval", None,
            "Instead of predictors: the columns of a forecast made elsewhere, which Plumbline "
            "scores and audits without fitting anything."),
    Setting("models.NAME.interval_method", "model",
            "`model`: issue the model's own interval only. `calibrated`: also issue, beside it, "
            "an interval calibrated on the series' own recent forecast errors (adaptive "
            "conformal inference, Gibbs & Candès 2021), which keeps its coverage over time when "
            "the model's conditions fail; both are stored and audited side by side."),
    Setting("models.NAME.per", None,
            "Column that splits the model into one series per value (one line per depot)."),
    Setting("models.NAME.intercept", True,
            "Fit an intercept. Without one, R², adjusted R² and F are uncentred."),
    Setting("models.NAME.level", 0.95,
            "Nominal coverage of the prediction intervals issued (0.95 = a 95 % interval); "
            "strictly between 0 and 1."),
    Setting("models.NAME.window", 104,
            "Rows in the rolling fit window (the latest rows with a response), at least 3 and "
            "at least `min_rows`; or `all`."),
    Setting("models.NAME.recent", 26,
            "Rows in each block of latest periods whose slopes are compared with the slopes over "
            "the periods monitoring started from (`baseline`); more than p + 1. Also the latest "
            "scored forecasts whose hit rate, misses and bias the `coverage`, `clustered_misses` "
            "and `forecast_bias` findings judge."),
    Setting("models.NAME.min_rows", 10,
            "Below this many rows a series is warming up: no fit, no finding. Must be more than "
            "p + 1, where p counts the coefficients including the intercept."),
    Setting("models.NAME.horizon", None,
            "Periods of sequential monitoring after the periods it started from (`baseline`); "
            "when they pass without an alarm, monitoring starts again from the latest full "
            "window. Also the scored forecasts over which the `coverage` finding's running sum of "
            "the errors' size is judged.", computed="2 × the baseline's length"),
    Setting("models.NAME.baseline", None,
            "The periods monitoring starts from, fixed as `{start, end}` (pages and messages name "
            "them by their dates); without it, each series' first full window."),
    Setting("models.NAME.owners", None, "E-mail addresses that receive this model's findings.",
            computed="`notify.email.to`"),
    Setting("models.NAME.thresholds", None, "Decision thresholds of the findings.",
            computed=_SEE_BELOW),
    Setting("models.NAME.interval.point", ..., "Column of the point forecast."),
    Setting("models.NAME.interval.lower", ..., "Column of the interval's lower bound."),
    Setting("models.NAME.interval.upper", ..., "Column of the interval's upper bound."),
    Setting("models.NAME.interval.level", ...,
            "Nominal coverage the interval was made for, strictly between 0 and 1."),
    Setting("models.NAME.baseline.start", ...,
            "First period of the baseline (inclusive): a date for a date feed, an integer for "
            "an integer feed."),
    Setting("models.NAME.baseline.end", ..., "Last period of the baseline (inclusive)."),
    Setting("models.NAME.thresholds.significance", 0.05,
            "Level of every test behind a finding (not the interval's level)."),
    Setting("models.NAME.thresholds.fdr", 0.10,
            "Benjamini–Hochberg false-discovery rate across the series of the model, per "
            "finding kind."),
    Setting("models.NAME.thresholds.min_scored", 12,
            "Scored forecasts needed before a `coverage` finding can be raised."),
    Setting("models.NAME.thresholds.min_r2", None,
            "`weak_fit` when R² falls below this; `null` turns the rule off."),
    Setting("models.NAME.thresholds.max_r2_drop", 0.2,
            "`weak_fit` when R² falls by more than this from the baseline's."),
    Setting("models.NAME.thresholds.clear_after", 2,
            "Consecutive passes a condition must be false before its finding clears."),
    # schedule
    Setting("schedule.scan", "30s",
            "How often the daemon looks for complete files: a duration or a five-field cron "
            "expression."),
    Setting("schedule.digest", "0 8 * * mon",
            "When the digest is built and sent: a five-field cron expression read in "
            "`timezone`, or a duration."),
    # export
    Setting("export.folder", "exports",
            "Folder of the forecast files: one subfolder per model, one file per pass that "
            "issued forecasts for it (`exports/NAME/pass-000012.csv`), written under a temporary "
            "name starting with `.` and renamed when complete."),
    Setting("export.format", "csv",
            "`csv` (UTF-8, a header line, `.` decimals, ISO 8601 times) or `parquet`."),
    # notify
    Setting("notify.html_dir", "reports", "Folder for the HTML pages and digests."),
    Setting("notify.email", None, "SMTP settings; without them Plumbline writes HTML only."),
    Setting("notify.email.to", ...,
            "Recipients of the digest, and the owners of every model that names none."),
    Setting("notify.email.sender", ..., "The From address."),
    Setting("notify.email.smtp_host", "localhost", "The SMTP server."),
    Setting("notify.email.security", "none",
            "`none`, `starttls` (upgrade a plain connection) or `tls` (TLS from the start)."),
    Setting("notify.email.smtp_port", None, "The SMTP server's port.",
            computed="`25`; `587` with starttls; `465` with tls"),
    Setting("notify.email.username_env", None,
            "Name of the environment variable holding the SMTP user name (secrets never go in "
            "this file)."),
    Setting("notify.email.password_env", None,
            "Name of the environment variable holding the SMTP password."),
    Setting("notify.email.timeout", "30s", "How long to wait for the SMTP server."),
    # compute
    Setting("compute.engine", "local",
            "`local`: the analysis runs in the pass's own process, one model at a time. `dask`: "
            "each model's series are split into batches analysed on a Dask cluster (install "
            "`plumbline[dask]`); ingest, the database and notification stay in the pass's "
            "process, and the results are recorded as with `local`."),
    Setting("compute.scheduler", None,
            "With `dask`: the address of a running Dask scheduler, `tcp://HOST:PORT`. Give this "
            "or `workers`, not both."),
    Setting("compute.workers", None,
            "With `dask`: instead of a scheduler, start this many local worker processes (one "
            "thread each, listening on 127.0.0.1 only) for the pass, or for the daemon's life."),
    Setting("compute.batch_size", 2000,
            "With `dask`: series per batch, the unit of work sent to a worker and run again "
            "when a worker is lost."),
    Setting("compute.connect_timeout", "10s",
            "With `dask`: how long to wait for the scheduler; a pass that cannot reach it stops "
            "with exit status 2 before recording anything."),
)  # fmt: skip

SETTINGS_BY_PATH: dict[str, Setting] = {setting.path: setting for setting in SETTINGS}


def setting_field(path: str, *, section: bool = False, **constraints: Any) -> Any:
    """A pydantic Field whose default and description come from ``SETTINGS``.

    ``section=True`` marks a nested section (``thresholds``, ``schedule``, ``notify``): when the
    file leaves it out it is validated from an empty mapping, with the same context as the rest
    (so its relative paths resolve against the config file's folder too).
    """
    setting = SETTINGS_BY_PATH[path]
    extra: dict[str, Any] = {"description": setting.meaning, **constraints}
    if setting.required:
        return Field(..., **extra)
    if section:
        return Field(default_factory=dict, validate_default=True, **extra)
    if setting.computed is not None:
        # None stands for "work it out"; the schema should not advertise null as the default.
        extra["json_schema_extra"] = _drop_default
    return Field(default=setting.default, validate_default=True, **extra)


def _drop_default(schema: dict[str, Any]) -> None:
    schema.pop("default", None)


def reference_markdown() -> str:
    """The config reference as a Markdown table (the README carries it; a test compares)."""
    rows = ["| key | default | meaning |", "|---|---|---|"]
    rows += [f"| `{s.path}` | {s.default_markdown()} | {s.meaning} |" for s in SETTINGS]
    return "\n".join(rows) + "\n"


__all__ = ["SETTINGS", "SETTINGS_BY_PATH", "Setting", "reference_markdown", "setting_field"]
