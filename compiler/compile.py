"""Compilation of an ansatz onto a connectivity and gate set.

Strategies:

* ``generic``: qiskit's preset pass manager (layout, routing with SWAPs, translation,
  optimisation) at ``optimization_level`` (default 3), run with ``seeds`` seeds; the best
  by two-qubit count, then depth, is kept and its seed recorded.
* ``structured``: our synthesis of the commuting block for the coupling graph
  (:mod:`toposcout.compiler.synthesis`).
* ``auto`` (default): both, keeping the better by two-qubit count then depth; the result
  records which won and both counts in ``extra``.

Every result is checked: each two-qubit gate lies on an edge of the coupling map, and
physical qubit ``final_layout[i]`` is measured into bit ``i``.

Examples:
    >>> from toposcout.compiler.model import parse_model
    >>> from toposcout.compiler.ansatz import build_ansatz
    >>> from toposcout.compiler.targets import make_connectivity, get_gate_set
    >>> m = parse_model({"variables": ["a", "b", "c"], "cliques": [["a", "b", "c"]]})
    >>> c = compile_ansatz(build_ansatz(m), make_connectivity("all-to-all", 3), get_gate_set("cx"),
    ...                    strategy="generic", seeds=1)
    >>> c.figures()["swaps"], sorted(c.final_layout)
    (0, [0, 1, 2])
"""

from __future__ import annotations

import time

from qiskit.transpiler import generate_preset_pass_manager

from toposcout.compiler.ansatz import Ansatz
from toposcout.compiler.compiled import (
    NON_GATES,
    Compiled,
    check_coupling,
    load_qpy,
    measured_layout,
    qasm3_text,
    qpy_bytes,
)
from toposcout.compiler.errors import CompileError, TargetError
from toposcout.compiler.synthesis import compile_structured
from toposcout.compiler.targets import Connectivity, GateSet, build_target

__all__ = [
    "STRATEGIES",
    "Compiled",
    "compile_ansatz",
    "compile_generic",
    "NON_GATES",
    "check_coupling",
    "measured_layout",
    "qasm3_text",
    "qpy_bytes",
    "load_qpy",
]

STRATEGIES = ("generic", "structured", "auto")
_NON_GATES = NON_GATES


class _SwapRecorder:
    """Pass-manager callback that remembers where routing put its SWAPs.

    SWAPs exist between routing and translation, on the physical qubits of that moment;
    a later layout pass (qiskit's post-layout ApplyLayout) may relabel the physical qubits,
    so the last snapshot holding the most SWAPs is kept: it is in the final labelling.
    """

    def __init__(self):
        self.count = 0
        self._where: dict[str, int] = {}

    def __call__(self, pass_, dag, time, property_set, count):
        n = dag.count_ops().get("swap", 0)
        if n and n >= self.count:
            where: dict[str, int] = {}
            for node in dag.op_nodes():
                if node.op.name == "swap":
                    a, b = sorted(dag.find_bit(q).index for q in node.qargs)
                    where[f"{a}-{b}"] = where.get(f"{a}-{b}", 0) + 1
            self.count, self._where = n, where

    def edges(self) -> dict[str, int]:
        """``{"a-b": count}`` over the final physical qubits."""
        return dict(sorted(self._where.items()))


def compile_generic(
    ansatz: Ansatz,
    connectivity: Connectivity,
    gate_set: GateSet,
    *,
    seeds: int = 5,
    optimization_level: int = 3,
) -> Compiled:
    """qiskit's preset pipeline with seeds 0..seeds-1; keep the best by (2q count, depth)."""
    if ansatz.num_qubits > connectivity.num_qubits:
        raise TargetError(
            f"the model has {ansatz.num_qubits} variables but {connectivity.name} has "
            f"{connectivity.num_qubits} qubits", field="connectivity")
    if seeds < 1:
        raise CompileError(f"seeds must be at least 1, got {seeds}", field="seeds")
    logical = ansatz.circuit(measure=True)
    target = build_target(connectivity, gate_set)
    start = time.perf_counter()
    best: tuple | None = None
    for seed in range(seeds):
        pm = generate_preset_pass_manager(optimization_level, target=target, seed_transpiler=seed)
        rec = _SwapRecorder()
        out = pm.run(logical, callback=rec)
        two = sum(1 for ins in out.data if ins.operation.num_qubits == 2)
        depth = out.depth(lambda ins: ins.operation.name not in _NON_GATES)
        key = (two, depth, seed)
        if best is None or key < best[0]:
            best = (key, out, rec, seed)
    elapsed = time.perf_counter() - start
    _, out, rec, seed = best
    check_coupling(out, connectivity)
    initial = tuple(out.layout.initial_index_layout(filter_ancillas=True)) if out.layout else tuple(
        range(ansatz.num_qubits))
    return Compiled(
        circuit=out,
        initial_layout=initial,
        final_layout=measured_layout(out),
        strategy="generic",
        seed=seed,
        compile_seconds=elapsed,
        swaps=rec.count,
        connectivity=connectivity,
        gate_set=gate_set,
        extra={"swap_edges": rec.edges()},
    )


def _structured(ansatz, connectivity, gate_set, seed):
    return compile_structured(ansatz, connectivity, gate_set, seed=seed)


def compile_ansatz(
    ansatz: Ansatz,
    connectivity: Connectivity,
    gate_set: GateSet,
    *,
    strategy: str = "auto",
    seeds: int = 5,
    optimization_level: int = 3,
) -> Compiled:
    """Compile ``ansatz`` for the connectivity and gate set with ``strategy``.

    strategy: default ``"auto"``: the better of ``generic`` and ``structured``.
    seeds: default 5; transpiler seeds tried by ``generic``.
    optimization_level: default 3; qiskit's preset level for ``generic``.
    """
    if strategy not in STRATEGIES:
        raise CompileError(f"unknown strategy {strategy!r}; choose one of {', '.join(STRATEGIES)}",
                           field="strategy")
    if strategy == "generic":
        return compile_generic(ansatz, connectivity, gate_set, seeds=seeds, optimization_level=optimization_level)
    if strategy == "structured":
        out = _structured(ansatz, connectivity, gate_set, 0)
        check_coupling(out.circuit, connectivity)
        return out
    gen = compile_generic(ansatz, connectivity, gate_set, seeds=seeds, optimization_level=optimization_level)
    st = _structured(ansatz, connectivity, gate_set, 0)
    check_coupling(st.circuit, connectivity)
    both = {
        "generic_two_qubit_gates": gen.two_qubit_gates(),
        "structured_two_qubit_gates": st.two_qubit_gates(),
        "generic_depth": gen.depth(),
        "structured_depth": st.depth(),
    }
    win = min((gen, st), key=lambda c: (c.two_qubit_gates(), c.depth(), c.strategy != "generic"))
    total = gen.compile_seconds + st.compile_seconds
    return Compiled(
        circuit=win.circuit,
        initial_layout=win.initial_layout,
        final_layout=win.final_layout,
        strategy=win.strategy,
        seed=win.seed,
        compile_seconds=total,
        swaps=win.swaps,
        connectivity=connectivity,
        gate_set=gate_set,
        extra={**win.extra, **both, "auto_winner": win.strategy},
    )
