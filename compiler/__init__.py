"""toposcout's library: model → circuit → compiled → noise → simulation → metrics.

A pure library: values in, values out; no I/O, no printing, no environment variables.
The stages are usable one by one from a notebook::

    >>> from compiler import parse_model, build_ansatz, make_connectivity, get_gate_set, compile_ansatz
    >>> model = parse_model({"name": "demo", "variables": ["a", "b", "c"], "cliques": [["a", "b"], ["b", "c"]]})
    >>> ansatz = build_ansatz(model, seed=1)
    >>> compiled = compile_ansatz(ansatz, make_connectivity("line", 3), get_gate_set("cx"), strategy="generic", seeds=2)
    >>> compiled.figures()["swaps"]
    0
"""

from compiler.version import __version__
from compiler.errors import (
    CapacityError,
    CompileError,
    ModelError,
    ProfileError,
    TargetError,
    ToposcoutError,
)
from compiler.model import Factor, Limits, Model, load_model, parse_model, target_distribution
from compiler.ansatz import Ansatz, Term, build_ansatz
from compiler.targets import (
    CONNECTIVITY_FAMILIES,
    GATE_SETS,
    Connectivity,
    GateSet,
    build_target,
    get_gate_set,
    make_connectivity,
)
from compiler.compile import Compiled, compile_ansatz

__all__ = [
    "__version__",
    "ToposcoutError",
    "ModelError",
    "TargetError",
    "ProfileError",
    "CapacityError",
    "CompileError",
    "Factor",
    "Limits",
    "Model",
    "load_model",
    "parse_model",
    "target_distribution",
    "Ansatz",
    "Term",
    "build_ansatz",
    "CONNECTIVITY_FAMILIES",
    "GATE_SETS",
    "Connectivity",
    "GateSet",
    "build_target",
    "get_gate_set",
    "make_connectivity",
    "Compiled",
    "compile_ansatz",
]
