"""Modules imported on first use, so that a command that never computes a statistic never pays for scipy."""

from __future__ import annotations

import importlib
from types import ModuleType
from typing import Any


class LazyModule:
    """Stands for module ``name`` and imports it when an attribute is first read (``np.sqrt`` in a function).

    Module-level code must not read attributes, or the import happens at once anyway."""

    def __init__(self, name: str) -> None:
        self._name = name
        self._module: ModuleType | None = None

    def __getattr__(self, attribute: str) -> Any:
        if self._module is None:
            self._module = importlib.import_module(self._name)
        return getattr(self._module, attribute)
