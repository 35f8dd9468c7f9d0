"""Import layering of the packages, read from the source with ``ast`` (nothing is imported).

Checks that
(a) the modules of ``physics`` import each other without a cycle,
(b) ``physics`` imports nothing from ``cloudsieve`` or ``dashboard``,
(c) ``cloudsieve`` imports nothing from ``dashboard`` but the Panel app, inside the serve command.

Every ``import`` and ``from … import`` statement counts, also one inside a function or under
``if TYPE_CHECKING:`` (a deferred import still ties the modules together), and so does
``importlib.import_module``/``__import__`` of a literal name. Relative imports are resolved
against the importing module's package; ``from pkg import name`` counts as an import of the
submodule ``pkg.name`` where that file exists, else of ``pkg`` itself. The helpers are
themselves tested on a throw-away package with a cycle through a function-level import.
"""
import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("physics", "cloudsieve", "dashboard")


def module_files(root, package):
    """{dotted module name: source path} of every module of ``package`` under ``root``."""
    out = {}
    for path in sorted((root / package).rglob("*.py")):
        if "__pycache__" in path.parts:
            continue
        parts = path.relative_to(root).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = path
    return out


def _resolve(name, level, importer, is_package):
    """Absolute name of ``from <level dots><name> import …`` written in module ``importer``."""
    if level == 0:
        return name
    base = importer.split(".")
    if not is_package:
        base = base[:-1]  # a plain module's package
    if level > 1:
        base = base[:len(base) - (level - 1)]
    return ".".join(base + ([name] if name else []))


def imported_modules(tree, importer, is_package, known):
    """Every module the parsed module ``importer`` imports anywhere in its body (absolute names).

    ``known`` is the set of module names that exist as files: ``from pkg import x`` counts as
    an import of ``pkg.x`` when that is one of them, otherwise of ``pkg``.
    """
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = _resolve(node.module, node.level, importer, is_package)
            subs = {f"{base}.{alias.name}" for alias in node.names} & known
            found.update(subs)
            if len(subs) < len(node.names):  # some names are attributes of the module itself
                found.add(base)
        elif isinstance(node, ast.Call) and node.args and isinstance(node.args[0], ast.Constant):
            func = node.func
            dynamic = (isinstance(func, ast.Name) and func.id in ("__import__", "import_module")) or (
                isinstance(func, ast.Attribute) and func.attr == "import_module")
            if dynamic and isinstance(node.args[0].value, str) and not node.args[0].value.startswith("."):
                found.add(node.args[0].value)
    return found


def import_graph(root, packages):
    """{module: set of imported modules} for every module of the packages that exist under ``root``."""
    files = {}
    for package in packages:
        if (root / package).is_dir():
            files.update(module_files(root, package))
    known = set(files)
    return {name: imported_modules(ast.parse(path.read_text(encoding="utf-8"), str(path)), name,
                                   path.name == "__init__.py", known)
            for name, path in files.items()}


def find_cycle(graph, nodes):
    """One import cycle among ``nodes`` as a list [m0, m1, …, m0], or None."""
    state = {}  # 1: on the current path, 2: done

    def visit(node, path):
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph.get(node, ()) & nodes):
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state:
                cycle = visit(nxt, path)
                if cycle:
                    return cycle
        path.pop()
        state[node] = 2
        return None

    for start in sorted(nodes):
        if start not in state:
            cycle = visit(start, [])
            if cycle:
                return cycle
    return None


def in_package(module, package):
    return module == package or module.startswith(package + ".")


def forbidden_imports(graph, importer_package, forbidden_packages):
    """["a.b -> c.d", …]: imports by modules of ``importer_package`` of any of ``forbidden_packages``."""
    return sorted(f"{src} -> {dst}" for src, targets in graph.items() if in_package(src, importer_package)
                  for dst in targets if any(in_package(dst, p) for p in forbidden_packages))


@pytest.fixture(scope="module")
def graph():
    return import_graph(ROOT, PACKAGES)


# ---------------------------------------------------------------------------------------
# the layering of this repository
# ---------------------------------------------------------------------------------------
def test_physics_modules_import_each_other_without_a_cycle(graph):
    physics = {m for m in graph if in_package(m, "physics")}
    # the graph was read: the physics modules are there and import one another
    assert {"physics", "physics.fused", "physics.atmosphere", "physics.clearsky"} <= physics
    assert any(dst in physics for src in physics for dst in graph[src])
    cycle = find_cycle(graph, physics)
    assert cycle is None, "import cycle in physics: " + " -> ".join(cycle)


def test_physics_imports_nothing_from_cloudsieve_or_dashboard(graph):
    assert forbidden_imports(graph, "physics", ("cloudsieve", "dashboard")) == []


#: The one allowed edge against the layering: ``cloudsieve serve`` starts the Panel app, imported
#: inside that command's function only (the console script is cloudsieve.cli:main).
SERVE_EDGE = "cloudsieve.cli -> dashboard.app"


def test_cloudsieve_imports_nothing_from_dashboard(graph):
    assert forbidden_imports(graph, "cloudsieve", ("dashboard",)) in ([], [SERVE_EDGE])
    # and that one import sits inside the serve command, not at module level
    import ast

    tree = ast.parse((ROOT / "cloudsieve" / "cli.py").read_text())
    top = [n for n in tree.body if isinstance(n, (ast.Import, ast.ImportFrom))]
    assert not any("dashboard" in (getattr(n, "module", "") or "") or any("dashboard" in a.name for a in n.names)
                   for n in top)


def test_the_core_loads_no_user_interface_library():
    """In a fresh interpreter, importing the headless core (and its CLI) pulls in no UI library."""
    import subprocess
    import sys

    code = ("import sys, cloudsieve, cloudsieve.cli, cloudsieve.session, cloudsieve.batch; "
            "bad = {'panel', 'holoviews', 'bokeh', 'param'} & set(sys.modules); "
            "assert not bad, bad")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert proc.returncode == 0, proc.stderr


# ---------------------------------------------------------------------------------------
# the helpers on a throw-away package
# ---------------------------------------------------------------------------------------
def _write(root, files):
    for rel, text in files.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(text, encoding="utf-8")


def test_the_helpers_find_a_cycle_through_a_function_level_relative_import(tmp_path):
    _write(tmp_path, {
        "pkg/__init__.py": "",
        "pkg/a.py": "from .b import f\n",
        "pkg/b.py": "import numpy\n\ndef f():\n    from . import c\n",
        "pkg/c.py": "from pkg.sub import d\n",
        "pkg/sub/__init__.py": "",
        "pkg/sub/d.py": "from ..a import g\nfrom .. import constants_like_attr\n",
    })
    g = import_graph(tmp_path, ("pkg", "absent"))
    assert g["pkg.a"] == {"pkg.b"}
    assert g["pkg.b"] == {"numpy", "pkg.c"}
    assert g["pkg.c"] == {"pkg.sub.d"}
    assert g["pkg.sub.d"] == {"pkg.a", "pkg"}
    assert find_cycle(g, set(g)) == ["pkg.a", "pkg.b", "pkg.c", "pkg.sub.d", "pkg.a"]
    (tmp_path / "pkg/b.py").write_text("import numpy\n", encoding="utf-8")  # the function-level import goes
    assert find_cycle(import_graph(tmp_path, ("pkg",)), set(g)) is None


def test_the_helpers_find_forbidden_imports_also_deferred_and_dynamic_ones(tmp_path):
    _write(tmp_path, {
        "low/__init__.py": "",
        "low/x.py": "def f():\n    import high.ui\n",
        "low/y.py": "import importlib\nmod = importlib.import_module('high')\n",
        "low/z.py": "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from high import ui\n",
        "high/__init__.py": "",
        "high/ui.py": "from low import x\n",
    })
    g = import_graph(tmp_path, ("low", "high"))
    assert forbidden_imports(g, "low", ("high",)) == ["low.x -> high.ui", "low.y -> high", "low.z -> high.ui"]
    assert forbidden_imports(g, "high", ("nothing",)) == []
