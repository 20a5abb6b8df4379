"""Imports point downward only (DESIGN.md section 3): a cheap guard that parses every module."""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "monitor"

# Lower number = lower layer. A module may import only modules of its own layer or below.
LAYERS: dict[str, int] = {
    "vocabulary": 0,
    "errors": 0,
    "text": 0,
    "figures": 0,
    "stats": 1,
    "config": 2,
    "store": 2,
    "lock": 2,
    "ingest": 3,
    "exports": 3,
    "findings": 4,
    "audit": 4,
    "analysis": 4,
    "calibration": 4,
    "notify": 5,
    "compute": 5,
    "demo": 6,
    "passes": 6,
    "daemon": 7,
    "commands": 8,
    "cli": 9,
    "__main__": 10,
}
STATS_ALLOWED_THIRD_PARTY = {"numpy", "scipy"}


def _layer_of(module: str) -> str:
    parts = module.split(".")
    assert parts[0] == "monitor"
    return parts[1] if len(parts) > 1 else "__init__"


def _imports(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names: list[str] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.extend(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.append(node.module)
    return names


def test_every_module_has_a_layer() -> None:
    for path in PACKAGE.rglob("*.py"):
        module = ".".join(("monitor", *path.relative_to(PACKAGE).with_suffix("").parts))
        layer = _layer_of(module)
        if layer == "__init__":
            continue
        assert layer in LAYERS, f"{module} is in no layer; add it to LAYERS in this test"


def test_imports_point_downward() -> None:
    offences: list[str] = []
    for path in PACKAGE.rglob("*.py"):
        module = ".".join(("monitor", *path.relative_to(PACKAGE).with_suffix("").parts))
        layer = _layer_of(module)
        if layer == "__init__":
            continue
        for imported in _imports(path):
            if imported == "monitor" or not imported.startswith("monitor."):
                continue
            target = _layer_of(imported)
            if LAYERS.get(target, 99) > LAYERS[layer]:
                offences.append(f"{module} imports {imported}")
    assert offences == []


def test_stats_imports_only_numpy_and_scipy() -> None:
    import sys

    stdlib = set(sys.stdlib_module_names)
    offences: list[str] = []
    for path in (PACKAGE / "stats").rglob("*.py"):
        for imported in _imports(path):
            root = imported.split(".")[0]
            if root in stdlib or root in STATS_ALLOWED_THIRD_PARTY:
                continue
            if imported.startswith("monitor.") and _layer_of(imported) in {
                "stats",
                "vocabulary",
                "errors",
            }:
                continue
            offences.append(f"{path.name} imports {imported}")
    forbidden_stdlib = {"sqlite3", "os", "pathlib", "zoneinfo", "html", "io", "shutil"}
    for path in (PACKAGE / "stats").rglob("*.py"):
        for imported in _imports(path):
            if imported.split(".")[0] in forbidden_stdlib:
                offences.append(f"{path.name} imports {imported} (no I/O in stats)")
    assert offences == []


def test_only_monitor_compute_imports_dask() -> None:
    # Dask is an optional extra (pip install 'plumbline[dask]'): one module may import it, and
    # only inside the functions that need it, so engine: local runs without it installed.
    offences: list[str] = []
    for path in PACKAGE.rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                names = [node.module]
            else:
                continue
            if not any(n.split(".")[0] in {"dask", "distributed"} for n in names):
                continue
            if path != PACKAGE / "compute.py":
                offences.append(f"{path.relative_to(PACKAGE)} imports {names}")
            elif node.col_offset == 0:
                offences.append(f"compute.py imports {names} at module level")
    assert offences == []
