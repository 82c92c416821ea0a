"""Names of a package that load on first use (PEP 562 module `__getattr__`), so `unitlens --help`
and reading results do not wait for torch."""
from __future__ import annotations

import importlib


def lazy_exports(package: str, exports: dict[str, str], namespace: dict):
    """A module `__getattr__` for `package`: name -> attribute of the submodule `exports[name]`,
    imported on first use and then cached in `namespace` (the package's globals())."""

    def __getattr__(name: str):
        if name in exports:
            value = getattr(importlib.import_module(f".{exports[name]}", package), name)
            namespace[name] = value
            return value
        raise AttributeError(f"module {package!r} has no attribute {name!r}")

    return __getattr__
