"""Reading the config file: a safe YAML loader that records line numbers, and one-line errors.

``load_config`` reads the file (and nothing else: it creates no file or folder), validates it with
the models of ``monitor.config.models`` and turns every pydantic error into a line naming the file,
the line, the YAML path and, for a misspelling, the nearest known name.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import yaml
from pydantic import ValidationError
from pydantic_core import ErrorDetails

from monitor.config.models import SECTIONS, PlumblineConfig
from monitor.config.settings import SETTINGS_BY_PATH
from monitor.config.values import Loc, Problem, path_text, unknown_feed
from monitor.errors import ConfigError
from monitor.text import did_you_mean

# --------------------------------------------------------------------------------------------
# Loading, with line numbers.


class _UnfitYaml(Exception):
    """YAML that parses but cannot be a config file (alias cycles, alias bombs)."""

    def __init__(self, reason: str, mark: yaml.Mark | None) -> None:
        super().__init__(reason)
        self.reason, self.mark = reason, mark


class LineLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that also records the line of every mapping key and list item, and
    reports duplicate keys (which plain YAML loading silently lets the last one win)."""

    _MAX_NODES = 100_000  # a guard against alias bombs; real config files have a few hundred

    def __init__(self, stream: str) -> None:
        super().__init__(stream)
        self.lines: dict[Loc, int] = {}
        self.duplicates: list[Problem] = []
        self._visited = 0
        self._open: set[int] = set()  # the nodes being walked, to stop at an alias cycle

    def load_with_lines(self) -> Any:
        node = self.get_single_node()
        if node is None:
            return None
        self._record(node, ())
        return self.construct_document(node)

    def _record(self, node: yaml.Node, loc: Loc) -> None:
        self._visited += 1
        if self._visited > self._MAX_NODES:
            raise _UnfitYaml("too many keys or aliases for a config file", None)
        if id(node) in self._open:
            raise _UnfitYaml("an alias refers to the value that contains it", node.start_mark)
        self._open.add(id(node))
        try:
            self._record_children(node, loc)
        finally:
            self._open.discard(id(node))

    def _record_children(self, node: yaml.Node, loc: Loc) -> None:
        if isinstance(node, yaml.MappingNode):
            seen: dict[str, int] = {}
            merged: list[yaml.Node] = []
            for key_node, value_node in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    merged.append(value_node)
                    continue
                if not isinstance(key_node, yaml.ScalarNode):
                    continue
                key, line = str(key_node.value), key_node.start_mark.line + 1
                if key in seen:
                    self.duplicates.append(
                        Problem(
                            (*loc, key),
                            f"key '{key}' appears twice (first on line {seen[key]})",
                            line,
                        )
                    )
                    continue
                seen[key] = line
                self.lines[(*loc, key)] = line
                self._record(value_node, (*loc, key))
            for value_node in merged:
                for part in (
                    value_node.value if isinstance(value_node, yaml.SequenceNode) else [value_node]
                ):
                    self._record(part, loc)
        elif isinstance(node, yaml.SequenceNode):
            for index, item in enumerate(node.value):
                self.lines.setdefault((*loc, index), item.start_mark.line + 1)
                self._record(item, (*loc, index))


def load_config(path: str | Path) -> PlumblineConfig:
    """Read and validate a config file; relative paths resolve against its folder.

    Raises ConfigError with one line per problem, each naming the file, line and YAML path.
    Reads the file only: creates nothing.
    """
    source = Path(path)
    try:
        raw = source.read_bytes()
    except FileNotFoundError:
        raise ConfigError(
            f"{source}: no such file; give the config file with -c/--config PATH"
        ) from None
    except OSError as exc:
        raise ConfigError(f"{source}: cannot be read ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise ConfigError(
            f"{source}: not UTF-8 text (byte {exc.start} cannot be decoded)"
        ) from None
    config = parse_config(text, source=str(source), base_dir=source.absolute().parent)
    config._source = source
    return config


def parse_config(
    text: str, *, source: str = "plumbline.yaml", base_dir: Path | None = None
) -> PlumblineConfig:
    """Validate config text; ``source`` names it in messages, ``base_dir`` anchors relative paths
    (left relative when None)."""
    loader = LineLoader(text)
    try:
        data = loader.load_with_lines()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"{source} line {mark.line + 1}" if mark is not None else source
        hint = ""
        if (
            mark is not None
            and "*" in text.splitlines()[min(mark.line, len(text.splitlines()) - 1)]
        ):
            hint = '; a cron expression starting with * must be quoted: "*/5 * * * *"'
        raise ConfigError(f"{where}: not valid YAML: {exc.problem or exc}{hint}") from None
    except yaml.YAMLError as exc:
        raise ConfigError(f"{source}: not valid YAML: {exc}") from None
    except _UnfitYaml as exc:
        where = f"{source} line {exc.mark.line + 1}" if exc.mark is not None else source
        raise ConfigError(f"{where}: {exc.reason}") from None
    finally:
        loader.dispose()
    if data is None:
        raise ConfigError(f"{source}: the file is empty; it needs at least feeds and models")
    if not isinstance(data, dict):
        raise ConfigError(
            f"{source} line 1: the file must be a mapping of keys (database, feeds, models, …), "
            f"not a {type(data).__name__}"
        )
    problems = list(loader.duplicates) + _feed_references(data)
    config: PlumblineConfig | None = None
    try:
        config = PlumblineConfig.model_validate(data, context={"base_dir": base_dir})
    except ValidationError as exc:
        for error in exc.errors(include_url=False):
            problems.extend(_translate(error))
    if problems or config is None:
        raise ConfigError(_format_problems(problems, loader.lines, source))
    return config


def _feed_references(data: dict[Any, Any]) -> list[Problem]:
    """Models naming an undeclared feed, found in the raw data so that they are reported even
    when other errors stop pydantic before its cross-checks (duplicates are merged later)."""
    feeds, models = data.get("feeds"), data.get("models")
    if not isinstance(feeds, dict) or not isinstance(models, dict):
        return []
    problems = []
    for name, model in models.items():
        feed = model.get("feed") if isinstance(model, dict) else None
        if isinstance(feed, str) and feed not in feeds:
            problems.append(Problem(("models", name, "feed"), unknown_feed(feed, feeds)))
    return problems


def _translate(error: ErrorDetails) -> list[Problem]:
    """A pydantic error as Plumbline's one-line problems."""
    loc: Loc = tuple(error["loc"])
    kind, given, ctx = error["type"], error.get("input"), error.get("ctx") or {}
    if kind == "plumbline_problems":
        return [Problem((*loc, *p.loc), p.message, p.line) for p in ctx["problems"]]
    if kind == "default_factory_not_called":
        return []  # a consequence of another error, which is reported
    if loc and str(loc[-1]).endswith("_env") and kind != "missing":
        # A secret typed where its variable's name belongs: never echo the value.
        return [Problem(loc, (
            "is not an environment variable name (the value is not shown: it may be a secret); "
            "give the name of the variable that holds the secret, e.g. PLUMBLINE_SMTP_PASSWORD"
        ))]
    if loc and loc[-1] == "[key]":
        loc = loc[:-1]
    if kind == "missing":
        return [Problem(loc, "required key is missing")]
    if kind == "extra_forbidden":
        section = SECTIONS.get(_shape(loc[:-1]))
        known = list(section.model_fields) if section is not None else []
        hint = did_you_mean(str(loc[-1]), known) or f"; known keys: {', '.join(known)}"
        return [Problem(loc, f"unknown key '{loc[-1]}'{hint}")]
    if kind == "literal_error":
        options = re.findall(r"'([^']*)'", str(ctx.get("expected", "")))
        hint = did_you_mean(str(given), options)
        return [Problem(loc, f"{given!r} is not one of {', '.join(options)}{hint}")]
    if kind == "list_type":
        return [Problem(loc, f"should be a list in brackets, e.g. [{given}], not {given!r}")]
    if kind in ("dict_type", "model_type", "model_attributes_type"):
        if given is None:
            setting = SETTINGS_BY_PATH.get(_shape(loc))
            optional = setting is not None and not setting.required
            tail = ", or leave it out for the defaults" if optional else ""
            return [Problem(loc, f"is empty: write its keys below it, indented{tail}")]
        return [Problem(loc, f"should be a mapping of keys to values, not {given!r}")]
    if kind in ("bool_type", "bool_parsing"):
        return [Problem(loc, f"should be true or false, not {given!r}")]
    if kind == "too_short":
        return [Problem(loc, f"is empty; give at least {ctx.get('min_length', 1)}")]
    message = error["msg"].removeprefix("Value error, ")
    if message.startswith("Input should be"):
        message = "should be" + message.removeprefix("Input should be") + f", not {given!r}"
    return [Problem(loc, message)]


def _shape(loc: Loc) -> str:
    """A location as a ``SECTIONS`` key: feed and model names become ``NAME``."""
    parts = [str(part) for part in loc]
    if len(parts) > 1 and parts[0] in ("feeds", "models"):
        parts[1] = "NAME"
    return ".".join(parts)


def _format_problems(problems: list[Problem], lines: dict[Loc, int], source: str) -> str:
    rendered: list[tuple[int, str]] = []
    for problem in problems:
        line = problem.line
        loc = tuple(problem.loc)
        while line is None and loc:
            line = lines.get(tuple(part if isinstance(part, int) else str(part) for part in loc))
            loc = loc[:-1]
        where = f"{source} line {line}" if line is not None else source
        path = path_text(problem.loc)
        text = f"{where}: {path}: {problem.message}" if path else f"{where}: {problem.message}"
        rendered.append((line or 0, text))
    unique = dict.fromkeys(text for _, text in sorted(rendered, key=lambda item: item[0]))
    return "\n".join(unique)


__all__ = ["LineLoader", "load_config", "parse_config"]
