"""The package installs under one import name, editable or regular, with its data files.

Common practice (setuptools package data): every data file the code reads must match a
``package-data`` pattern of its package, or a wheel silently leaves it out. The folders
``compiler/``, ``service/`` and ``topologies/`` are mapped to ``toposcout.compiler``,
``toposcout.service`` and ``toposcout.topologies`` by ``[tool.setuptools] package-dir``.
"""

from __future__ import annotations

import fnmatch
import os
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest


ROOT = Path(__file__).resolve().parent.parent


def _setuptools() -> dict:
    with open(ROOT / "pyproject.toml", "rb") as fh:
        return tomllib.load(fh)["tool"]["setuptools"]


def _folder(package: str) -> Path:
    """The repository folder of an import package, through the package-dir map."""
    mapping = _setuptools()["package-dir"]
    parts = package.split(".")
    for cut in range(len(parts), 0, -1):
        head = ".".join(parts[:cut])
        if head in mapping:
            return ROOT / mapping[head] / Path(*parts[cut:])
    raise AssertionError(f"{package} is not under any package-dir entry")


def _uncovered(package: str, suffixes: tuple[str, ...]) -> list[str]:
    pats = _setuptools()["package-data"].get(package, [])
    base = _folder(package)
    missing = []
    for p in base.rglob("*"):
        if p.is_file() and p.suffix in suffixes and "__pycache__" not in p.parts:
            rel = p.relative_to(base).as_posix()
            if not any(fnmatch.fnmatch(rel, pat) for pat in pats):
                missing.append(rel)
    return missing


def test_every_python_folder_is_a_declared_package():
    declared = set(_setuptools()["packages"])
    for name in declared:
        assert (_folder(name) / "__init__.py").is_file(), name
    for top in ("toposcout.compiler", "toposcout.service", "toposcout.topologies"):
        for init in _folder(top).rglob("__init__.py"):
            rel = init.parent.relative_to(_folder(top))
            name = ".".join((top, *rel.parts))
            assert name in declared, f"{init} is a package that pyproject.toml does not list"


def test_data_files_are_package_data():
    assert _uncovered("toposcout.topologies", (".toml", ".json")) == []
    assert _uncovered("toposcout.compiler", (".json",)) == []
    assert _uncovered("toposcout.service.web", (".html", ".css", ".js", ".svg")) == []
    # the migration scripts are read by alembic as files, not imported as modules
    store = _uncovered("toposcout.service.store", (".py", ".mako"))
    assert [p for p in store if p.startswith("migrations/")] == []


def test_the_editable_install_maps_the_folders():
    import toposcout
    import toposcout.compiler
    import toposcout.service

    assert Path(toposcout.compiler.__file__).parent == ROOT / "compiler"
    assert Path(toposcout.service.__file__).parent == ROOT / "service"
    assert sorted(toposcout.__all__) == sorted(["__version__", "compare", "Client", "load_model"])
    for name in toposcout.__all__:
        assert getattr(toposcout, name) is not None, name


_CHECK_INSTALLED = r"""
import sys
sys.path.insert(0, sys.argv[1])
import toposcout
from pathlib import Path
assert Path(toposcout.__file__).is_relative_to(sys.argv[1]), toposcout.__file__
from importlib import resources
from toposcout.compiler.profiles import profile_catalogue
from toposcout.compiler.targets import connectivity_catalogue
assert profile_catalogue() and connectivity_catalogue()
web = resources.files("toposcout.service.web")
assert (web / "templates" / "study.html").is_file() and (web / "static" / "dashboard.css").is_file()
assert (resources.files("toposcout.service.store") / "migrations" / "env.py").is_file()
df = toposcout.compare({"name": "installed", "variables": ["a", "b", "c"], "cliques": [["a", "b"], ["b", "c"]]},
                       ["line"], compile_only=True, seeds=1)
print(list(df["connectivity"]))
"""


@pytest.mark.skipif(os.environ.get("TOPOSCOUT_SKIP_WHEEL") == "1", reason="TOPOSCOUT_SKIP_WHEEL=1")
def test_a_regular_install_finds_code_and_data(tmp_path):
    """Build the wheel, install it into a folder of its own (not editable) and use it from elsewhere."""
    wheels, target = tmp_path / "wheels", tmp_path / "site"
    build = subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", str(ROOT), "-w", str(wheels)],
                           capture_output=True, text=True, timeout=300)
    assert build.returncode == 0, build.stderr[-3000:]
    (wheel,) = wheels.glob("toposcout-*.whl")
    inst = subprocess.run([sys.executable, "-m", "pip", "install", "-q", "--no-deps", "--target", str(target),
                           str(wheel)], capture_output=True, text=True, timeout=300)
    assert inst.returncode == 0, inst.stderr[-3000:]
    run = subprocess.run([sys.executable, "-c", _CHECK_INSTALLED, str(target)], cwd=tmp_path,
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr[-3000:]
    assert "line-3" in run.stdout


def _requirement_name(req: str) -> str:
    import re

    return re.split(r"[\[<>=!~;\s]", req, maxsplit=1)[0].lower().replace("_", "-").replace(".", "-")


def _third_party_imports(folders: tuple[str, ...]) -> dict[str, set[str]]:
    import ast

    found: dict[str, set[str]] = {}
    for folder in folders:
        for path in (ROOT / folder).rglob("*.py"):
            for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
                names = []
                if isinstance(node, ast.Import):
                    names = [a.name for a in node.names]
                elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                    names = [node.module]
                for n in names:
                    top = n.split(".")[0]
                    if top not in sys.stdlib_module_names and top not in ("toposcout", "tests", "__future__"):
                        found.setdefault(top, set()).add(path.relative_to(ROOT).as_posix())
    return found


def test_every_imported_module_is_a_declared_dependency():
    # Common practice (PEP 621 dependencies): what the package imports must be declared, or a
    # clean install breaks. The import name -> distribution map is the installed metadata's.
    from importlib.metadata import packages_distributions

    with open(ROOT / "pyproject.toml", "rb") as fh:
        project = tomllib.load(fh)["project"]
    main = {_requirement_name(r) for r in project["dependencies"]}
    test = main | {_requirement_name(r) for r in project["optional-dependencies"]["test"]}
    dists = {k: {_requirement_name(d) for d in v} for k, v in packages_distributions().items()}
    for folders, declared, what in ((("compiler", "service", "toposcout", "topologies"), main, "dependencies"),
                                    (("tests", "benchmarks"), test, "dependencies or the test extra")):
        for module, where in sorted(_third_party_imports(folders).items()):
            assert module in dists, f"{module} (imported by {sorted(where)[0]}) is not installed"
            assert dists[module] & declared, (f"{module} (imported by {sorted(where)[0]}) comes from "
                                              f"{sorted(dists[module])}, not declared in {what}")


def test_every_declared_dependency_says_why():
    text = (ROOT / "pyproject.toml").read_text(encoding="utf-8")
    body = text.split("\ndependencies = [", 1)[1].split("\n[project.scripts]", 1)[0]
    lines = [ln for ln in body.splitlines() if ln.strip().startswith('"')]
    assert len(lines) >= 20
    for ln in lines:
        reason = ln.split("#", 1)[1].strip() if "#" in ln else ""
        assert len(reason) > 10, f"no reason beside {ln.strip()}"
