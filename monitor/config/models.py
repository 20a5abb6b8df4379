"""The pydantic models of the config file (DESIGN.md section 8) and the helpers a pass needs.

Validators that find several problems raise them together as one ``plumbline_problems`` error whose
context lists ``Problem``s with locations relative to the model, so that the loader can name the
exact YAML path and line of each. Cross-references (a model's feed, its columns against a feed's
declared ``columns``, baseline bounds against ``period_type``) are checked by ``PlumblineConfig``.
"""

from __future__ import annotations

import hashlib
import json
import os
from datetime import timedelta
from pathlib import Path
from typing import Annotated, Any, Literal, TypeVar
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError, available_timezones

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    ValidationInfo,
    WithJsonSchema,
    field_validator,
    model_validator,
)

from monitor.config.settings import setting_field as _field
from monitor.config.values import (
    DURATION_SCHEMA,
    Address,
    ColumnName,
    Duration,
    EnvName,
    Fraction,
    Loc,
    Name,
    PeriodBound,
    Problem,
    SchedulerAddress,
    ScheduleText,
    Window,
    duration_value,
    path_text,
    problems_error,
    resolve_path,
    unknown_feed,
)
from monitor.errors import UsageError
from monitor.text import did_you_mean

_T = TypeVar("_T")


# --------------------------------------------------------------------------------------------
# The models of the file.


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid")


class Feed(_Section):
    """A drop folder and the format of the files that land in it."""

    inbox: Path = _field("feeds.NAME.inbox")
    archive: Path = _field("feeds.NAME.archive")
    rejected: Path = _field("feeds.NAME.rejected")
    format: Literal["csv", "parquet"] = _field("feeds.NAME.format")
    delimiter: Literal[",", ";", "\t"] = _field("feeds.NAME.delimiter")
    decimal: Literal[".", ","] = _field("feeds.NAME.decimal")
    period: ColumnName = _field("feeds.NAME.period")
    period_type: Literal["date", "integer"] = _field("feeds.NAME.period_type")
    settle: Duration = _field("feeds.NAME.settle")
    cadence: Annotated[
        timedelta | int,
        WithJsonSchema({"anyOf": [DURATION_SCHEMA, {"type": "integer", "minimum": 1}]}),
    ] = _field("feeds.NAME.cadence")
    columns: list[ColumnName] | None = _field("feeds.NAME.columns")

    @field_validator("inbox", mode="after")
    @classmethod
    def _resolve_inbox(cls, value: Path, info: ValidationInfo) -> Path:
        return resolve_path(value, info)

    @field_validator("archive", "rejected", mode="before")
    @classmethod
    def _beside_inbox(cls, value: Any, info: ValidationInfo) -> Any:
        if value is None:
            inbox = info.data.get("inbox")
            return (inbox.parent if inbox is not None else Path()) / str(info.field_name)
        return value

    @field_validator("archive", "rejected", mode="after")
    @classmethod
    def _resolve_folders(cls, value: Path, info: ValidationInfo) -> Path:
        return resolve_path(value, info)

    @field_validator("cadence", mode="before")
    @classmethod
    def _cadence(cls, value: Any, info: ValidationInfo) -> timedelta | int:
        integer = info.data.get("period_type") == "integer"
        if integer:
            if value is None:
                return 1
            if isinstance(value, int) and not isinstance(value, bool) and value >= 1:
                return value
            raise ValueError(
                f"for integer periods the cadence is a whole number of periods, at least 1 "
                f"(e.g. 1), not {value!r}"
            )
        if value is None:
            raise ValueError(
                "required for date periods: the expected spacing of periods, e.g. 7d for weekly "
                "data or 30d for monthly"
            )
        step = duration_value(value)
        if step <= timedelta(0):
            raise ValueError("the cadence must be longer than 0s")
        return step

    @model_validator(mode="after")
    def _declared_columns(self) -> Feed:
        problems: list[Problem] = []
        if self.decimal == "," and self.delimiter == ",":
            problems.append(Problem(("decimal",), "with decimal ',' the fields cannot also be "
                                    "separated by ','; set delimiter: ';' (the usual pair)"))
        if self.format == "parquet":
            problems += [Problem((key,), f"{key} applies to CSV feeds only; Parquet files carry "
                                 "typed columns")
                         for key in ("delimiter", "decimal") if key in self.model_fields_set]
        if self.columns is None:
            if problems:
                raise problems_error(problems)
            return self
        seen: set[str] = set()
        for index, column in enumerate(self.columns):
            if column in seen:
                problems.append(Problem(("columns", index), f"column '{column}' is listed twice"))
            seen.add(column)
        if self.period not in seen:
            problems.append(
                Problem(
                    ("period",),
                    f"column '{self.period}' not in columns{did_you_mean(self.period, seen)}",
                )
            )
        if problems:
            raise problems_error(problems)
        return self


class IntervalColumns(_Section):
    """The columns of an interval forecast made elsewhere, to be scored and audited only."""

    point: ColumnName = _field("models.NAME.interval.point")
    lower: ColumnName = _field("models.NAME.interval.lower")
    upper: ColumnName = _field("models.NAME.interval.upper")
    level: Fraction = _field("models.NAME.interval.level")


class Baseline(_Section):
    """A fixed baseline, both bounds inclusive."""

    start: PeriodBound = _field("models.NAME.baseline.start")
    end: PeriodBound = _field("models.NAME.baseline.end")

    @model_validator(mode="after")
    def _in_order(self) -> Baseline:
        if isinstance(self.start, int) != isinstance(self.end, int):
            raise problems_error(
                [Problem(("end",), "start and end must both be dates or both integers")]
            )
        if self.start > self.end:  # type: ignore[operator]
            raise problems_error(
                [Problem(("end",), f"end {self.end} is before start {self.start}")]
            )
        return self


class Thresholds(_Section):
    """The decision thresholds of DESIGN.md section 7."""

    significance: Fraction = _field("models.NAME.thresholds.significance")
    fdr: Annotated[float, Field(gt=0, le=1)] = _field("models.NAME.thresholds.fdr")
    min_scored: int = _field("models.NAME.thresholds.min_scored", ge=1)
    min_r2: Annotated[float, Field(ge=0, le=1)] | None = _field("models.NAME.thresholds.min_r2")
    max_r2_drop: Annotated[float, Field(gt=0, le=1)] = _field("models.NAME.thresholds.max_r2_drop")
    clear_after: int = _field("models.NAME.thresholds.clear_after", ge=1)


# Keys that only mean something when Plumbline fits the model itself.
_FIT_ONLY = ("intercept", "level", "window", "recent", "min_rows", "horizon", "baseline")


class Model(_Section):
    """A regression to refit and monitor, or (with ``interval``) a forecast made elsewhere."""

    feed: str = _field("models.NAME.feed")
    response: ColumnName = _field("models.NAME.response")
    predictors: list[ColumnName] | None = _field("models.NAME.predictors")
    interval: IntervalColumns | None = _field("models.NAME.interval")
    interval_method: Literal["model", "calibrated"] = _field("models.NAME.interval_method")
    per: ColumnName | None = _field("models.NAME.per")
    intercept: bool = _field("models.NAME.intercept")
    level: Fraction = _field("models.NAME.level")
    window: Window = _field("models.NAME.window")
    recent: int = _field("models.NAME.recent")
    min_rows: int = _field("models.NAME.min_rows")
    horizon: Annotated[int, Field(ge=1)] | None = _field("models.NAME.horizon")
    baseline: Baseline | None = _field("models.NAME.baseline")
    owners: list[Address] | None = _field("models.NAME.owners")
    thresholds: Thresholds = _field("models.NAME.thresholds", section=True)

    @property
    def fitted(self) -> bool:
        """True for a model Plumbline fits; False for an audited interval forecast."""
        return self.predictors is not None

    @property
    def parameter_count(self) -> int:
        """p: coefficients including the intercept (0 for an audited interval)."""
        return len(self.predictors or ()) + (1 if self.intercept and self.fitted else 0)

    @property
    def calibrated(self) -> bool:
        """True when a calibrated interval is issued beside the model's own."""
        return self.interval_method == "calibrated"

    @property
    def nominal_level(self) -> float:
        """The coverage the intervals are meant to have: ``level``, or ``interval.level``."""
        return self.interval.level if self.interval is not None else self.level

    def column_roles(self) -> list[tuple[Loc, str]]:
        """Each column the model reads, with the key (relative YAML path) that names it."""
        roles: list[tuple[Loc, str]] = [(("response",), self.response)]
        roles += [(("predictors", i), name) for i, name in enumerate(self.predictors or ())]
        if self.interval is not None:
            roles += [(("interval", key), getattr(self.interval, key))
                      for key in ("point", "lower", "upper")]  # fmt: skip
        if self.per is not None:
            roles.append((("per",), self.per))
        return roles

    @property
    def columns(self) -> tuple[str, ...]:
        """The columns the model reads, in the order of ``column_roles``."""
        return tuple(name for _, name in self.column_roles())

    @model_validator(mode="after")
    def _consistent(self) -> Model:
        problems: list[Problem] = []
        if self.predictors is None and self.interval is None:
            problems.append(Problem((), _NEITHER))
        elif self.predictors is not None and self.interval is not None:
            problems.append(Problem(("interval",), "give predictors or interval, not both"))
        elif self.predictors is not None and not self.predictors:
            problems.append(Problem(("predictors",), "give at least one predictor"))
        seen: dict[str, Loc] = {}
        for loc, column in self.column_roles():
            if column in seen:
                first = path_text(seen[column])
                problems.append(Problem(loc, f"column '{column}' is already the model's {first}"))
            seen.setdefault(column, loc)
        if self.fitted:
            p = self.parameter_count
            for key in ("min_rows", "recent"):
                rows = getattr(self, key)
                if rows <= p + 1:
                    message = f"{key} {rows} is too small for {p} coefficient(s): it must be "
                    message += f"more than p + 1 = {p + 1}, so at least {p + 2}"
                    problems.append(Problem((key,), message))
            if isinstance(self.window, int) and self.window < self.min_rows:
                message = f"window {self.window} is shorter than min_rows {self.min_rows}: "
                problems.append(Problem(("window",), message + "the series would never be fitted"))
        elif self.interval is not None:
            problems += [Problem((key,), _FIT_ONLY_MESSAGE.format(key=key))
                         for key in _FIT_ONLY if key in self.model_fields_set]  # fmt: skip
        if problems:
            raise problems_error(problems)
        return self


_NEITHER = (
    "give predictors (columns to fit) or interval (columns of a forecast made elsewhere, to "
    "audit), one of the two"
)
_FIT_ONLY_MESSAGE = (
    "{key} applies to fitted models only; this model audits the interval columns (their "
    "level goes in interval.level)"
)


class Schedule(_Section):
    """When the daemon works."""

    scan: ScheduleText = _field("schedule.scan")
    digest: ScheduleText = _field("schedule.digest")


class Compute(_Section):
    """Where the analysis step runs (``monitor.compute``)."""

    engine: Literal["local", "dask"] = _field("compute.engine")
    scheduler: SchedulerAddress | None = _field("compute.scheduler")
    workers: int | None = _field("compute.workers", ge=1, le=256)
    batch_size: int = _field("compute.batch_size", ge=1)
    connect_timeout: Duration = _field("compute.connect_timeout")

    @model_validator(mode="after")
    def _one_source(self) -> Compute:
        problems: list[Problem] = []
        if self.engine == "local":
            problems += [
                Problem((key,), f"{key} applies to engine dask only; this config runs the "
                                "analysis locally (engine: local)")
                for key in ("scheduler", "workers") if getattr(self, key) is not None
            ]
        elif (self.scheduler is None) == (self.workers is None):
            message = ("engine dask needs a scheduler address (tcp://HOST:PORT) or a number of "
                       "local worker processes (workers), one of the two")
            problems.append(Problem(("scheduler",) if self.scheduler else (), message))
        if self.connect_timeout <= timedelta(0):
            problems.append(Problem(("connect_timeout",), "the timeout must be longer than 0s"))
        if problems:
            raise problems_error(problems)
        return self


class Email(_Section):
    """SMTP settings; the secrets are named here and read from the environment."""

    to: list[Address] = _field("notify.email.to", min_length=1)
    sender: Address = _field("notify.email.sender")
    smtp_host: Annotated[str, Field(min_length=1)] = _field("notify.email.smtp_host")
    security: Literal["none", "starttls", "tls"] = _field("notify.email.security")
    smtp_port: int = _field("notify.email.smtp_port", ge=1, le=65535)
    username_env: EnvName | None = _field("notify.email.username_env")
    password_env: EnvName | None = _field("notify.email.password_env")
    timeout: Duration = _field("notify.email.timeout")

    @field_validator("smtp_port", mode="before")
    @classmethod
    def _port_for_security(cls, value: Any, info: ValidationInfo) -> Any:
        if value is None:
            return {"starttls": 587, "tls": 465}.get(info.data.get("security", "none"), 25)
        return value

    @model_validator(mode="after")
    def _credentials_paired(self) -> Email:
        if (self.username_env is None) != (self.password_env is None):
            missing = "password_env" if self.password_env is None else "username_env"
            raise problems_error(
                [Problem((missing,), "give username_env and password_env together")]
            )
        if self.timeout <= timedelta(0):
            raise problems_error([Problem(("timeout",), "the timeout must be longer than 0s")])
        return self


class Notify(_Section):
    """Where reports go."""

    html_dir: Path = _field("notify.html_dir")
    email: Email | None = _field("notify.email")

    @field_validator("html_dir", mode="after")
    @classmethod
    def _resolve_html_dir(cls, value: Path, info: ValidationInfo) -> Path:
        return resolve_path(value, info)


class Export(_Section):
    """Where each pass writes the forecasts it issued."""

    folder: Path = _field("export.folder")
    format: Literal["csv", "parquet"] = _field("export.format")

    @field_validator("folder", mode="after")
    @classmethod
    def _resolve_folder(cls, value: Path, info: ValidationInfo) -> Path:
        return resolve_path(value, info)

    def model_folder(self, model: str) -> Path:
        """The folder of one model's forecast files."""
        return self.folder / model


class PlumblineConfig(_Section):
    """The whole file. After loading, every path is absolute (resolved against the file's folder),
    every default is filled in, and each model's ``owners`` is a list (``notify.email.to`` when
    the model names none; empty when there is no e-mail)."""

    model_config = ConfigDict(extra="forbid", title="Plumbline configuration")

    database: Path = _field("database")
    timezone: str = _field("timezone")
    feeds: dict[Name, Feed] = _field("feeds")
    models: dict[Name, Model] = _field("models")
    schedule: Schedule = _field("schedule", section=True)
    notify: Notify = _field("notify", section=True)
    export: Export = _field("export", section=True)
    compute: Compute = _field("compute", section=True)

    _source: Path | None = PrivateAttr(default=None)

    @property
    def source(self) -> Path | None:
        """The file this config was read from (None when parsed from text without one)."""
        return self._source

    @property
    def zone(self) -> ZoneInfo:
        return ZoneInfo(self.timezone)

    @field_validator("database", mode="after")
    @classmethod
    def _resolve_database(cls, value: Path, info: ValidationInfo) -> Path:
        return resolve_path(value, info)

    @field_validator("timezone", mode="after")
    @classmethod
    def _known_zone(cls, value: str) -> str:
        try:
            ZoneInfo(value)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError(
                f"unknown time zone {value!r}{did_you_mean(value, available_timezones())}; "
                "write an IANA name such as Europe/Berlin or UTC"
            ) from None
        return value

    @model_validator(mode="after")
    def _cross_references(self) -> PlumblineConfig:
        problems: list[Problem] = []
        for key in ("feeds", "models"):
            if not getattr(self, key):
                problems.append(Problem((key,), f"declare at least one {key[:-1]}"))
        problems += _shared_folders(self.feeds)
        problems += _never_inputs(self)
        default_owners = list(self.notify.email.to) if self.notify.email is not None else []
        for name, model in self.models.items():
            if model.owners is None:
                model.owners = list(default_owners)
            feed = self.feeds.get(model.feed)
            if feed is None:
                problems.append(
                    Problem(("models", name, "feed"), unknown_feed(model.feed, self.feeds))
                )
                continue
            problems += [
                Problem(("models", name, *loc), message)
                for loc, message in _against_feed(model, feed)
            ]
        if problems:
            raise problems_error(problems)
        return self


def _shared_folders(feeds: dict[str, Feed]) -> list[Problem]:
    """Each inbox belongs to one feed, and no feed files into an inbox (a moved file would come
    back as new)."""
    inboxes: dict[Path, str] = {}
    problems: list[Problem] = []
    for name, feed in feeds.items():
        owner = inboxes.setdefault(feed.inbox, name)
        if owner != name:
            message = f"{feed.inbox} is also the inbox of feed {owner}; give each feed its own"
            problems.append(Problem(("feeds", name, "inbox"), message))
    for name, feed in feeds.items():
        for key in ("archive", "rejected"):
            folder = getattr(feed, key)
            if folder in inboxes:
                message = f"{folder} is the inbox of feed {inboxes[folder]}; files moved there "
                message += "would be read again as new"
                problems.append(Problem(("feeds", name, key), message))
    return problems


def _never_inputs(config: PlumblineConfig) -> list[Problem]:
    """The database and the report pages live outside every drop folder: a database in an inbox
    would be taken as a bad file and moved away from under the pass, and pages written into an
    inbox would be read back as data at every scan. Compared after resolving symbolic links."""
    folders: list[tuple[str, Path]] = []
    for name, feed in config.feeds.items():
        for key in ("inbox", "archive", "rejected"):
            folder = Path(os.path.realpath(getattr(feed, key)))
            folders.append((f"the {key} of feed {name}", folder))
    problems: list[Problem] = []
    checks: tuple[tuple[Loc, str, Path], ...] = (
        (("database",), "the database", config.database),
        (("notify", "html_dir"), "the reports folder", config.notify.html_dir),
    )
    for loc, what, path in checks:
        real = Path(os.path.realpath(path))
        for label, folder in folders:
            if real == folder or folder in real.parents:
                where = "is" if real == folder else "is inside"
                problems.append(Problem(loc, (
                    f"{path} {where} {label} ({folder}); {what} must be outside every inbox, "
                    "archive and rejected folder, where it would be read or moved as a data file"
                )))
                break
    return problems


def _against_feed(model: Model, feed: Feed) -> list[tuple[Loc, str]]:
    """A model's columns and baseline checked against the feed it reads."""
    found: list[tuple[Loc, str]] = []
    for loc, column in model.column_roles():
        if column == feed.period:
            found.append((loc, f"'{column}' is the period column of feed {model.feed}; a model "
                               "cannot also use it as a column"))  # fmt: skip
        elif feed.columns is not None and column not in feed.columns:
            hint = did_you_mean(column, feed.columns)
            found.append((loc, f"column '{column}' not in feed {model.feed}{hint}"))
    if model.baseline is not None:
        wants_int = feed.period_type == "integer"
        kind = "an integer" if wants_int else "a date (2024-01-07)"
        for key in ("start", "end"):
            if isinstance(getattr(model.baseline, key), int) != wants_int:
                message = f"feed {model.feed} has {feed.period_type} periods, so the "
                found.append((("baseline", key), message + f"baseline's {key} must be {kind}"))
    return found


# Which model class describes the keys under each YAML path (NAME stands for any feed or model).
SECTIONS: dict[str, type[BaseModel]] = {
    "": PlumblineConfig,
    "feeds.NAME": Feed,
    "models.NAME": Model,
    "models.NAME.interval": IntervalColumns,
    "models.NAME.baseline": Baseline,
    "models.NAME.thresholds": Thresholds,
    "schedule": Schedule,
    "notify": Notify,
    "notify.email": Email,
    "export": Export,
    "compute": Compute,
}


# --------------------------------------------------------------------------------------------
# Helpers for the pass, the daemon and the commands.


def feed_columns(config: PlumblineConfig, feed: str) -> frozenset[str]:
    """The columns a file of ``feed`` must have for its models: the period column plus each
    model's response, predictors or interval columns, and ``per``."""
    columns = {lookup_feed(config, feed).period}
    for model in config.models.values():
        if model.feed == feed:
            columns.update(model.columns)
    return frozenset(columns)


def models_of_feed(config: PlumblineConfig, feed: str) -> dict[str, Model]:
    """The models that read ``feed``, by name, in file order."""
    return {name: model for name, model in config.models.items() if model.feed == feed}


def model_signature(model: Model) -> str:
    """A stable 16-hex-digit hash of what defines a model version (DESIGN.md section 6): the
    response, the predictors in order (or the interval columns), ``per`` and ``intercept``.
    Editing any of these starts a new version; thresholds, owners, level and windows do not."""
    interval = model.interval
    payload = {
        "scheme": 1,
        "response": model.response,
        "predictors": list(model.predictors) if model.predictors is not None else None,
        "interval": [interval.point, interval.lower, interval.upper] if interval else None,
        "per": model.per,
        "intercept": model.intercept,
    }
    text = json.dumps(payload, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def lookup_feed(config: PlumblineConfig, name: str) -> Feed:
    """The feed called ``name``; an unknown name raises UsageError with the nearest one."""
    return _lookup(config.feeds, name, "feed")


def lookup_model(config: PlumblineConfig, name: str) -> Model:
    """The model called ``name``; an unknown name raises UsageError with the nearest one."""
    return _lookup(config.models, name, "model")


def _lookup(table: dict[str, _T], name: str, what: str) -> _T:
    if name not in table:
        raise UsageError(f"no {what} '{name}' in the config{did_you_mean(name, table)}; "
                         f"{what}s are: {', '.join(table) or 'none'}")  # fmt: skip
    return table[name]


def config_json_schema() -> dict[str, Any]:
    """The JSON Schema (draft 2020-12) of the config file, descriptions from ``SETTINGS``."""
    schema = PlumblineConfig.model_json_schema()
    return {"$schema": "https://json-schema.org/draft/2020-12/schema", **schema}


__all__ = [
    "SECTIONS",
    "Baseline",
    "Compute",
    "Email",
    "Export",
    "Feed",
    "IntervalColumns",
    "Loc",
    "Model",
    "Notify",
    "PlumblineConfig",
    "Problem",
    "Schedule",
    "Thresholds",
    "config_json_schema",
    "feed_columns",
    "lookup_feed",
    "lookup_model",
    "model_signature",
    "models_of_feed",
]
