"""The package's import graph: no circles, no private names taken from another module.

The graph is built from the source with `ast` (not by importing), counting every
import statement wherever it stands: at the top of a module, inside a function
or under a condition. An import inside a function still ties the two modules
together; hiding it there only hides a circle. Edges to a package's
``__init__`` count only where a module names the package itself (``from pkg
import name``), not the implicit import of a parent package.

The checker is tried first on small packages with a planted circle and a
planted private import, so a checker that finds nothing cannot pass unnoticed.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def module_files(root: Path, package: str) -> dict[str, Path]:
    """Dotted module name -> file, for every module of ``package`` under ``root``."""
    out = {}
    for p in sorted((root / package).rglob("*.py")):
        parts = list(p.relative_to(root).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = p
    return out


def _source_of(node: ast.ImportFrom, module: str, is_package: bool) -> str | None:
    if not node.level:
        return node.module
    base = module.split(".") if is_package else module.split(".")[:-1]
    base = base[:len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def import_graph(root: Path, package: str):
    """(edges, private): ``edges[m]`` the package modules ``m`` imports;
    ``private`` the ``(module, line, source, name)`` of every private name one
    module imports from another, including ``alias._name`` on an imported module."""
    mods = module_files(root, package)
    edges: dict[str, set] = {}
    private = []
    for m, path in mods.items():
        tree = ast.parse(path.read_text(), str(path))
        out: set = set()
        aliases: dict[str, str] = {}   # local name -> package module it stands for
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                for a in node.names:
                    if a.name in mods:
                        out.add(a.name)
                        if a.asname:
                            aliases[a.asname] = a.name
            elif isinstance(node, ast.ImportFrom):
                src = _source_of(node, m, path.name == "__init__.py")
                if src is None or src.split(".")[0] != package:
                    continue
                for a in node.names:
                    full = f"{src}.{a.name}"
                    if full in mods:       # a module imported from its package
                        out.add(full)
                        aliases[a.asname or a.name] = full
                        continue
                    if src in mods:
                        out.add(src)
                    if a.name.startswith("_") and not a.name.startswith("__") and src != m:
                        private.append((m, node.lineno, src, a.name))
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name)
                    and node.value.id in aliases and node.attr.startswith("_")
                    and not node.attr.startswith("__") and aliases[node.value.id] != m):
                private.append((m, node.lineno, aliases[node.value.id], node.attr))
        out.discard(m)
        edges[m] = out
    return edges, private


def cycles(edges: dict[str, set]) -> list[list[str]]:
    """The strongly connected components with more than one module (Tarjan, 1972)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set = set()
    found = []
    counter = [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on_stack.add(v)
        for w in sorted(edges.get(v, ())):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                found.append(sorted(comp))

    sys.setrecursionlimit(max(10_000, sys.getrecursionlimit()))
    for v in sorted(edges):
        if v not in index:
            visit(v)
    return found


def _write(root: Path, files: dict[str, str]) -> None:
    for rel, text in files.items():
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text)


def test_checker_finds_a_circle_hidden_inside_a_function(tmp_path):
    _write(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/a.py": "from pkg.b import thing\n",
        "pkg/b.py": "def thing():\n    from pkg import c\n    return c\n",
        "pkg/c.py": "def later():\n    import pkg.a\n",
        "pkg/d.py": "from pkg.a import thing\n",   # hangs off the circle, not in it
    })
    edges, private = import_graph(tmp_path, "pkg")
    assert cycles(edges) == [["pkg.a", "pkg.b", "pkg.c"]]
    assert private == []


def test_checker_finds_private_names_taken_across_modules(tmp_path):
    _write(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/sub/__init__.py": "",
        "pkg/a.py": "def _helper():\n    pass\n\n\ndef public():\n    return _helper()\n",
        "pkg/sub/b.py": "def f():\n    from ..a import _helper\n    return _helper\n",
        "pkg/c.py": "from pkg import a as A\nx = A._helper\nfrom pkg.a import __doc__\n",
    })
    edges, private = import_graph(tmp_path, "pkg")
    assert sorted(private) == [("pkg.c", 2, "pkg.a", "_helper"),
                               ("pkg.sub.b", 2, "pkg.a", "_helper")]
    assert cycles(edges) == []


@pytest.fixture(scope="module")
def package_graph():
    """The package's import graph, read once for the tests below that only read it."""
    return import_graph(ROOT, "benchharness")


def test_benchharness_has_no_import_circle(package_graph):
    edges, _private = package_graph
    assert len(edges) > 100   # the whole package was read
    assert cycles(edges) == [], "import circles (each a set of modules that import each other)"


def test_no_module_takes_a_private_name_of_another(package_graph):
    _edges, private = package_graph
    assert private == [], "private names imported across modules: (module, line, from, name)"


def test_the_run_engine_is_shared_and_imports_none_of_its_callers(package_graph):
    # One engine, used by the local runner, the gate and the cluster coordinator;
    # it knows none of them (they differ only in where the next run comes from).
    edges, _private = package_graph
    engine = "benchharness.execute.engine"
    for caller in ("benchharness.execute.runner", "benchharness.gate.session",
                   "benchharness.execute.cluster"):
        assert engine in edges[caller], caller
    reach, todo = set(), [engine]
    while todo:
        for w in edges[todo.pop()] - reach:
            reach.add(w)
            todo.append(w)
    assert not reach & {"benchharness.execute.runner", "benchharness.gate.session",
                        "benchharness.execute.cluster", "benchharness.gate.orchestrate"}


@pytest.mark.parametrize("module", ["benchharness.execute.engine", "benchharness.gate.session",
                                    "benchharness.execute.cluster", "benchharness.gate.config"])
def test_each_loop_imports_on_its_own(module):
    # A fresh interpreter imports the module first: an import circle at module level
    # would fail here with a partly initialised module.
    r = subprocess.run([sys.executable, "-c", f"import {module}"], cwd=ROOT,
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
