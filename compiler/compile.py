"""Compilation of an ansatz onto a connectivity and gate set.

Strategies:

* ``generic``: qiskit's preset pass manager (layout, routing with SWAPs, translation,
  optimisation) at ``optimization_level`` (default 3), run with ``seeds`` seeds; the best
  by two-qubit count, then depth, is kept and its seed recorded.
* ``structured``: our synthesis of the commuting block for the coupling graph
  (:mod:`toposcout.compiler.synthesis`).
* ``auto`` (default): both, keeping the better by two-qubit count then depth; the result
  records which won and both counts in ``extra``.

Every result is checked: each two-qubit gate lies on an edge of the coupling map and is that
coupler's native gate (a gate set with per-coupler gates, ``GateSet.couplers``, gives each
coupler its own; the Target of :func:`build_target` is then heterogeneous), and physical qubit
``final_layout[i]`` is measured into bit ``i``.

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

import math
import time

from qiskit.transpiler import InstructionProperties, generate_preset_pass_manager

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
from toposcout.compiler.profiles import DeviceProfile, relaxation_average_infidelity
from toposcout.compiler.synthesis import compile_structured
from toposcout.compiler.synthesis.steiner import Weights
from toposcout.compiler.targets import Connectivity, GateSet, build_target

__all__ = [
    "STRATEGIES",
    "PLACEMENTS",
    "Compiled",
    "placement_weights",
    "error_properties",
    "log_cost_estimate",
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
#: placement objectives: ``count`` (fewest two-qubit gates, then depth) or ``errors`` (highest
#: estimated success probability under the profile's per-qubit and per-coupler figures).
PLACEMENTS = ("errors", "count")
#: idle time a held variable is charged in the qubit weights, in two-qubit gate durations.
IDLE_GATES = 10


def placement_weights(profile: DeviceProfile, connectivity: Connectivity) -> Weights:
    """Per-element costs for error-aware placement, in units of -log(fidelity).

    A coupler costs -log(1 - e) (e its two-qubit error; the ESP factor of one gate on it). A
    qubit holding a variable costs its readout -log(1 - (p(1|0) + p(0|1))/2), two one-qubit
    gates -2 log(1 - e1), and the relaxation of idling for ``IDLE_GATES`` two-qubit durations
    (Nielsen's average infidelity of thermal relaxation, as the ESP's idle factor counts it)."""
    edge = {(a, b): -math.log1p(-min(profile.edge(a, b).two_qubit_error, 0.999999)) for a, b in connectivity.edges}
    qubit = {}
    for q in range(connectivity.num_qubits):
        p = profile.qubit(q)
        ro = min((p.p1_given_0 + p.p0_given_1) / 2, 0.999999)
        idle = relaxation_average_infidelity(p.t1_us, p.t2_us, IDLE_GATES * profile.two_qubit_ns)
        qubit[q] = -math.log1p(-ro) - 2 * math.log1p(-min(p.one_qubit_error, 0.999999)) - math.log1p(-min(idle, 0.999999))
    return Weights(edge, qubit, default_edge=-math.log1p(-min(profile.two_qubit_error, 0.999999)))


def error_properties(profile: DeviceProfile, two_qubit_gate: str):
    """``properties(name, qubits)`` for :func:`build_target`: InstructionProperties with the
    profile's error and duration of every instruction (rz virtual: error 0, duration 0), so
    qiskit's VF2Layout / VF2PostLayout score layouts by these errors."""
    def prop(name: str, qubits):
        if name == "measure":
            p = profile.qubit(qubits[0])
            return InstructionProperties(error=(p.p1_given_0 + p.p0_given_1) / 2, duration=profile.measure_ns * 1e-9)
        if len(qubits) == 2:
            e = profile.edge(*qubits)
            return InstructionProperties(error=e.two_qubit_error, duration=e.two_qubit_ns * 1e-9)
        if name == "rz":
            return InstructionProperties(error=0.0, duration=0.0)
        p = profile.qubit(qubits[0])
        return InstructionProperties(error=p.one_qubit_error, duration=p.one_qubit_ns * 1e-9)
    return prop


def log_cost_estimate(circuit, weights: Weights, profile: DeviceProfile) -> float:
    """-log of the gate-and-readout part of the ESP of a compiled circuit (no scheduling): every
    two-qubit gate's coupler cost, every non-virtual one-qubit gate's -log(1 - e1) and every
    measured qubit's readout cost. Used to rank transpiler seeds."""
    c = 0.0
    for ins in circuit.data:
        name = ins.operation.name
        qs = [circuit.find_bit(q).index for q in ins.qubits]
        if name in _NON_GATES or name == "rz":
            if name == "measure":
                p = profile.qubit(qs[0])
                c -= math.log1p(-min((p.p1_given_0 + p.p0_given_1) / 2, 0.999999))
            continue
        if len(qs) == 2:
            c += weights.of_edge(*qs)
        elif len(qs) == 1:
            c -= math.log1p(-min(profile.qubit(qs[0]).one_qubit_error, 0.999999))
    return c
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
    profile: DeviceProfile | None = None,
    initial_layout=None,
) -> Compiled:
    """qiskit's preset pipeline with seeds 0..seeds-1; keep the best by (2q count, depth).

    profile: default None; else error-aware: the Target carries the profile's errors and
    durations (:func:`error_properties`) and the seed with the lowest :func:`log_cost_estimate`
    is kept (ties: 2q count, depth)."""
    if ansatz.num_qubits > connectivity.num_qubits:
        raise TargetError(
            f"the model has {ansatz.num_qubits} variables but {connectivity.name} has "
            f"{connectivity.num_qubits} qubits", field="connectivity")
    if seeds < 1:
        raise CompileError(f"seeds must be at least 1, got {seeds}", field="seeds")
    logical = ansatz.circuit(measure=True)
    weights = None if profile is None else placement_weights(profile, connectivity)
    target = build_target(connectivity, gate_set,
                          properties=None if profile is None else error_properties(profile, gate_set.two_qubit))
    start = time.perf_counter()
    best: tuple | None = None
    for seed in range(seeds):
        pm = generate_preset_pass_manager(optimization_level, target=target, seed_transpiler=seed,
                                          initial_layout=initial_layout)
        rec = _SwapRecorder()
        out = pm.run(logical, callback=rec)
        two = sum(1 for ins in out.data if ins.operation.num_qubits == 2)
        depth = out.depth(lambda ins: ins.operation.name not in _NON_GATES)
        key = (two, depth, seed)
        if weights is not None:
            key = (round(log_cost_estimate(out, weights, profile), 12),) + key
        if best is None or key < best[0]:
            best = (key, out, rec, seed)
    elapsed = time.perf_counter() - start
    _, out, rec, seed = best
    check_coupling(out, connectivity, gate_set)
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


def _structured(ansatz, connectivity, gate_set, seed, profile=None, placements=None):
    weights = None if profile is None else placement_weights(profile, connectivity)
    return compile_structured(ansatz, connectivity, gate_set, seed=seed, weights=weights, placements=placements)


def compile_ansatz(
    ansatz: Ansatz,
    connectivity: Connectivity,
    gate_set: GateSet,
    *,
    strategy: str = "auto",
    seeds: int = 5,
    optimization_level: int = 3,
    profile: DeviceProfile | None = None,
    placements=None,
) -> Compiled:
    """Compile ``ansatz`` for the connectivity and gate set with ``strategy``.

    strategy: default ``"auto"``: the better of ``generic`` and ``structured``.
    seeds: default 5; transpiler seeds tried by ``generic``.
    optimization_level: default 3; qiskit's preset level for ``generic``.
    profile: default None (placement by gate count); else error-aware placement under the
        profile's per-element figures (both strategies; ``auto`` then keeps the lower
        estimated -log ESP of :func:`log_cost_estimate`).
    placements: default None; the structured strategy's placements to try (regions); the
        generic strategy then starts from the first as its initial layout.
    """
    if strategy not in STRATEGIES:
        raise CompileError(f"unknown strategy {strategy!r}; choose one of {', '.join(STRATEGIES)}",
                           field="strategy")
    gkw = dict(seeds=seeds, optimization_level=optimization_level, profile=profile,
               initial_layout=None if not placements else list(placements[0]))
    if strategy == "generic":
        return compile_generic(ansatz, connectivity, gate_set, **gkw)
    if strategy == "structured":
        out = _structured(ansatz, connectivity, gate_set, 0, profile, placements)
        check_coupling(out.circuit, connectivity, gate_set)
        return out
    gen = compile_generic(ansatz, connectivity, gate_set, **gkw)
    st = _structured(ansatz, connectivity, gate_set, 0, profile, placements)
    check_coupling(st.circuit, connectivity, gate_set)
    both = {
        "generic_two_qubit_gates": gen.two_qubit_gates(),
        "structured_two_qubit_gates": st.two_qubit_gates(),
        "generic_depth": gen.depth(),
        "structured_depth": st.depth(),
    }
    if profile is None:
        win = min((gen, st), key=lambda c: (c.two_qubit_gates(), c.depth(), c.strategy != "generic"))
    else:
        w = placement_weights(profile, connectivity)
        win = min((gen, st), key=lambda c: (round(log_cost_estimate(c.circuit, w, profile), 12), c.two_qubit_gates(),
                                            c.depth(), c.strategy != "generic"))
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
