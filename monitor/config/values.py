"""Value types of the config file (names, columns, addresses, durations, windows, periods) and
the ``Problem`` record that validators raise and the loader prints."""

from __future__ import annotations

import os
import re
from collections.abc import Iterable
from datetime import date, datetime, timedelta
from pathlib import Path
from typing import Annotated, Any, Literal, NamedTuple

from pydantic import AfterValidator, BeforeValidator, Field, ValidationInfo, WithJsonSchema
from pydantic_core import PydanticCustomError

from monitor.config.schedule import parse_schedule
from monitor.text import did_you_mean, parse_duration

Loc = tuple[str | int, ...]


class Problem(NamedTuple):
    """One thing wrong with the file: where (YAML path), what, and the line when known."""

    loc: Loc
    message: str
    line: int | None = None


_NAME = re.compile(r"^[A-Za-z0-9_][A-Za-z0-9_.-]*$")
_ADDRESS = re.compile(r"^[^@\s,;:<>()\"'\[\]]+@[^@\s,;:<>()\"'\[\]]+$")
_ENV_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
DURATION_SCHEMA = {"type": "string", "pattern": r"^\s*\d+(\.\d+)?\s*[smhd]\s*$"}


def _check_name(value: str) -> str:
    if not _NAME.match(value):
        raise ValueError(
            f"name {value!r} may hold only letters, digits, '_', '-' and '.', and must not "
            "start with '.' or '-' (names become parts of file names)"
        )
    return value


def _check_column(value: str) -> str:
    if not value.strip():
        raise ValueError("a column name cannot be empty")
    return value


def _check_address(value: str) -> str:
    if not _ADDRESS.match(value):
        raise ValueError(f"{value!r} is not an e-mail address like name@example.org")
    return value


def _check_env_name(value: str) -> str:
    if not _ENV_NAME.match(value):
        raise ValueError(  # the value is never echoed: it may be the secret itself
            "is not an environment variable name (the value is not shown: it may be a secret); "
            "give the name of the variable that holds the secret, e.g. PLUMBLINE_SMTP_PASSWORD"
        )
    return value


_SCHEDULER = re.compile(r"^tcp://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):(\d{1,5})$")


def _check_scheduler(value: str) -> str:
    found = _SCHEDULER.match(value)
    if found is None or not 1 <= int(found.group(2)) <= 65535:
        raise ValueError(
            f"{value!r} is not a scheduler address; write tcp://HOST:PORT, e.g. "
            "tcp://dask-scheduler:8786"
        )
    return value


def duration_value(value: Any) -> timedelta:
    if isinstance(value, timedelta):
        return value
    if isinstance(value, str):
        return parse_duration(value)
    raise ValueError(
        f"{value!r} is not a duration; write <number><unit> with unit s, m, h or d, e.g. 30s"
    )


def _window_value(value: Any) -> int | str:
    if value == "all":
        return "all"
    if isinstance(value, int) and not isinstance(value, bool):
        if value < 3:
            raise ValueError(f"window {value} is too short: at least 3 rows, or all")
        return value
    raise ValueError(f"window is a whole number of rows (at least 3) or all, not {value!r}")


def _period_value(value: Any) -> date | int:
    if isinstance(value, datetime):
        raise ValueError(f"{value} is a time; a baseline bound is a date or an integer period")
    if isinstance(value, date):
        return value
    if isinstance(value, int) and not isinstance(value, bool):
        return value
    if isinstance(value, str):
        try:
            return date.fromisoformat(value.strip())
        except ValueError:
            pass
    raise ValueError(f"{value!r} is neither an ISO date (2024-01-07) nor an integer period")


def _schedule_value(value: Any) -> str:
    if not isinstance(value, str):
        raise ValueError(
            f"{value!r} is not a schedule; write a duration such as 30s or a cron expression in "
            'quotes such as "0 8 * * mon"'
        )
    text = " ".join(value.split())
    parse_schedule(text)
    return text


Name = Annotated[str, AfterValidator(_check_name)]
ColumnName = Annotated[str, AfterValidator(_check_column)]
Address = Annotated[str, AfterValidator(_check_address)]
EnvName = Annotated[str, AfterValidator(_check_env_name)]
SchedulerAddress = Annotated[
    str,
    AfterValidator(_check_scheduler),
    WithJsonSchema({"type": "string", "pattern": _SCHEDULER.pattern}),
]
Duration = Annotated[timedelta, BeforeValidator(duration_value), WithJsonSchema(DURATION_SCHEMA)]
Window = Annotated[
    int | Literal["all"],
    BeforeValidator(_window_value),
    WithJsonSchema({"anyOf": [{"type": "integer", "minimum": 3}, {"const": "all"}]}),
]
PeriodBound = Annotated[
    date | int,
    BeforeValidator(_period_value),
    WithJsonSchema({"anyOf": [{"type": "string", "format": "date"}, {"type": "integer"}]}),
]
ScheduleText = Annotated[str, BeforeValidator(_schedule_value)]
Fraction = Annotated[float, Field(gt=0, lt=1)]


def resolve_path(path: Path, info: ValidationInfo) -> Path:
    """Relative paths resolve against the config file's folder (``context['base_dir']``)."""
    path = path.expanduser()
    base = (info.context or {}).get("base_dir")
    if base is not None and not path.is_absolute():
        path = Path(os.path.normpath(Path(base) / path))
    return path


def problems_error(problems: list[Problem]) -> PydanticCustomError:
    """Several problems, each with a location relative to the model that raises it."""
    return PydanticCustomError(
        "plumbline_problems", "{count} problem(s)", {"count": len(problems), "problems": problems}
    )


def path_text(loc: Loc) -> str:
    """A location as people read it: ``models.pick_hours.predictors[0]``."""
    text = ""
    for part in loc:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
    return text


def unknown_feed(feed: str, feeds: Iterable[Any]) -> str:
    """The message for a model naming a feed that is not declared."""
    names = [str(name) for name in feeds]
    return (
        f"feed '{feed}' is not declared{did_you_mean(feed, names)}; "
        f"feeds are: {', '.join(names) or 'none'}"
    )


__all__ = [
    "Address",
    "ColumnName",
    "Duration",
    "EnvName",
    "Fraction",
    "Loc",
    "Name",
    "PeriodBound",
    "Problem",
    "ScheduleText",
    "SchedulerAddress",
    "Window",
    "path_text",
    "problems_error",
    "resolve_path",
    "unknown_feed",
]
