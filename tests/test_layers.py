"""The import graph of ``topopt`` and ``filters``: no cycle, and no layer imports a higher one.

Source: common practice (STYLE.md, after scikit-fem's strict layering: a lower module never
imports a higher one). The graph is read from the source with :mod:`ast`, so every
``import`` counts, at the top of a file or inside a function: a function-level import
still ties the two modules together. The layers, lowest first, are documented in
``docs/design.md`` ("Module map and layers"); a new module must be given a layer here.

A module may import modules of its own layer or of lower layers; modules of one layer
must not import each other in a circle. ``filters`` lies below all of ``topopt`` and
never imports it. The package ``topopt`` itself (``topopt/__init__.py``) is the top: it
only names the public calls and loads them on first use, so that ``import topopt`` and
``buttress --help`` stay cheap (checked below without timing: by the modules loaded).
"""

from __future__ import annotations

import ast
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("filters", "topopt")

#: Layers, lowest first. A module may import its own layer and the layers before it.
LAYERS: list[tuple[str, tuple[str, ...]]] = [
    ("array transforms", ("filters.chain", "filters.density", "filters.projection",
                          "filters.direction", "filters.printability", "filters")),
    ("foundation", ("topopt.version", "topopt.files", "topopt.arrays", "topopt.grid", "topopt.parallel",
                    "topopt.interrupt", "topopt.memory")),
    ("finite elements", ("topopt.elements", "topopt.assembly", "topopt.multigrid",
                         "topopt.solvers")),
    ("model", ("topopt.problem", "topopt.objective", "topopt.optimizers", "topopt.robust")),
    ("optimisation loop", ("topopt.driver",)),
    ("analysis and output", ("topopt.lengthscale", "topopt.stress", "topopt.tilted",
                             "topopt.build", "topopt.surface", "topopt.render",
                             "topopt.export")),
    ("results folder", ("topopt.results",)),
    ("studies", ("topopt.study", "topopt.compare")),
    ("command line", ("topopt.commands", "topopt.commands.compare", "topopt.commands.export",
                      "topopt.commands.inspect", "topopt.commands.optimize",
                      "topopt.commands.sweep", "topopt.cli")),
    ("package facade", ("topopt",)),
]


def module_name(path: Path, root: Path) -> str:
    """Dotted module name of a source file below ``root`` (``topopt/commands/__init__.py``
    -> ``topopt.commands``)."""
    parts = list(path.relative_to(root).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def find_modules(root: Path, packages=PACKAGES) -> dict[str, Path]:
    """Every module of the packages: dotted name -> file."""
    found = {}
    for package in packages:
        for path in sorted((root / package).rglob("*.py")):
            found[module_name(path, root)] = path
    return found


def imports_of(name: str, source: str, known: set[str], *, is_package: bool = False) -> set[str]:
    """Modules of ``known`` that the module ``name`` imports anywhere in ``source``.

    ``from pkg import sub`` counts as importing ``pkg.sub`` when that is a module,
    otherwise as importing ``pkg``; relative imports are resolved against ``name``
    (a package when ``is_package``).
    """
    found: set[str] = set()
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = name.split(".") if is_package else name.split(".")[:-1]
                anchor = anchor[: len(anchor) - (node.level - 1)]
                base = ".".join(anchor + ([base] if base else []))
            targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in known else base
                       for a in node.names]
        else:
            continue
        for target in targets:
            # `import pkg.mod.attr` style names: the longest known prefix
            parts = target.split(".")
            while parts and ".".join(parts) not in known:
                parts.pop()
            if parts and ".".join(parts) != name:
                found.add(".".join(parts))
    return found


def import_graph(root: Path = ROOT, packages=PACKAGES) -> dict[str, set[str]]:
    """The import graph: module -> the modules of the packages it imports."""
    modules = find_modules(root, packages)
    known = set(modules)
    return {name: imports_of(name, path.read_text(encoding="utf-8"), known,
                             is_package=path.name == "__init__.py")
            for name, path in modules.items()}


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle as a list of modules (first == last), or None."""
    state: dict[str, int] = {}  # 1 = on the current path, 2 = finished
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                return path[path.index(nxt):] + [nxt]
            if nxt not in state:
                cycle = visit(nxt)
                if cycle:
                    return cycle
        path.pop()
        state[node] = 2
        return None

    for start in sorted(graph):
        if start not in state:
            cycle = visit(start)
            if cycle:
                return cycle
    return None


def layer_violations(graph: dict[str, set[str]], layers) -> list[str]:
    """Imports of a higher layer, and modules that have no layer, as readable lines."""
    level = {m: i for i, (_, members) in enumerate(layers) for m in members}
    names = [n for n, _ in layers]
    problems = [f"{m}: no layer; add it to LAYERS (tests/test_layers.py) and docs/design.md"
                for m in sorted(graph) if m not in level]
    for module, targets in sorted(graph.items()):
        for target in sorted(targets):
            if module in level and target in level and level[target] > level[module]:
                problems.append(f"{module} ({names[level[module]]}) imports {target} "
                                f"({names[level[target]]})")
    return problems


# ---------------------------------------------------------------------------- the checks
# themselves can fail


def test_reader_sees_module_level_function_level_and_relative_imports():
    known = {"pkg", "pkg.a", "pkg.b", "pkg.c", "pkg.sub", "pkg.sub.d"}
    source = (
        "import pkg.a\n"
        "from pkg import b, CONSTANT\n"
        "def f():\n    from pkg.c import thing\n"
        "from .sub import d\n"
        "import numpy\n"
    )
    assert imports_of("pkg.x", source, known) == {"pkg.a", "pkg.b", "pkg", "pkg.c", "pkg.sub.d"}


def test_cycle_and_layer_checks_can_fail():
    graph = {"low": {"high"}, "high": {"mid"}, "mid": {"high"}, "stray": set()}
    assert find_cycle(graph) == ["high", "mid", "high"]
    assert find_cycle({"a": {"b"}, "b": set()}) is None
    layers = [("bottom", ("low",)), ("middle", ("mid",)), ("top", ("high",))]
    problems = layer_violations(graph, layers)
    assert "low (bottom) imports high (top)" in problems
    assert "mid (middle) imports high (top)" in problems
    assert any(p.startswith("stray: no layer") for p in problems)
    assert not any(p.startswith("high ") for p in problems)  # downward is fine


# ---------------------------------------------------------------------------- the code


def test_every_module_has_a_layer_and_no_layer_imports_a_higher_one():
    assert layer_violations(import_graph(), LAYERS) == []


def test_no_import_cycle():
    graph = import_graph()
    assert len(graph) > 20 and graph["topopt.driver"]  # the reader found the code
    assert find_cycle(graph) is None, " -> ".join(find_cycle(graph))


def test_filters_never_imports_topopt():
    graph = import_graph()
    for module, targets in graph.items():
        if module.split(".")[0] == "filters":
            assert not any(t.split(".")[0] == "topopt" for t in targets), (module, targets)


def test_the_package_facade_imports_only_the_version_when_imported():
    # Every `import topopt.x` runs topopt/__init__.py first: it must import nothing
    # heavy at module level, or every module would pull in the driver (the former cycle
    # topopt <-> topopt.driver). Its public names load on first use (__getattr__).
    tree = ast.parse((ROOT / "topopt" / "__init__.py").read_text(encoding="utf-8"))
    top_level = {alias.name if isinstance(node, ast.Import) else node.module
                 for node in tree.body if isinstance(node, (ast.Import, ast.ImportFrom))
                 for alias in node.names}
    assert top_level == {"topopt.version"}, top_level


def functions_using_numpy_without_importing_it(source: str) -> list[str]:
    """Top-level functions whose body uses ``np`` but that import numpy nowhere inside."""
    missing = []
    for node in ast.parse(source).body:
        if not isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            continue
        uses = any(isinstance(n, ast.Name) and n.id == "np"
                   for stmt in node.body for n in ast.walk(stmt))
        imports = any(isinstance(n, ast.Import) and any(a.name == "numpy" for a in n.names)
                      for n in ast.walk(node))
        if uses and not imports:
            missing.append(node.name)
    return missing


def test_numpy_check_can_fail():
    source = "def a():\n    return np.zeros(2)\ndef b():\n    import numpy as np\n    return np.ones(1)\n"
    assert functions_using_numpy_without_importing_it(source) == ["a"]


@pytest.mark.parametrize("path", sorted((ROOT / "topopt" / "commands").glob("*.py")),
                         ids=lambda p: p.name)
def test_command_modules_import_numpy_where_they_use_it(path):
    # Command modules keep numpy out of their top level (`buttress --help` must not load
    # it); a function that uses np must import it itself, or it fails at run time.
    assert functions_using_numpy_without_importing_it(path.read_text(encoding="utf-8")) == []


def _modules_loaded_by(code: str) -> set[str]:
    out = subprocess.run(
        [sys.executable, "-c", code + "\nimport sys\nprint('\\n'.join(sorted(sys.modules)))"],
        cwd=ROOT, capture_output=True, text=True, check=True, timeout=120,
        env={**os.environ, "PYTHONPATH": str(ROOT)},
    )
    return set(out.stdout.split())


@pytest.mark.parametrize("code", [
    "import topopt",
    "from topopt.cli import build_parser\nbuild_parser().format_help()",
])
def test_import_topopt_and_the_command_line_parser_load_no_numerics(code):
    # `buttress --help` builds the parser and nothing else (its time is measured by
    # benchmarks/startup.py, not here)
    loaded = _modules_loaded_by(code)
    assert "topopt" in loaded
    heavy = {"numpy", "scipy", "numba", "matplotlib", "topopt.driver", "topopt.problem"}
    assert not heavy & loaded, sorted(heavy & loaded)


def test_lazy_names_of_the_package_resolve():
    loaded = _modules_loaded_by("import topopt\ntopopt.optimize\ntopopt.load_problem")
    assert {"topopt.driver", "topopt.problem", "numpy"} <= loaded
    import topopt

    for name in topopt.__all__:
        assert getattr(topopt, name) is not None
    with pytest.raises(AttributeError, match="no_such_name"):
        topopt.no_such_name  # noqa: B018
