"""``plumbline schema``: print the JSON Schema of the config file, or its Markdown reference.

    plumbline schema [--format json|markdown]

Both come from the config models and their one table of defaults and meanings
(``monitor.config.settings.SETTINGS``): the JSON Schema (draft 2020-12) is for editors that
complete and check YAML, the Markdown table is the README's config reference.
"""

from __future__ import annotations

import argparse
import json

from monitor.config import config_json_schema, reference_markdown


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = subparsers.add_parser(
        "schema",
        help="print the JSON Schema of the config file",
        description="Print the JSON Schema of the config file (for editors), or with "
        "--format markdown the config reference table of the README.",
    )
    parser.add_argument(
        "--format",
        choices=("json", "markdown"),
        default="json",
        help="json (default): JSON Schema draft 2020-12; markdown: the reference table",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if args.format == "markdown":
        print(reference_markdown(), end="")
    else:
        print(json.dumps(config_json_schema(), indent=2))
    return 0


__all__ = ["register", "run"]
