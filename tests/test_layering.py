"""Architecture rules that keep the library pure and the data flow one-way.

Common practice (layered architecture): each compiler module imports only modules earlier in
the flow model → ansatz → targets → profiles → compiled → synthesis → compile → noise → simulate →
metrics → study; compiler never imports service, and does no I/O of its own kind
(no sockets, threads, environment variables or printing).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import compiler

ROOT = Path(__file__).resolve().parent.parent
ORDER = ["version", "errors", "model", "ansatz", "targets", "profiles", "compiled", "synthesis", "compile", "noise",
         "simulate", "metrics", "study"]


def _module_key(path: Path) -> str:
    rel = path.relative_to(ROOT / "compiler")
    return rel.parts[0].removesuffix(".py") if len(rel.parts) > 1 else rel.stem


def _imports(path: Path) -> list[str]:
    tree = ast.parse(path.read_text())
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module:
            out.append(node.module)
    return out


LIB_FILES = sorted(p for p in (ROOT / "compiler").rglob("*.py") if p.name != "__init__.py" or p.parent.name == "synthesis")


@pytest.mark.parametrize("path", LIB_FILES, ids=lambda p: str(p.relative_to(ROOT)))
def test_compiler_imports_flow_forward(path):
    me = _module_key(path)
    rank = ORDER.index(me)
    for mod in _imports(path):
        assert not mod.startswith("service"), f"{path} imports {mod}: compiler must not import service"
        if mod.startswith("compiler."):
            other = mod.split(".")[1]
            if other == me:
                continue
            assert ORDER.index(other) < rank, f"{path} imports {mod}, which comes later in the data flow"


@pytest.mark.parametrize("path", LIB_FILES, ids=lambda p: str(p.relative_to(ROOT)))
def test_compiler_is_pure(path):
    text = path.read_text()
    tree = ast.parse(text)
    for node in ast.walk(tree):
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            assert node.func.id != "print", f"{path} prints"
    for mod in _imports(path):
        assert mod.split(".")[0] not in ("socket", "threading", "http", "urllib", "requests", "httpx"), (
            f"{path} imports {mod}")
    assert "os.environ" not in text and "getenv" not in text, f"{path} reads environment variables"


def test_public_names_exist():
    # the public API is explicit: every name in __all__ is importable from the package
    for name in compiler.__all__:
        assert hasattr(compiler, name), name
