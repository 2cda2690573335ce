"""Architecture rules that keep the library pure and the imports one-way.

Common practice (layered architecture, acyclic dependencies principle): no loops between
modules anywhere in the package; each compiler module imports only modules earlier in the flow
model → ansatz → targets → profiles → compiled → synthesis → compile → noise → simulate →
metrics → fit → study → bench; compiler never imports service and does no I/O of its own kind (no
sockets, threads, environment variables or printing); in the service, the executor interface
imports no executor and the executors never import each other; the notebook client loads no
server dependency at import.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import networkx as nx
import pytest

import toposcout.compiler as compiler

ROOT = Path(__file__).resolve().parent.parent
FOLDERS = {"toposcout": ROOT / "toposcout", "toposcout.compiler": ROOT / "compiler",
           "toposcout.service": ROOT / "service", "toposcout.topologies": ROOT / "topologies"}
ORDER = ["version", "errors", "options", "rows", "model", "ansatz", "targets", "profiles", "devices", "compiled", "synthesis",
         "compile", "noise", "simulate", "metrics", "fit", "trajectories", "parity", "clifford", "methods", "regions", "study", "parts", "bench"]


def _modules() -> dict[str, Path]:
    """Every module of the package by its dotted name (migrations are alembic scripts, not modules)."""
    out = {}
    for package, folder in FOLDERS.items():
        for path in folder.rglob("*.py"):
            rel = path.relative_to(folder)
            if "migrations" in rel.parts or (package == "toposcout" and len(rel.parts) > 1):
                continue
            parts = rel.with_suffix("").parts
            if parts[-1] == "__init__":
                parts = parts[:-1]
            out[".".join((package, *parts))] = path
    return out


MODULES = _modules()


def _imports(name: str, path: Path, *, top_level_only: bool = False) -> list[str]:
    """The modules ``name`` imports, relative imports resolved."""
    tree = ast.parse(path.read_text())
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    nodes = tree.body if top_level_only else ast.walk(tree)
    out = []
    for node in nodes:
        if isinstance(node, ast.Import):
            out += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join(anchor + ([base] if base else []))
            out.append(base)
            out += [f"{base}.{a.name}" for a in node.names if f"{base}.{a.name}" in MODULES]
    return out


def import_graph() -> nx.DiGraph:
    g = nx.DiGraph()
    for name, path in MODULES.items():
        g.add_node(name)
        for mod in _imports(name, path):
            # `import a.b.c` also runs a and a.b: an edge to the deepest module we own
            while mod and mod not in MODULES:
                mod = mod.rpartition(".")[0]
            if mod and mod != name and not name.startswith(mod + "."):
                g.add_edge(name, mod)
    return g


def test_no_import_loops_anywhere():
    g = import_graph()
    assert g.number_of_nodes() > 50  # the walk found the whole package, not an empty folder
    loops = [c for c in nx.strongly_connected_components(g) if len(c) > 1]
    assert loops == [], f"modules that import each other (directly or round a loop): {loops}"


def test_the_graph_sees_relative_and_function_local_imports():
    g = import_graph()
    # package re-exports and imports inside functions count: a loop hidden in a function is a loop
    assert g.has_edge("toposcout.service.store", "toposcout.service.store.database")
    assert g.has_edge("toposcout.service.cli", "toposcout.service.api.server")


def _compiler_key(name: str) -> str:
    return name.split(".")[2] if name.count(".") >= 2 else ""


LIB = sorted(n for n in MODULES if n.startswith("toposcout.compiler."))


@pytest.mark.parametrize("name", LIB)
def test_compiler_imports_flow_forward(name):
    me = _compiler_key(name)
    for mod in _imports(name, MODULES[name]):
        assert not mod.startswith("toposcout.service"), f"{name} imports {mod}: compiler must not import service"
        if mod.startswith("toposcout.compiler.") and _compiler_key(mod) != me:
            assert ORDER.index(_compiler_key(mod)) < ORDER.index(me), (
                f"{name} imports {mod}, which comes later in the data flow")


@pytest.mark.parametrize("name", LIB)
def test_compiler_is_pure(name):
    path = MODULES[name]
    text = path.read_text()
    for node in ast.walk(ast.parse(text)):
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            assert node.func.id != "print", f"{path} prints"
    for mod in _imports(name, path):
        assert mod.split(".")[0] not in ("socket", "threading", "http", "urllib", "requests", "httpx"), (
            f"{path} imports {mod}")
    assert "os.environ" not in text and "getenv" not in text, f"{path} reads environment variables"


def test_executors_are_siblings():
    g = import_graph()
    base = "toposcout.service.execution.base"
    executors = ["toposcout.service.execution.local", "toposcout.service.execution.dask"]
    assert not any(n.startswith("toposcout.service.execution.") for n in g.successors(base)), (
        "the executor interface must import no executor")
    for a in executors:
        assert base in nx.descendants(g, a), f"{a} should build on the interface"
        for b in executors:
            assert a == b or b not in nx.descendants(g, a), f"{a} imports {b}"


def test_the_library_and_the_topologies_never_import_the_service():
    g = import_graph()
    for name in MODULES:
        if name.startswith(("toposcout.compiler", "toposcout.topologies")):
            assert not any(d.startswith("toposcout.service") for d in nx.descendants(g, name)), name


def test_client_and_package_import_no_server_dependency():
    # a notebook that only talks to a server must not load the web framework, the database layer or Dask
    code = ("import sys, toposcout, toposcout.service.client; "
            "heavy = [m for m in ('fastapi', 'starlette', 'uvicorn', 'sqlalchemy', 'alembic', 'dask', 'distributed',"
            " 'qiskit_aer') if m in sys.modules]; print(heavy)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, cwd=ROOT)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_public_names_exist():
    # the public API is explicit: every name in __all__ is importable from the package
    for name in compiler.__all__:
        assert getattr(compiler, name) is not None, name
