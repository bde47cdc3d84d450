"""The package's rooms and the one-way rule between them (docs/architecture.md).

Reads every module's imports with :mod:`ast` (module level and inside functions alike) and
fails on an import that goes up a layer, into a room a layer may not enter, or round a cycle.
The layer table is the one in docs/architecture.md; keep the two in step.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "locate"

# room -> the rooms it may import (besides itself). ``locate`` is the public facade.
ALLOWED = {
    "errors": set(),
    "common": {"errors"},
    "physics": {"errors", "common"},
    "geometry": {"errors", "common", "physics"},
    "io": {"errors", "common", "physics", "geometry"},
    "signal": {"errors", "common", "physics", "geometry"},
    "synth": {"errors", "common", "physics", "geometry"},
    "fix": {"errors", "common", "physics", "geometry", "signal"},
    "track": {"errors", "common", "physics", "geometry", "signal", "fix"},
    "sync": {"errors", "common", "physics", "geometry", "signal", "fix"},
    "accuracy": {"errors", "common", "physics", "geometry", "signal", "fix", "track"},
    "results": {"errors", "common", "physics", "geometry", "accuracy"},
    "workflows": {"errors", "common", "physics", "geometry", "io", "signal", "synth", "fix",
                  "track", "sync", "accuracy", "results"},
    "draw": {"errors", "common", "physics", "geometry", "io", "accuracy", "results"},
    "report": {"errors", "common", "physics", "geometry", "io", "accuracy", "results", "draw",
               "workflows"},
    "api": {"errors", "common", "physics", "geometry", "io", "signal", "synth", "fix", "track",
            "sync", "accuracy", "results", "workflows", "draw", "report"},
    "cli": {"errors", "common", "physics", "geometry", "io", "signal", "synth", "fix", "track",
            "sync", "accuracy", "results", "workflows", "draw", "report"},
    "__main__": {"cli"},
}
FLAT_MODULES_MAX = 12  # modules directly in locate/ (the "at most ~12")


def _module_name(path: Path) -> str:
    parts = path.relative_to(ROOT.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports(path: Path) -> set[str]:
    """Every ``locate...`` module a file imports (``from a import b`` counts ``a`` and, when
    ``a.b`` is a module, ``a.b``)."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            assert node.level == 0, f"{path}: relative import (use locate.…)"
            mod = node.module or ""
            if mod == "locate" or mod.startswith("locate."):
                found.add(mod)
                for alias in node.names:
                    found.add(f"{mod}.{alias.name}")
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.split(".")[0] == "locate")
    return found


def _graph():
    modules = {_module_name(p): p for p in ROOT.rglob("*.py")}
    edges = {}
    for name, path in modules.items():
        edges[name] = {m for m in _imports(path) if m in modules and m != name}
    return modules, edges


def _room(module: str) -> str:
    parts = module.split(".")
    return "locate" if len(parts) == 1 else parts[1]


def test_every_room_is_in_the_layer_table():
    modules, _ = _graph()
    rooms = {_room(m) for m in modules} - {"locate"}
    assert rooms <= set(ALLOWED), f"rooms missing from the layer table: {rooms - set(ALLOWED)}"


def test_no_import_goes_up_a_layer_or_into_a_forbidden_room():
    _, edges = _graph()
    bad = []
    for src, dsts in edges.items():
        for dst in dsts:
            a, b = _room(src), _room(dst)
            if a == b or a == "locate":
                continue
            if b == "locate":  # only the version number may come from the facade
                continue
            if b not in ALLOWED[a]:
                bad.append(f"{src} -> {dst}")
    assert not bad, "imports against the layer table:\n" + "\n".join(sorted(bad))


def test_only_the_version_comes_from_the_facade():
    bad = []
    for path in ROOT.rglob("*.py"):
        if path.parent == ROOT and path.name == "__init__.py":
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.module == "locate":
                names = {a.name for a in node.names}
                if names - {"__version__"}:
                    bad.append(f"{path.relative_to(ROOT)}: from locate import {names}")
    assert not bad, bad


def test_no_import_cycle_between_modules():
    _, edges = _graph()
    # keep only edges between real modules (a package's __init__ counts as its own module)
    state, stack, cycles = {}, [], []

    def visit(n):
        state[n] = 1
        stack.append(n)
        for m in sorted(edges.get(n, ())):
            if m.startswith(n + "."):  # a package importing its own submodule is not a cycle
                continue
            if state.get(m) == 1:
                cycles.append(stack[stack.index(m):] + [m])
            elif m not in state:
                visit(m)
        stack.pop()
        state[n] = 2

    for n in sorted(edges):
        if n not in state:
            visit(n)
    assert not cycles, "import cycles:\n" + "\n".join(" -> ".join(c) for c in cycles)


def test_nothing_imports_the_command_line():
    _, edges = _graph()
    users = sorted(s for s, d in edges.items()
                   if any(_room(x) == "cli" for x in d) and _room(s) not in ("cli", "__main__"))
    assert not users, users


def test_the_flat_folder_stays_small():
    flat = sorted(p.name for p in ROOT.glob("*.py"))
    assert len(flat) <= FLAT_MODULES_MAX, flat


def test_every_room_indexes_itself():
    for init in ROOT.glob("*/__init__.py"):
        doc = ast.get_docstring(ast.parse(init.read_text(encoding="utf-8")))
        assert doc and len(doc.split()) >= 20, f"{init.parent.name}/__init__.py: no index"


@pytest.mark.parametrize("stmt", ["import locate", "import locate.cli"])
def test_import_locate_pulls_in_neither_plotting_nor_the_report(stmt):
    # `import locate` must not import click or matplotlib; `tdoa --help` needs click only
    # and `tdoa --help` (import locate.cli) not even numpy: start-up stays short
    heavy = "('matplotlib', 'jinja2', 'distributed', 'scipy.optimize'" + (
        ", 'numpy')" if stmt == "import locate.cli" else ")")
    code = (f"import sys; {stmt}; "
            f"bad = [m for m in {heavy} if m in sys.modules]; "
            + ("bad += ['click'] if 'click' in sys.modules else []; " if stmt == "import locate"
               else "") + "print(','.join(bad))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.strip()
    assert out == "", f"{stmt} imports {out}"
