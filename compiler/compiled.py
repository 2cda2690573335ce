"""The compiled circuit as a value, its checks and its exports (OpenQASM 3, QPY).

Every strategy (``toposcout.compiler.compile``, ``toposcout.compiler.synthesis``) returns a :class:`Compiled`;
:func:`check_coupling` and :func:`measured_layout` are the invariants every result must keep.
"""

from __future__ import annotations

import io
from dataclasses import dataclass, field
from typing import Any

from qiskit import QuantumCircuit

from toposcout.compiler.errors import CompileError
from toposcout.compiler.targets import Connectivity, GateSet

__all__ = ["Compiled", "check_coupling", "measured_layout", "qasm3_text", "qpy_bytes", "load_qpy", "with_layout", "NON_GATES"]

#: instructions that are not gates: not counted in depth or gate counts.
NON_GATES = ("measure", "barrier", "delay")
_NON_GATES = NON_GATES


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
        if self.gate_set.couplers:  # per-coupler native gates: how many of each the circuit has
            by: dict[str, int] = dict.fromkeys(self.gate_set.two_qubit_names, 0)
            for ins in c.data:
                if ins.operation.num_qubits == 2:
                    by[ins.operation.name] = by.get(ins.operation.name, 0) + 1
            out["two_qubit_by_gate"] = by
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


def check_coupling(circuit: QuantumCircuit, connectivity: Connectivity, gate_set: GateSet | None = None) -> None:
    """Raise :class:`CompileError` unless every two-qubit gate is on a coupling edge and, with
    ``gate_set``, is that coupler's native two-qubit gate (:meth:`GateSet.two_qubit_on`)."""
    edges = set(connectivity.edges)
    native = None if gate_set is None else gate_set.native_of()
    for ins in circuit.data:
        if ins.operation.num_qubits == 2:
            a, b = (circuit.find_bit(q).index for q in ins.qubits)
            if (min(a, b), max(a, b)) not in edges:
                raise CompileError(
                    f"{ins.operation.name} on qubits ({a}, {b}) is not an edge of {connectivity.name}",
                    field="circuit",
                )
            if native is not None and ins.operation.name != native(a, b):
                raise CompileError(f"{ins.operation.name} on qubits ({a}, {b}) is not the native two-qubit gate "
                                   f"{native(a, b)!r} of coupler {min(a, b)}-{max(a, b)}", field="circuit")
        elif ins.operation.num_qubits > 2:
            raise CompileError(f"{ins.operation.name} acts on {ins.operation.num_qubits} qubits", field="circuit")


def qasm3_text(compiled: Compiled) -> str:
    """The compiled circuit as OpenQASM 3 (physical qubits ``$i``)."""
    from qiskit import qasm3

    return qasm3.dumps(compiled.circuit)


def with_layout(compiled: Compiled) -> QuantumCircuit:
    """The compiled circuit with a qiskit ``TranspileLayout`` whichever strategy produced it.

    The generic strategy's circuit has the one ``transpile`` set; the structured one builds
    its circuit directly, so its layout is made here from ``initial_layout`` and ``final_layout``:
    virtual qubit i (variable i) starts on ``initial_layout[i]`` and ends on ``final_layout[i]``;
    the physical qubits no variable uses are ancillas, matched start-to-end in sorted order."""
    c = compiled.circuit
    if c.layout is not None:
        return c
    from qiskit.circuit import AncillaRegister, QuantumRegister
    from qiskit.transpiler import Layout, TranspileLayout

    n, total = len(compiled.initial_layout), c.num_qubits
    virtual = QuantumRegister(n, "q")
    ancillas = AncillaRegister(total - n, "ancilla") if total > n else None
    free_start = [p for p in range(total) if p not in set(compiled.initial_layout)]
    free_end = [p for p in range(total) if p not in set(compiled.final_layout)]
    start = {virtual[i]: p for i, p in enumerate(compiled.initial_layout)}
    mapping = {virtual[i]: i for i in range(n)}
    for j, p in enumerate(free_start):
        start[ancillas[j]] = p
        mapping[ancillas[j]] = n + j
    initial = Layout(start)
    initial.add_register(virtual)
    if ancillas is not None:
        initial.add_register(ancillas)
    moved = {c.qubits[p]: q for p, q in zip(compiled.initial_layout, compiled.final_layout)}
    moved.update({c.qubits[p]: q for p, q in zip(free_start, free_end)})
    out = c.copy()
    out._layout = TranspileLayout(initial, mapping, final_layout=Layout(moved), _input_qubit_count=n,
                                  _output_qubit_list=list(out.qubits))
    return out


def qpy_bytes(compiled: Compiled) -> bytes:
    """The compiled circuit as QPY, with its layout (:func:`with_layout`) whichever strategy won."""
    from qiskit import qpy

    buf = io.BytesIO()
    qpy.dump(with_layout(compiled), buf)
    return buf.getvalue()


def load_qpy(data: bytes) -> QuantumCircuit:
    from qiskit import qpy

    return qpy.load(io.BytesIO(data))[0]
