"""numpy on first use: the store's read paths that light commands use (``status``, ``ack``)
never touch an array, so they need not pay for importing numpy (DEVELOPERS.md, "Startup").

``np`` behaves like the module once any attribute is read; type checkers see numpy itself.
"""

from __future__ import annotations

import importlib
import sys
from types import ModuleType
from typing import Any


class LazyModule:
    """A stand-in for a module that imports it when an attribute is first read."""

    def __init__(self, name: str) -> None:
        self._name = name
        self._module: ModuleType | None = None

    def __getattr__(self, attribute: str) -> Any:
        if self._module is None:
            self._module = importlib.import_module(self._name)
        return getattr(self._module, attribute)


def is_numpy_value(value: object) -> bool:
    """True for a numpy array or scalar, without importing numpy (none exists before it is)."""
    numpy = sys.modules.get("numpy")
    return numpy is not None and isinstance(value, numpy.ndarray | numpy.generic)


np = LazyModule("numpy")

__all__ = ["LazyModule", "is_numpy_value", "np"]
