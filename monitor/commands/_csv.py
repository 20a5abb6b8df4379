"""Reading a CSV named on the command line (``fit``, ``breaks``) with one-line, exit-2 errors."""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from monitor.errors import InputFileError, UsageError
from monitor.text import did_you_mean


@dataclass(frozen=True)
class CsvTable:
    """A CSV's header and rows as text, with each row's line number in the file (header = 1)."""

    path: Path
    header: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    line_numbers: tuple[int, ...]

    def column_text(self, name: str) -> list[str]:
        """The raw text of one column; an unknown name raises with the nearest suggestion."""
        if name not in self.header:
            raise InputFileError(
                f"{self.path.name}: column '{name}' not found{did_you_mean(name, self.header)}; "
                f"columns are {', '.join(self.header)}"
            )
        index = self.header.index(name)
        return [row[index] for row in self.rows]

    def numeric_column(self, name: str) -> list[float]:
        """One column as floats; text, NaN or infinity raises naming the line and the value."""
        values: list[float] = []
        for text, line in zip(self.column_text(name), self.line_numbers, strict=True):
            stripped = text.strip()
            try:
                value = float(stripped)
            except ValueError:
                shown = repr(stripped) if stripped else "an empty value"
                raise InputFileError(
                    f"{self.path.name} line {line}: column '{name}' holds {shown} where a "
                    "number is needed"
                ) from None
            if not math.isfinite(value):
                raise InputFileError(
                    f"{self.path.name} line {line}: column '{name}' holds {stripped!r}, "
                    "which is not a finite number"
                )
            values.append(value)
        return values


def check_model_names(response: str, predictors: Sequence[str], intercept: bool) -> None:
    """A response and predictors that can make one model: no name twice, none in two roles."""
    seen: set[str] = set()
    for name in predictors:
        if name in seen:
            raise UsageError(f"--predictors names {name!r} twice")
        seen.add(name)
    if response in seen:
        raise UsageError(f"column {response!r} is both the response and a predictor")
    if intercept and "intercept" in seen:
        raise UsageError(
            "a predictor column named 'intercept' clashes with the intercept term; rename the "
            "column or give --no-intercept"
        )


def read_csv_table(path: str | Path) -> CsvTable:
    """Read a UTF-8 CSV with a header; blank lines are skipped, ragged rows are an error."""
    file_path = Path(path)
    try:
        raw = file_path.read_bytes()
    except OSError as exc:
        raise InputFileError(f"{file_path}: cannot be read ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputFileError(
            f"{file_path.name}: not UTF-8 text (byte {exc.start} cannot be decoded)"
        ) from None
    reader = csv.reader(io.StringIO(text, newline=""))
    header: tuple[str, ...] | None = None
    rows: list[tuple[str, ...]] = []
    lines: list[int] = []
    try:
        for record in reader:
            if not record or all(not cell.strip() for cell in record):
                continue
            if header is None:
                header = tuple(cell.strip() for cell in record)
                continue
            if len(record) != len(header):
                raise InputFileError(
                    f"{file_path.name} line {reader.line_num}: {len(record)} fields where the "
                    f"header has {len(header)}"
                )
            rows.append(tuple(record))
            lines.append(reader.line_num)
    except csv.Error as exc:
        raise InputFileError(f"{file_path.name} line {reader.line_num}: {exc}") from None
    if header is None:
        raise InputFileError(f"{file_path.name}: the file is empty (no header row)")
    return CsvTable(file_path, header, tuple(rows), tuple(lines))


__all__ = ["CsvTable", "check_model_names", "read_csv_table"]
