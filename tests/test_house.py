"""The house: two libraries and the application on top, installed under the one name ``gripsight``.

Read from the source with :mod:`ast` (every ``import`` and ``from ... import``, at any depth, lazy ones
inside functions included), so a forbidden import cannot hide in a function body.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from importlib import metadata
from pathlib import Path

import pytest

import gripsight.app
import gripsight.planning
import gripsight.vision

ROOT = Path(__file__).resolve().parents[1]


def _package_dirs() -> dict[str, Path]:
    return {
        "gripsight.vision": Path(gripsight.vision.__file__).parent,
        "gripsight.planning": Path(gripsight.planning.__file__).parent,
        "gripsight.app": Path(gripsight.app.__file__).parent,
    }


def _modules() -> dict[str, Path]:
    """Every module of the installed packages by its dotted name (planning's app folder excluded from planning)."""
    found = {}
    for pkg, folder in _package_dirs().items():
        for path in folder.rglob("*.py"):
            rel = path.relative_to(folder).with_suffix("")
            if pkg == "gripsight.planning" and rel.parts[0] == "app":
                continue                                # the app folder installs as gripsight.app
            parts = [p for p in rel.parts if p != "__init__"]
            found[".".join([pkg, *parts])] = path
    return found


def _imports(name: str, path: Path) -> set[str]:
    """The gripsight modules ``name`` imports (relative imports resolved)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[: len(anchor) - (node.level - 1)]
                base = ".".join(anchor + ([base] if base else []))
            out.add(base)
            out.update(f"{base}.{a.name}" for a in node.names)
    return {m for m in out if m.startswith("gripsight")}


def _graph() -> dict[str, set[str]]:
    modules = _modules()
    return {name: {m for m in _imports(name, path) if m in modules and m != name} for name, path in modules.items()}


def test_no_top_level_vision_or_planning_and_the_libraries_are_gripsight_subpackages():
    for top in ("vision", "planning"):                  # from a folder that is not the checkout
        done = subprocess.run([sys.executable, "-c", f"import {top}"], cwd="/", capture_output=True, text=True)
        assert done.returncode != 0 and "No module named" in done.stderr, top
    import site
    installed = [p for p in sys.path if p.endswith("site-packages")] + site.getsitepackages()
    dist = next(iter(metadata.distributions(path=installed, name="gripsight")))   # not a build's egg-info
    tops = {Path(str(f)).parts[0] for f in dist.files or [] if "__editable__" not in str(f)}
    code_tops = {t.removesuffix(".py") for t in tops
                 if not t.endswith((".dist-info", ".pth")) and not t.startswith("__editable__") and t not in ("..", "bin")}
    assert code_tops <= {"gripsight"}, code_tops
    assert (dist.read_text("top_level.txt") or "").split() == ["gripsight"]
    assert dist.entry_points.select(group="console_scripts")["gripsight"].value == "gripsight.app.cli:entry"


def test_the_libraries_do_not_import_each_other_or_the_app():
    graph = _graph()
    for name, deps in graph.items():
        if name.startswith("gripsight.vision"):
            bad = {d for d in deps if d.startswith(("gripsight.planning", "gripsight.app"))}
        elif name.startswith("gripsight.planning"):
            bad = {d for d in deps if d.startswith(("gripsight.vision", "gripsight.app"))}
        else:
            continue
        assert not bad, f"{name} imports {sorted(bad)}"
        if not name.startswith("gripsight.vision.synth"):
            assert not {d for d in deps if d.startswith("gripsight.vision.synth")}, f"{name} imports the renderer"


def test_the_import_graph_has_no_circle():
    graph = _graph()
    state: dict[str, int] = {}

    def visit(node, trail):
        state[node] = 1
        for dep in sorted(graph[node]):
            if state.get(dep) == 1:
                pytest.fail("import circle: " + " -> ".join(trail[trail.index(dep):] + [dep]))
            if dep not in state:
                visit(dep, trail + [dep])
        state[node] = 2

    for node in sorted(graph):
        if node not in state:
            visit(node, [node])
    # every module was walked to the end, and the walk saw the house's real edges (e.g. the app on both libraries)
    assert set(state) == set(graph) and set(state.values()) == {2}
    assert {"gripsight.vision.parts", "gripsight.planning.picks"} <= set().union(*graph.values())


def test_the_import_graph_reader_sees_lazy_imports(tmp_path):
    # the check above is only as good as its reader: an import inside a function counts
    src = tmp_path / "m.py"
    src.write_text("def f():\n    from gripsight.planning.arm import Arm\n    from . import x\n")
    assert _imports("gripsight.vision.m", src) == {"gripsight.planning.arm", "gripsight.planning.arm.Arm",
                                                   "gripsight.vision", "gripsight.vision.x"}
