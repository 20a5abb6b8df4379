"""Child processes of a benchmark import Plumbline as an installed copy does: from bytecode.

``pip install`` compiles every module to bytecode, so a user's ``plumbline pass`` never compiles
source. A benchmark child started with ``PYTHONPATH`` pointing at a checkout does, on every start,
when ``PYTHONDONTWRITEBYTECODE`` is set in the environment (as it is on some development
machines): that adds about 0.3 s of compiling to each fresh process (measured 2026-12-03: the
imports of a ``plumbline pass`` took 1.39–1.55 s from source against 0.96–1.28 s from bytecode,
nine runs each, alternating). The benchmarks that time whole processes therefore compile the tree
once (``compile_tree``) and start their children with ``child_environment``.
"""

from __future__ import annotations

import compileall
import os
from pathlib import Path


def compile_tree(tree: Path) -> None:
    """Write the bytecode of ``tree``'s package (``py_compile`` writes it whatever
    ``PYTHONDONTWRITEBYTECODE`` says), as ``pip install`` would."""
    if not compileall.compile_dir(str(tree / "monitor"), quiet=1):
        raise SystemExit(f"{tree / 'monitor'} did not compile")


def child_environment(tree: Path) -> dict[str, str]:
    """The environment for a child importing ``tree``'s package from its bytecode."""
    environment = {**os.environ, "PYTHONPATH": str(tree)}
    environment.pop("PYTHONDONTWRITEBYTECODE", None)
    return environment
