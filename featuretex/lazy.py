"""Names a package exports but loads only on first use (PEP 562 module `__getattr__`), so reading
a stage's settings does not import the stage's heavy code (torch, trimesh...)."""

from __future__ import annotations

import importlib
from collections.abc import Callable
from typing import Any


def lazy_exports(package: str, table: dict[str, str]) -> Callable[[str], Any]:
    """A module `__getattr__` for `package` that loads each name of `table` (name -> module) on use."""

    def __getattr__(name: str) -> Any:
        if name not in table:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        return getattr(importlib.import_module(table[name]), name)

    return __getattr__
