"""How a run folder names the code and weights of its model, so that it opens again later.

A user's own code file is named by its absolute path. Code inside an installed package (under a
site-packages or dist-packages folder) is named by its module instead, `package.module:function`,
because reinstalling the package (`pip install -e .` after `pip install .`) moves its files:
the module still imports, the old path is gone. Manifests written before this rule named such
code and weights by their path; both are found again through the same rule. No torch here, so
`show` and the atlas can compare models without importing it.
"""
from __future__ import annotations

import importlib.util
import re
from pathlib import Path

_INSTALLED = ("site-packages", "dist-packages")
MODULE_SPEC = re.compile(r"[A-Za-z_]\w*(\.[A-Za-z_]\w*)*:[A-Za-z_]\w*")  # package.module:function


def installed_parts(path: str | Path) -> tuple[str, ...] | None:
    """('unitlens', 'demo', 'net.py') for .../site-packages/unitlens/demo/net.py; None elsewhere."""
    parts = Path(path).parts
    for i in range(len(parts) - 1, -1, -1):
        if parts[i] in _INSTALLED:
            rest = parts[i + 1:]
            return rest if len(rest) >= 2 and all(p.isidentifier() for p in rest[:-1]) else None
    return None


def canonical_spec(spec: str) -> str:
    """The name a manifest records: `pkg.mod:function` for code in an installed package, else as given."""
    if ".py:" not in spec:
        return spec
    file, func = spec.rsplit(":", 1)
    parts = installed_parts(file)
    if parts is None or not parts[-1].endswith(".py"):
        return spec
    module = list(parts[:-1]) + ([] if parts[-1] == "__init__.py" else [parts[-1][:-3]])
    if not all(p.isidentifier() for p in module):
        return spec
    if Path(file).is_file() and not _importable(module[0]):  # another environment's package: keep the file
        return spec
    return f"{'.'.join(module)}:{func}"


def _importable(package: str) -> bool:
    try:
        return importlib.util.find_spec(package) is not None
    except (ImportError, ValueError):
        return False


def locate(path: str) -> str:
    """A recorded file path, or where the same file of an installed package lies now (it moves when
    the package is reinstalled); the path as given when neither exists (the caller reports it)."""
    if Path(path).exists():
        return path
    parts = installed_parts(path)
    if parts is None:
        return path
    try:
        found = importlib.util.find_spec(parts[0])
    except (ImportError, ValueError):
        return path
    for root in (found.submodule_search_locations or []) if found else []:
        moved = Path(root).joinpath(*parts[1:])
        if moved.exists():
            return str(moved)
    return path
