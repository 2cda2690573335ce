"""The data files travel with the package (a non-editable install finds them too).

Common practice (setuptools package data): every data file the code reads must match a
``package-data`` pattern of its package, or a wheel silently leaves it out.
"""

from __future__ import annotations

import fnmatch
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _patterns() -> dict[str, list[str]]:
    with open(ROOT / "pyproject.toml", "rb") as fh:
        return tomllib.load(fh)["tool"]["setuptools"]["package-data"]


def _covered(package: str, suffixes: tuple[str, ...]) -> list[str]:
    pats = _patterns().get(package, [])
    base = ROOT / package
    missing = []
    for p in base.rglob("*"):
        if p.is_file() and p.suffix in suffixes and "__pycache__" not in p.parts:
            rel = p.relative_to(base).as_posix()
            if not any(fnmatch.fnmatch(rel, pat) for pat in pats):
                missing.append(rel)
    return missing


def test_topology_and_profile_files_are_package_data():
    assert (ROOT / "topologies" / "__init__.py").is_file()
    assert _covered("topologies", (".toml",)) == []


def test_schema_templates_static_and_migrations_are_package_data():
    assert _covered("compiler", (".json",)) == []
    assert _covered("service", (".html", ".css", ".js", ".mako")) == []
    # the migration scripts are read by alembic as files, not imported as modules
    missing_py = [p for p in _covered("service", (".py",)) if p.startswith("migrations/")]
    assert missing_py == []
