"""The package's shape: no import cycles, and no module reaching into another's private names.

Both read the source with `ast` (every import, including those inside functions), so they also see
imports that run only on some paths. Imports under `if TYPE_CHECKING:` never run and are left out: the
package's front doors (`unitlens/__init__.py`) name their modules there for type checkers and load them
on first use.
"""
from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "unitlens"


def _modules(package: Path) -> dict[str, Path]:
    """Dotted module name -> file, for every .py under `package` (a package is its __init__.py)."""
    out = {}
    for p in sorted(package.rglob("*.py")):
        parts = list(p.relative_to(package.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        out[".".join(parts)] = p
    return out


def _runtime_nodes(tree: ast.AST):
    """Every node of `tree` except those under `if TYPE_CHECKING:`."""
    todo = [tree]
    while todo:
        node = todo.pop()
        yield node
        if isinstance(node, ast.If) and isinstance(node.test, ast.Name) and node.test.id == "TYPE_CHECKING":
            todo.extend(node.orelse)
            continue
        todo.extend(ast.iter_child_nodes(node))


def _imports(name: str, path: Path, modules: dict[str, Path]):
    """(line, imported module, imported name or None, local name or None) for each import of a module
    of the package in `path`; `from .pkg import sub` is an import of the submodule `pkg.sub`."""
    top = name.split(".")[0]
    package = name.split(".") if path.name == "__init__.py" else name.split(".")[:-1]
    for node in _runtime_nodes(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            for a in node.names:
                if a.name.split(".")[0] == top:
                    yield node.lineno, a.name, None, a.asname
        elif isinstance(node, ast.ImportFrom):
            base = package[:len(package) - node.level + 1] if node.level else []
            source = ".".join(base + ([node.module] if node.module else []))
            if source.split(".")[0] != top:
                continue
            for a in node.names:
                sub = f"{source}.{a.name}"
                if sub in modules:
                    yield node.lineno, sub, None, a.asname or a.name
                else:
                    yield node.lineno, source, a.name, None


def import_graph(package: Path = PACKAGE) -> dict[str, set[str]]:
    modules = _modules(package)
    return {m: {t for _, t, _, _ in _imports(m, p, modules) if t != m} for m, p in modules.items()}


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """The strongly connected components of more than one module (Tarjan's algorithm)."""
    index, low, stack, on, found = {}, {}, [], set(), []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in sorted(graph.get(v, ())):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while not comp or comp[-1] != v:
                comp.append(stack.pop())
                on.discard(comp[-1])
            if len(comp) > 1:
                found.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def private_crossings(package: Path = PACKAGE) -> list[str]:
    """Each place a module uses an underscore name of another module of the package: `from .x import _y`,
    or `x._y` where `x` was bound to a module of the package by an import. Dunder names are public."""
    private = lambda n: n.startswith("_") and not n.startswith("__")  # noqa: E731
    modules, found = _modules(package), []
    for name, path in modules.items():
        where = path.relative_to(package.parent)
        bound = {}  # local name -> module of the package
        for line, target, imported, local in _imports(name, path, modules):
            if imported is not None and private(imported):
                found.append(f"{where}:{line}: {imported} from {target}")
            if local is not None and target != name:
                bound[local] = target
        for node in ast.walk(ast.parse(path.read_text())):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name) and node.value.id in bound
                    and private(node.attr)):
                found.append(f"{where}:{node.lineno}: {node.value.id}.{node.attr}")
    return found


def _plant(root: Path, files: dict[str, str]) -> Path:
    for rel, text in files.items():
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_text(text)
    return root / "pkg"


def test_the_checks_find_planted_faults(tmp_path):
    # Their own check first, so that "nothing found" below cannot come from checks that never find anything.
    pkg = _plant(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/a.py": "from .b import thing\n",
        "pkg/b.py": "def f():\n    from . import c\n    return c._hidden\n",  # function-level import
        "pkg/c.py": "from pkg.sub.d import _helper\n",
        "pkg/sub/__init__.py": "",
        "pkg/sub/d.py": "from .. import a as other\nx = other._private\n_helper = 1\ny = _helper\n",
        # never runs: no edge, so no cycle through pkg.e
        "pkg/e.py": "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from . import a\nfrom . import f\n",
        "pkg/f.py": "def g():\n    from . import e\n",
    })
    assert cycles(import_graph(pkg)) == [["pkg.a", "pkg.b", "pkg.c", "pkg.sub.d"], ["pkg.e", "pkg.f"]]
    assert "pkg.a" not in import_graph(pkg)["pkg.e"]
    assert sorted(private_crossings(pkg)) == ["pkg/b.py:3: c._hidden", "pkg/c.py:1: _helper from pkg.sub.d",
                                              "pkg/sub/d.py:2: other._private"]
    assert cycles({"a": {"b"}, "b": set()}) == []


def test_the_graph_sees_relative_and_function_level_imports():
    g = import_graph()
    assert "unitlens.errors" in g["unitlens.units"]  # `from .errors import ...` at the top
    assert "unitlens.crops" in g["unitlens.mining"]  # `from .crops import ...` inside a function


def test_the_package_has_no_import_cycle():
    assert cycles(import_graph()) == []


def test_no_module_uses_another_modules_private_names():
    assert private_crossings() == []
