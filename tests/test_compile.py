"""Generic compilation: correctness end to end, coupling respect, exports."""

from __future__ import annotations

import numpy as np
import pytest
from qiskit.quantum_info import Operator

from toposcout.compiler.ansatz import build_ansatz
from toposcout.compiler.compile import check_coupling, compile_ansatz, load_qpy, qasm3_text, qpy_bytes
from toposcout.compiler.errors import CompileError
from toposcout.compiler.model import load_model, parse_model
from toposcout.compiler.targets import BUILTIN_FAMILIES, GATE_SETS, get_gate_set, make_connectivity


@pytest.mark.parametrize("strategy", ["generic", "auto"])
@pytest.mark.parametrize("family", BUILTIN_FAMILIES)
def test_compiled_distribution_equals_logical(example_path, family, strategy, compiled_distribution,
                                              logical_distribution):
    # Reference: qiskit.quantum_info.Statevector of the logical circuit; whatever layout and
    # routing did, the distribution over the model's variables must be unchanged (tol 1e-9).
    m = load_model(example_path)
    a = build_ansatz(m, seed=2)
    c = compile_ansatz(a, make_connectivity(family, m.num_variables), get_gate_set("cx"),
                       strategy=strategy, seeds=2)
    check_coupling(c.circuit, c.connectivity)
    np.testing.assert_allclose(compiled_distribution(c), logical_distribution(a), atol=1e-9)
    if strategy == "auto":
        f = c.figures()
        assert f["auto_winner"] == c.strategy
        assert f["two_qubit_gates"] == min(f["generic_two_qubit_gates"], f["structured_two_qubit_gates"])


@pytest.mark.parametrize("gate_set", GATE_SETS)
def test_every_gate_set_preserves_the_distribution(gate_set, compiled_distribution, logical_distribution):
    m = parse_model({"variables": list("abcde"), "cliques": [list("abc"), list("cde")]})
    a = build_ansatz(m, seed=7, layers=2)
    c = compile_ansatz(a, make_connectivity("ring", 5), get_gate_set(gate_set), strategy="generic", seeds=2)
    names = {ins.operation.name for ins in c.circuit.data} - {"measure", "barrier"}
    assert names <= set(get_gate_set(gate_set).basis)
    np.testing.assert_allclose(compiled_distribution(c), logical_distribution(a), atol=1e-9)


def test_all_to_all_needs_no_swap_and_line_costs_at_least_as_much(example_path):
    m = load_model(example_path)
    a = build_ansatz(m, seed=1)
    full = compile_ansatz(a, make_connectivity("all-to-all", m.num_variables), get_gate_set("cx"),
                          strategy="generic", seeds=3)
    line = compile_ansatz(a, make_connectivity("line", m.num_variables), get_gate_set("cx"),
                          strategy="generic", seeds=3)
    assert full.swaps == 0
    assert line.two_qubit_gates() >= full.two_qubit_gates()


def test_operator_equivalence_on_all_to_all():
    # qiskit.quantum_info.Operator: the compiled unitary equals the logical one once the
    # layout permutation is undone (Operator.from_circuit applies the final layout).
    m = parse_model({"variables": list("abcd"), "cliques": [list("abc"), list("bcd")]})
    a = build_ansatz(m, seed=3)
    c = compile_ansatz(a, make_connectivity("line", 4), get_gate_set("cx"), strategy="generic", seeds=1)
    phys = c.circuit.remove_final_measurements(inplace=False)
    assert Operator.from_circuit(phys).equiv(Operator(a.circuit(measure=False)))


def test_best_seed_is_recorded_and_best():
    m = load_model("examples/orchard-frost.json")
    a = build_ansatz(m)
    conn, gs = make_connectivity("line", m.num_variables), get_gate_set("cx")
    best = compile_ansatz(a, conn, gs, strategy="generic", seeds=4)
    for s in range(1, 4):
        single = compile_ansatz(a, conn, gs, strategy="generic", seeds=s)
        assert best.two_qubit_gates() <= single.two_qubit_gates()
    assert best.seed in range(4)


def test_figures_are_consistent():
    m = load_model("examples/warehouse-doors.uai")
    c = compile_ansatz(build_ansatz(m), make_connectivity("heavy-hex", m.num_variables), get_gate_set("cz"),
                       strategy="generic", seeds=1)
    f = c.figures()
    assert f["physical_qubits"] == 19 and f["active_qubits"] >= m.num_variables
    assert f["two_qubit_gates"] == c.circuit.count_ops().get("cz", 0)
    assert f["two_qubit_depth"] <= f["depth"]
    assert len(set(f["final_layout"])) == m.num_variables


def test_check_coupling_catches_a_bad_gate():
    from qiskit import QuantumCircuit

    conn = make_connectivity("line", 3)
    qc = QuantumCircuit(3)
    qc.cx(0, 2)
    with pytest.raises(CompileError, match=r"\(0, 2\) is not an edge of line-3"):
        check_coupling(qc, conn)


def test_qpy_round_trip_keeps_circuit_and_layout():
    m = load_model("examples/warehouse-doors.uai")
    c = compile_ansatz(build_ansatz(m), make_connectivity("grid", 6), get_gate_set("cx"), strategy="generic", seeds=1)
    back = load_qpy(qpy_bytes(c))
    assert back == c.circuit
    assert back.layout.final_index_layout() == c.circuit.layout.final_index_layout()


def test_qasm3_export_parses():
    # Open standard: OpenQASM 3, parsed by the reference importer (qiskit-qasm3-import).
    from qiskit import qasm3

    m = load_model("examples/warehouse-doors.uai")
    c = compile_ansatz(build_ansatz(m), make_connectivity("line", 6), get_gate_set("cx"), strategy="generic", seeds=1)
    text = qasm3_text(c)
    assert text.startswith("OPENQASM 3")
    back = qasm3.loads(text)
    assert back.count_ops().get("cx", 0) == c.two_qubit_gates()


@pytest.mark.parametrize("family", ["heavy-hex", "grid", "line"])
def test_swap_edges_are_coupling_edges_next_to_data(family):
    # Each SWAP moves a variable's state, so one end of it is a qubit the final circuit uses;
    # the positions must be in the final physical labelling (after qiskit's post-layout).
    # a small dense model on a big lattice: qiskit relabels the qubits after routing
    m = parse_model({"variables": list("abcd"), "cliques": [list("abcd")]})
    c = compile_ansatz(build_ansatz(m), make_connectivity(family, m.num_variables), get_gate_set("cx"),
                       strategy="generic", seeds=3)
    edges, active = set(c.connectivity.edges), set(c.active_qubits())
    where = c.extra["swap_edges"]
    assert sum(where.values()) == c.swaps > 0
    for key in where:
        a, b = map(int, key.split("-"))
        assert (a, b) in edges and (a in active or b in active)


@pytest.mark.parametrize("strategy", ["generic", "structured"])
def test_exported_qpy_carries_the_layout_whichever_strategy(strategy):
    # Reference library: qiskit's TranspileLayout read back from QPY. Its initial virtual layout must
    # put variable i on initial_layout[i] and final_index_layout() must give final_layout[i], for the
    # structured strategy (which builds its circuit without transpile) as for generic.
    m = load_model("examples/warehouse-doors.uai")
    c = compile_ansatz(build_ansatz(m), make_connectivity("grid", 6), get_gate_set("cx"), strategy=strategy, seeds=1)
    assert c.strategy == strategy
    back = load_qpy(qpy_bytes(c))
    assert back.layout is not None
    assert back.layout.final_index_layout() == list(c.final_layout)
    assert back.layout.initial_index_layout(filter_ancillas=True) == list(c.initial_layout)
