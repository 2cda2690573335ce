"""The examples in the docstrings run and print what they say (Python's doctest module).

Every module of the installed package is collected, so an example in any room of the
service or the library is checked (common practice: examples in documentation are tests).
"""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import pytest

import toposcout

MODULES = sorted(m.name for m in pkgutil.walk_packages(toposcout.__path__, "toposcout.")
                 if ".migrations" not in m.name)
# the three mapped folders are packages of their own: walk them too
for sub in ("toposcout.compiler", "toposcout.service", "toposcout.topologies"):
    pkg = importlib.import_module(sub)
    MODULES += sorted(m.name for m in pkgutil.walk_packages(pkg.__path__, sub + "."))
MODULES = sorted(set(MODULES) | {"toposcout"})


def test_every_room_is_collected():
    assert {"toposcout.compiler.model", "toposcout.service.api.app", "toposcout.service.embedded"} <= set(MODULES)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(name)
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE | doctest.ELLIPSIS, verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} docstring examples failed in {name}"
