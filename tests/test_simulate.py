"""Simulation: memory estimate and refusal, active-qubit truncation, the ideal reference."""

import numpy as np
import pytest
from qiskit import QuantumCircuit
from qiskit.quantum_info import Statevector
from qiskit_aer import AerSimulator

import toposcout.compiler.simulate as simulate_mod
from toposcout.compiler import build_ansatz, compile_ansatz, get_gate_set, make_connectivity, parse_model
from toposcout.compiler.errors import CapacityError
from toposcout.compiler.metrics import noise_figures
from toposcout.compiler.noise import schedule
from toposcout.compiler.profiles import load_profile
from toposcout.compiler.simulate import (
    _run,
    check_memory,
    default_memory_budget_bytes,
    estimate_memory_bytes,
    reduce_statevector,
    simulate_ideal,
    simulate_noisy,
)


def test_memory_estimate_formula():
    # a density matrix of n qubits is 4**n complex doubles of 16 bytes (STACK.md 2.5, measured);
    # overhead: a working copy for a reduced/re-ordered save (measured in bench_noise.py)
    for n in range(1, 14):
        est = estimate_memory_bytes(n)
        assert est >= 16 * 4**n
        assert est == 4 * 16 * 4**n + 16 * 2**n + simulate_mod.BASE_OVERHEAD_BYTES
    assert estimate_memory_bytes(12, saved_qubits=3) < estimate_memory_bytes(12)
    assert default_memory_budget_bytes(ram_bytes=8 * 2**30) == 4 * 2**30
    assert default_memory_budget_bytes(ram_bytes=8 * 2**30, fraction=0.25) == 2 * 2**30


def test_over_budget_is_refused_before_any_simulation(monkeypatch, chain_model):
    # requirement: refused before simulation starts, with n, the estimate and what to do
    model = parse_model(chain_model(6))
    ansatz = build_ansatz(model, seed=0)
    compiled = compile_ansatz(ansatz, make_connectivity("line", 6), get_gate_set("cx"), strategy="generic", seeds=1)

    def forbidden(*a, **k):
        raise AssertionError("a simulation was started")

    monkeypatch.setattr(simulate_mod.AerSimulator, "run", forbidden)
    budget = 2**20
    with pytest.raises(CapacityError) as e:
        noise_figures(compiled, ansatz, load_profile("superconducting"), memory_budget_bytes=budget)
    msg = str(e.value)
    assert "6 active qubits" in msg and f"{estimate_memory_bytes(6, 6) / 2**30:.2f} GiB" in msg
    # the advice (which method would work, at what cost) is the row's noise_error, written by
    # toposcout.compiler.methods for the case at hand (tests/test_methods.py); the library
    # message states only the facts, so it cannot give advice that is wrong for the model
    assert "budget" in msg and "max_order" not in msg
    assert e.value.field == "memory_budget_bytes"
    with pytest.raises(CapacityError):
        check_memory(30)  # 30 qubits never fit this machine's default budget


def test_simulator_failure_is_reported():
    # STACK.md 2.5: Aer reports a memory failure as success=False, not as an exception
    qc = QuantumCircuit(10)
    qc.h(range(10))
    qc.save_density_matrix()
    with pytest.raises(CapacityError) as e:
        _run(AerSimulator(method="density_matrix", max_memory_mb=1), qc)
    assert "memory" in str(e.value).lower()


def test_only_active_qubits_are_simulated(chain_model):
    # common practice: untouched physical qubits are dropped before simulation
    model = parse_model(chain_model(3))
    ansatz = build_ansatz(model, seed=2)
    compiled = compile_ansatz(ansatz, make_connectivity("grid", 3, size=(3, 3)), get_gate_set("cx"),
                              strategy="generic", seeds=1)
    prof = load_profile("superconducting")
    sched = schedule(compiled, prof)
    assert sched.num_qubits == len(compiled.active_qubits()) < 9
    assert sched.physical_qubits == compiled.active_qubits()
    st = simulate_noisy(sched, prof)
    assert st.num_qubits == sched.num_qubits
    assert st.rho.shape == (8, 8)


@pytest.mark.parametrize("family", ["line", "ring"])
def test_ideal_state_of_the_compiled_circuit_is_the_ansatz_state(family):
    # the compiled circuit implements the logical ansatz (STACK.md 8: noiseless compiled vs
    # reference F = 1); reading in variable order undoes the final layout
    model = parse_model({"name": "m", "variables": ["a", "b", "c", "d"],
                         "cliques": [["a", "b", "c"], ["b", "d"], ["a", "d"]]})
    ansatz = build_ansatz(model, seed=5)
    compiled = compile_ansatz(ansatz, make_connectivity(family, 4, size=5), get_gate_set("cx"),
                              strategy="generic", seeds=2)
    sched = schedule(compiled, load_profile("superconducting"))
    ideal = simulate_ideal(sched)
    ref = Statevector(ansatz.circuit(measure=False)).data
    rho = np.outer(ref, ref.conj())
    assert ideal.fidelity_with(rho) == pytest.approx(1.0, abs=1e-9)


def test_reduce_statevector_orders_variables_little_endian():
    # by definition of the little-endian convention: psi = |q2 q1 q0>, read qubits (2, 0)
    psi = np.zeros(8, dtype=complex)
    psi[0b100] = 1.0  # q2 = 1
    m = reduce_statevector(psi, [2, 0], 3)
    assert m.shape == (4, 2) and abs(m[0b01, 0]) == 1.0  # variable 0 = q2 = 1


def test_over_budget_row_fails_alone_and_other_rows_complete(chain_model):
    # requirement: a row whose active qubits exceed the budget is refused (message in the row),
    # the other rows of the same list of tasks still complete
    from toposcout.compiler.study import make_tasks, run_task

    budget = estimate_memory_bytes(4)
    big = make_tasks(chain_model(6), ["line", "ring"], memory_budget_bytes=budget, error_budget=False,
                     seeds=1)
    small = make_tasks(chain_model(3), ["line"], memory_budget_bytes=budget, error_budget=False, seeds=1)
    # forced density-matrix (set on the task, as a worker with a smaller budget sees it; make_tasks
    # refuses it before work when the variables alone are over the budget)
    rows = [run_task(dict(t, method="density-matrix")) for t in big + small]
    for r in rows[:2]:
        assert r["error"] is None and r["noise_error_field"] == "method"
        assert "6 active qubits" in r["noise_error"] and "--method trajectories" in r["noise_error"]
        assert r["two_qubit_gates"] > 0 and r["depth"] > 0  # compile figures kept
        assert r.get("state_fidelity") is None and r["method"] is None
    assert rows[2]["error"] is None and 0 < rows[2]["state_fidelity"] < 1
