"""CSV files written in another locale's way: fields separated by ``;`` or a tab, numbers with a
decimal comma (``1234,5``), as spreadsheets save them in much of Europe and Latin America.

A feed that declares ``delimiter`` and ``decimal`` has each file rewritten, before parsing, into
the form the parser reads (``,`` between fields, ``.`` decimals): :func:`standard_csv`. Only
cells that are a number with a decimal comma change (``1234,5`` → ``1234.5``); everything else,
blank lines included, is kept as it was, one record per line, so line numbers in reports are the
file's own. The parser, whichever reads the rewritten bytes, applies its usual rules.

A feed left at the defaults that receives such a file refuses it (its header is one column); the
reason then names the separator the file uses and the keys to set: :func:`separator_hint`.
"""

from __future__ import annotations

import csv
import io
import re

DEFAULT_DELIMITER = ","
DEFAULT_DECIMAL = "."

# A number written with a decimal comma: an optional sign, digits, a comma, digits, and an
# optional exponent. "1.234,5" (a thousands point) does not match and stays as it is, so the
# parser refuses it like any thousands separator.
_DECIMAL_COMMA = re.compile(r"^\s*[+-]?\d+,\d+(?:[eE][+-]?\d+)?\s*$")
_SEPARATORS = {";": "';'", "\t": "a tab", ",": "','", "|": "'|'"}


def needs_rewrite(delimiter: str, decimal: str) -> bool:
    return (delimiter, decimal) != (DEFAULT_DELIMITER, DEFAULT_DECIMAL)


def standard_csv(data: bytes, delimiter: str, decimal: str) -> bytes | str:
    """``data`` rewritten with ``,`` between fields and ``.`` decimals, or the reason it cannot
    be read (a string). Bytes that are not UTF-8 text or hold NUL bytes come back unchanged, for
    the parser to refuse with its own words."""
    if b"\x00" in data:
        return data
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        return data
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\n")
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    try:
        for record in reader:
            if decimal == ",":
                record = [
                    cell.replace(",", ".") if _DECIMAL_COMMA.match(cell) else cell
                    for cell in record
                ]
            writer.writerow(record)
    except csv.Error as exc:
        return f"line {reader.line_num} cannot be read as CSV: {exc}"
    return out.getvalue().encode("utf-8")


def separator_hint(data: bytes, feed: str, delimiter: str, decimal: str) -> str:
    """When the file's first non-blank line is split by another separator than the feed's, a
    sentence naming it and the keys to set (with ``decimal`` when its numbers use a comma);
    otherwise ''."""
    try:
        text = data[:1 << 16].decode("utf-8-sig", errors="replace")
    except ValueError:
        return ""
    lines = [line for line in text.splitlines() if line.strip()]
    if not lines:
        return ""
    first = lines[0]
    if len(_split(first, delimiter)) > 1:
        return ""
    best = max((c for c in _SEPARATORS if c != delimiter), key=lambda c: len(_split(first, c)))
    if len(_split(first, best)) < 2:
        return ""
    keys = [f"delimiter: {_yaml(best)}"]
    body = [cell for line in lines[1:50] for cell in _split(line, best)]
    if decimal != "," and any(_DECIMAL_COMMA.match(cell) for cell in body):
        keys.append("decimal: ','")
    return (
        f". The file's fields are separated by {_SEPARATORS[best]}, not {_SEPARATORS[delimiter]}"
        f"{' and its numbers use a decimal comma' if len(keys) > 1 else ''}: set "
        f"{' and '.join(keys)} on feed {feed} in the config (then run plumbline check), or save "
        "the file with commas between fields and '.' decimals"
    )


def decimal_comma_hint(values: list[str], feed: str, decimal: str) -> str:
    """When refused cells are numbers with a decimal comma and the feed reads '.', a sentence
    naming the key to set; otherwise ''."""
    if decimal == "," or not any(_DECIMAL_COMMA.match(v) for v in values):
        return ""
    return (f"The numbers use a decimal comma: set decimal: ',' on feed {feed} (with a delimiter "
            "other than ',').")


def _split(line: str, delimiter: str) -> list[str]:
    try:
        return next(csv.reader([line], delimiter=delimiter))
    except (csv.Error, StopIteration):
        return [line]


def _yaml(character: str) -> str:
    return '"\\t"' if character == "\t" else f"'{character}'"


__all__ = [
    "DEFAULT_DECIMAL",
    "DEFAULT_DELIMITER",
    "decimal_comma_hint",
    "needs_rewrite",
    "separator_hint",
    "standard_csv",
]
