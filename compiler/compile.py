"""Compilation of an ansatz onto a connectivity and gate set.

Strategies:

* ``generic``: qiskit's preset pass manager (layout, routing with SWAPs, translation,
  optimisation) at ``optimization_level`` (default 3), run with ``seeds`` seeds; the best
  by two-qubit count, then depth, is kept and its seed recorded.
* ``structured``: our synthesis of the commuting block for the coupling graph
  (:mod:`compiler.synthesis`).
* ``auto`` (default): both, keeping the better by two-qubit count then depth; the result
  records which won and both counts in ``extra``.

Every result is checked: each two-qubit gate lies on an edge of the coupling map, and
physical qubit ``final_layout[i]`` is measured into bit ``i``.

Examples:
    >>> from compiler.model import parse_model
    >>> from compiler.ansatz import build_ansatz
    >>> from compiler.targets import make_connectivity, get_gate_set
    >>> m = parse_model({"variables": ["a", "b", "c"], "cliques": [["a", "b", "c"]]})
    >>> c = compile_ansatz(build_ansatz(m), make_connectivity("all-to-all", 3), get_gate_set("cx"),
    ...                    strategy="generic", seeds=1)
    >>> c.figures()["swaps"], sorted(c.final_layout)
    (0, [0, 1, 2])
"""

from __future__ import annotations

import io
import time
from dataclasses import dataclass, field
from typing import Any

from qiskit import QuantumCircuit
from qiskit.transpiler import generate_preset_pass_manager

from compiler.ansatz import Ansatz
from compiler.errors import CompileError, TargetError
from compiler.targets import Connectivity, GateSet, build_target

__all__ = [
    "STRATEGIES",
    "Compiled",
    "compile_ansatz",
    "compile_generic",
    "check_coupling",
    "measured_layout",
    "qasm3_text",
    "qpy_bytes",
    "load_qpy",
]

STRATEGIES = ("generic", "structured", "auto")
_NON_GATES = ("measure", "barrier", "delay")


@dataclass(frozen=True)
class Compiled:
    """A compiled circuit and what it costs.

    circuit: on ``connectivity.num_qubits`` wires in native gates; physical qubit
        ``final_layout[i]`` is measured into bit ``i`` at the end.
    initial_layout / final_layout: variable i → physical qubit at the start / at the end.
    """

    circuit: QuantumCircuit
    initial_layout: tuple[int, ...]
    final_layout: tuple[int, ...]
    strategy: str
    seed: int | None
    compile_seconds: float
    swaps: int
    connectivity: Connectivity
    gate_set: GateSet
    extra: dict = field(default_factory=dict, compare=False)

    def active_qubits(self) -> tuple[int, ...]:
        """Sorted physical qubits touched by a gate or a measurement."""
        c = self.circuit
        return tuple(sorted({c.find_bit(q).index for ins in c.data
                             if ins.operation.name not in ("barrier", "delay") for q in ins.qubits}))

    def two_qubit_gates(self) -> int:
        return sum(1 for ins in self.circuit.data if ins.operation.num_qubits == 2)

    def depth(self) -> int:
        """Circuit depth, measurements, barriers and delays not counted."""
        return self.circuit.depth(lambda ins: ins.operation.name not in _NON_GATES)

    def figures(self) -> dict[str, Any]:
        c = self.circuit
        one = sum(1 for ins in c.data if ins.operation.num_qubits == 1 and ins.operation.name not in _NON_GATES)
        out = {
            "strategy": self.strategy,
            "seed": self.seed,
            "physical_qubits": self.connectivity.num_qubits,
            "active_qubits": len(self.active_qubits()),
            "two_qubit_gates": self.two_qubit_gates(),
            "swaps": self.swaps,
            "depth": self.depth(),
            "two_qubit_depth": c.depth(lambda ins: ins.operation.num_qubits == 2),
            "one_qubit_gates": one,
            "compile_seconds": round(self.compile_seconds, 4),
            "initial_layout": list(self.initial_layout),
            "final_layout": list(self.final_layout),
        }
        out.update(self.extra)
        return out


def measured_layout(circuit: QuantumCircuit) -> tuple[int, ...]:
    """For each bit i, the physical qubit measured into it (the last measurement wins)."""
    where: dict[int, int] = {}
    for ins in circuit.data:
        if ins.operation.name == "measure":
            where[circuit.find_bit(ins.clbits[0]).index] = circuit.find_bit(ins.qubits[0]).index
    if sorted(where) != list(range(circuit.num_clbits)):
        raise CompileError(f"the compiled circuit measures bits {sorted(where)} instead of all "
                           f"{circuit.num_clbits}", field="circuit")
    return tuple(where[i] for i in range(circuit.num_clbits))


def check_coupling(circuit: QuantumCircuit, connectivity: Connectivity) -> None:
    """Raise :class:`CompileError` unless every two-qubit gate is on a coupling edge."""
    edges = set(connectivity.edges)
    for ins in circuit.data:
        if ins.operation.num_qubits == 2:
            a, b = (circuit.find_bit(q).index for q in ins.qubits)
            if (min(a, b), max(a, b)) not in edges:
                raise CompileError(
                    f"{ins.operation.name} on qubits ({a}, {b}) is not an edge of {connectivity.name}",
                    field="circuit",
                )
        elif ins.operation.num_qubits > 2:
            raise CompileError(f"{ins.operation.name} acts on {ins.operation.num_qubits} qubits", field="circuit")


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
        swaps: list = [0, {}]

        def count_swaps(pass_, dag, time, property_set, count, _s=swaps):
            # SWAPs exist between routing and translation; keep the fullest snapshot.
            n = dag.count_ops().get("swap", 0)
            if n > _s[0]:
                where: dict[str, int] = {}
                for node in dag.op_nodes():
                    if node.op.name == "swap":
                        a, b = sorted(dag.find_bit(q).index for q in node.qargs)
                        where[f"{a}-{b}"] = where.get(f"{a}-{b}", 0) + 1
                _s[0], _s[1] = n, where

        out = pm.run(logical, callback=count_swaps)
        two = sum(1 for ins in out.data if ins.operation.num_qubits == 2)
        depth = out.depth(lambda ins: ins.operation.name not in _NON_GATES)
        key = (two, depth, seed)
        if best is None or key < best[0]:
            best = (key, out, swaps, seed)
    elapsed = time.perf_counter() - start
    _, out, swaps, seed = best
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
        swaps=swaps[0],
        connectivity=connectivity,
        gate_set=gate_set,
        extra={"swap_edges": dict(sorted(swaps[1].items()))},
    )


def _structured(ansatz, connectivity, gate_set, seed):
    try:
        from compiler.synthesis import compile_structured
    except ImportError as exc:  # the synthesis package is part of the distribution
        raise CompileError(f"the structured strategy is not available: {exc}", field="strategy") from None
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


def qasm3_text(compiled: Compiled) -> str:
    """The compiled circuit as OpenQASM 3 (physical qubits ``$i``)."""
    from qiskit import qasm3

    return qasm3.dumps(compiled.circuit)


def qpy_bytes(compiled: Compiled) -> bytes:
    """The compiled circuit as QPY (keeps the layout)."""
    from qiskit import qpy

    buf = io.BytesIO()
    qpy.dump(compiled.circuit, buf)
    return buf.getvalue()


def load_qpy(data: bytes) -> QuantumCircuit:
    from qiskit import qpy

    return qpy.load(io.BytesIO(data))[0]
