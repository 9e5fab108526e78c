"""The dependency rules of the layout, read from the source with ``ast``.

* ``edges`` never imports ``roughness``;
* no import cycle between the project's modules;
* the statistics modules of ``roughness`` use no files, tables or plotting;
* the application modules import nothing from the runner except the runner's own callers.
"""
import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("edges", "roughness")
STATISTICS = ("roughness.analysis", "roughness.stats", "roughness.psd", "roughness.noise", "roughness.psd_model",
              "roughness._selfaffine", "roughness.synth")


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports(path: Path) -> set:
    """Absolute names of the modules a file imports (``from . import x`` resolved)."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    out = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[: len(anchor) - (node.level - 1)]
                base = ".".join(anchor + ([base] if base else []))
            out.add(base)
            out.update(f"{base}.{a.name}" for a in node.names)      # "from pkg import module"
    return out


def _graph():
    files = [p for pkg in PACKAGES for p in (ROOT / pkg).rglob("*.py")]
    modules = {_module_name(p): p for p in files}
    return {m: {i for i in _imports(p) if i in modules and i != m} for m, p in modules.items()}


def test_the_graph_covers_the_project():
    graph = _graph()
    assert {"edges.fit", "edges._windows", "roughness.analysis", "roughness.app.runner"} <= set(graph)
    assert "roughness.analysis" in graph["roughness.app.runner"]     # the reader resolves relative imports


def test_edges_never_imports_roughness():
    for path in (ROOT / "edges").rglob("*.py"):
        assert not any(i.split(".")[0] == "roughness" for i in _imports(path)), path


def test_no_import_cycles():
    # Package __init__ files only re-export; a module importing its own package's __init__ is
    # not a cycle of computation, so __init__ nodes are left out of the search.
    graph = {m: {d for d in deps if d not in PACKAGES and not d.endswith(".app")}
             for m, deps in _graph().items() if m not in PACKAGES and m != "roughness.app"}
    state = {}

    def visit(m, path):
        state[m] = "open"
        for d in graph.get(m, ()):
            if state.get(d) == "open":
                pytest.fail("import cycle: " + " -> ".join(path + [m, d]))
            if d not in state:
                visit(d, path + [m])
        state[m] = "done"

    for m in graph:
        if m not in state:
            visit(m, [])


@pytest.mark.parametrize("module", STATISTICS)
def test_statistics_use_no_files_tables_or_plots(module):
    path = ROOT / (module.replace(".", "/") + ".py")
    banned = {"pandas", "matplotlib", "pathlib", "tifffile", "imageio", "json", "pickle", "sqlite3", "tqdm",
              "roughness.app", "edges.io"}
    tree = ast.parse(path.read_text())
    used = {i.split(".")[0] if not i.startswith(("roughness", "edges")) else ".".join(i.split(".")[:2])
            for i in _imports(path)}
    assert not used & banned, (module, used & banned)
    calls = {n.func.id for n in ast.walk(tree) if isinstance(n, ast.Call) and isinstance(n.func, ast.Name)}
    assert "open" not in calls and "print" not in calls, module


def test_application_projections_do_not_import_the_runner():
    graph = _graph()
    for module in ("roughness.app.tables", "roughness.app.report", "roughness.app.settings"):
        assert "roughness.app.runner" not in graph[module], module
