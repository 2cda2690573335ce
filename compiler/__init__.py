"""toposcout's library: model → circuit → compiled → noise → simulation → metrics.

A pure library: values in, values out; no I/O, no printing, no environment variables.
The stages are usable one by one from a notebook::

    >>> from toposcout.compiler import parse_model, build_ansatz, make_connectivity, get_gate_set, compile_ansatz
    >>> model = parse_model({"name": "demo", "variables": ["a", "b", "c"], "cliques": [["a", "b"], ["b", "c"]]})
    >>> ansatz = build_ansatz(model, seed=1)
    >>> compiled = compile_ansatz(ansatz, make_connectivity("line", 3), get_gate_set("cx"), strategy="generic", seeds=2)
    >>> compiled.figures()["swaps"]
    0
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from .version import __version__

# name -> module that defines it; loaded on first use so that importing one light module
# (errors, version) does not load qiskit
_WHERE = {
    **dict.fromkeys(("ToposcoutError", "ModelError", "TargetError", "ProfileError", "CapacityError",
                     "CompileError"), "errors"),
    **dict.fromkeys(("Factor", "Limits", "Model", "load_model", "parse_model", "target_distribution"), "model"),
    **dict.fromkeys(("Ansatz", "Term", "build_ansatz"), "ansatz"),
    **dict.fromkeys(("CONNECTIVITY_FAMILIES", "GATE_SETS", "Connectivity", "GateSet", "build_target",
                     "get_gate_set", "make_connectivity"), "targets"),
    **dict.fromkeys(("Compiled", "compile_ansatz"), "compile"),
}

__all__ = ["__version__", *_WHERE]


def __getattr__(name: str) -> Any:
    try:
        module = _WHERE[name]
    except KeyError:
        raise AttributeError(f"module 'toposcout.compiler' has no attribute {name!r}") from None
    value = getattr(import_module(f"{__name__}.{module}"), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
