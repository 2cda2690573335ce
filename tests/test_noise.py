"""Noise model: textbook channels, ALAP timing, idle relaxation, relabelling, and an
independent simulator (cirq) on a small compiled circuit."""

import math

import cirq
import numpy as np
import pytest
from qiskit import ClassicalRegister, QuantumCircuit

from toposcout.compiler import build_ansatz, compile_ansatz, get_gate_set, make_connectivity, parse_model
from toposcout.compiler.metrics import apply_readout, probabilities_from_rho
from toposcout.compiler.noise import (
    NoiseSwitches,
    Scheduled,
    build_noise_model,
    noisy_circuit,
    readout_matrices,
    schedule,
    schedule_circuit,
    strip_to_active,
)
from toposcout.compiler.profiles import depolarizing_parameter, parse_profile
from toposcout.compiler.simulate import simulate_ideal, simulate_noisy
from qiskit_aer import AerSimulator


def profile(e1=0.0, e2=0.0, p10=0.0, p01=0.0, t1=1e12, t2=1e12, ns1=0, ns2=0, nsm=0, **extra):
    return parse_profile({
        "name": "test",
        "gates": {"one_qubit_error": e1, "two_qubit_error": e2, "one_qubit_ns": ns1, "two_qubit_ns": ns2,
                  "measure_ns": nsm},
        "readout": {"p1_given_0": p10, "p0_given_1": p01},
        "coherence": {"t1_us": t1, "t2_us": t2},
        **extra,
    })


def small_compiled(gate_set="cx", n_vars=3, conn=("line", 4)):
    names = [f"v{i}" for i in range(n_vars)]
    model = parse_model({"name": "tri", "variables": names,
                         "cliques": [names[:3]] + [[names[i], names[i + 1]] for i in range(2, n_vars - 1)]})
    ansatz = build_ansatz(model, seed=3)
    fam, size = conn
    compiled = compile_ansatz(ansatz, make_connectivity(fam, n_vars, size=size), get_gate_set(gate_set),
                              strategy="generic", seeds=1)
    return ansatz, compiled


def test_one_qubit_depolarizing_gives_one_minus_p_over_two():
    # Nielsen & Chuang section 8.3.4: depolarizing channel of parameter p on a pure state has
    # fidelity <psi|E(psi)|psi> = 1 - p/2 (here after one sx gate, no relaxation: 0 ns gates)
    r = 0.02
    prof = profile(e1=r)
    qc = QuantumCircuit(1, 1)
    qc.sx(0)
    qc.measure(0, 0)
    sched = schedule_circuit(qc, None, prof)
    rho = simulate_noisy(sched, prof).rho
    ideal = simulate_ideal(sched)
    p = depolarizing_parameter(r, 1.0, 1)
    assert p == pytest.approx(2 * r)
    assert ideal.fidelity_with(rho) == pytest.approx(1 - p / 2, abs=1e-12)


@pytest.mark.parametrize("t_ns", [500, 20_000])
def test_idle_window_decays_population_and_coherence(t_ns):
    # Nielsen & Chuang 8.3.5-8.3.6 (amplitude and phase damping): after an idle time t the
    # excited population is exp(-t/T1) and the coherence |rho_01| is exp(-t/T2) times its start
    t1_us, t2_us = 30.0, 20.0
    prof = profile(t1=t1_us, t2=t2_us)
    for prep in ("x", "h"):
        qc = QuantumCircuit(1)
        getattr(qc, prep)(0)
        qc.delay(t_ns, 0, unit="dt")
        sched = Scheduled(circuit=qc, physical_qubits=(0,), measured=(0,), duration_ns=t_ns, measure_ns=0)
        rho = simulate_noisy(sched, prof).rho
        if prep == "x":
            assert rho[1, 1].real == pytest.approx(math.exp(-t_ns * 1e-3 / t1_us), abs=1e-12)
        else:
            assert abs(rho[0, 1]) == pytest.approx(0.5 * math.exp(-t_ns * 1e-3 / t2_us), abs=1e-12)
        # and switching the idle source off removes it
        rho_off = simulate_noisy(sched, prof, NoiseSwitches(idle=False)).rho
        kept = rho_off[1, 1].real if prep == "x" else 2 * abs(rho_off[0, 1])
        assert kept == pytest.approx(1.0, abs=1e-12)


def test_alap_schedule_and_duration():
    # ALAP by definition: the lone cx partner waits at the start (leading delay = three sx),
    # and the whole duration is 3*sx + cx + measure
    prof = profile(ns1=35, ns2=300, nsm=1200)
    qc = QuantumCircuit(2, 2)
    qc.sx(0)
    qc.sx(0)
    qc.rz(0.3, 0)
    qc.sx(0)
    qc.cx(0, 1)
    qc.measure([0, 1], [0, 1])
    sched = schedule_circuit(qc, (0, 1), prof)
    assert sched.duration_ns == 3 * 35 + 300 + 1200
    delays = [(ins.operation.duration, qc.find_bit(ins.qubits[0]).index) for ins in sched.circuit.data
              if ins.operation.name == "delay"]
    assert delays == [(105, 1)]
    assert "measure" not in sched.circuit.count_ops()


def test_strip_relabels_and_per_qubit_noise_follows_physical_index():
    # common practice: simulate only active qubits; overrides are keyed by physical qubit
    qc = QuantumCircuit(6, 2)
    qc.sx(4)
    qc.cx(4, 1)
    qc.measure(1, 0)
    qc.measure(4, 1)
    compact, phys, measured = strip_to_active(qc, (1, 4))
    assert phys == (1, 4) and measured == (0, 1) and compact.num_qubits == 2
    prof = profile(p10=0.01, p01=0.02, qubit=[{"index": 4, "p0_given_1": 0.3}])
    sched = schedule_circuit(qc, (1, 4), prof)
    mats = readout_matrices(sched, prof)
    assert mats[0][1, 0] == pytest.approx(0.02) and mats[1][1, 0] == pytest.approx(0.3)
    with pytest.raises(Exception):
        strip_to_active(qc, (4, 1))  # contradicts the measurements


def test_readout_in_the_noise_model_matches_exact_confusion():
    # the NoiseModel's ReadoutError, sampled by Aer, agrees with the exact classical confusion
    # used by the metrics (asymmetric errors catch a transposed matrix); 5-sigma shot tolerance
    prof = profile(p10=0.1, p01=0.3)
    qc = QuantumCircuit(2, 2)
    qc.x(0)
    qc.sx(1)
    qc.measure([0, 1], [0, 1])
    sched = schedule_circuit(qc, None, prof)
    exact = apply_readout(probabilities_from_rho(simulate_noisy(sched, prof).rho), readout_matrices(sched, prof))
    circ = sched.circuit.copy()
    circ.add_register(ClassicalRegister(2))
    circ.measure(list(sched.measured), [0, 1])
    shots = 40_000
    counts = AerSimulator(noise_model=build_noise_model(sched, prof), seed_simulator=11).run(
        circ, shots=shots).result().get_counts()
    freq = np.array([counts.get(format(x, "02b"), 0) / shots for x in range(4)])
    assert np.all(np.abs(freq - exact) < 5 * np.sqrt(exact * (1 - exact) / shots) + 1e-9)


def _to_cirq(circ: QuantumCircuit, prof, qubits):
    """The compact circuit as cirq ops with equivalent depolarizing channels.

    Equivalence (Pauli-twirl form of the depolarizing channel, N&C 8.3.4): qiskit-aer's
    (1-p) rho + p I/d equals cirq.depolarize(p * (d^2-1)/d^2) = (1-q) rho + q/(d^2-1) sum P rho P.
    """
    ops = []
    for ins in circ.data:
        name = ins.operation.name
        qs = [qubits[circ.find_bit(q).index] for q in ins.qubits]
        if name == "rz":
            ops.append(cirq.rz(float(ins.operation.params[0])).on(*qs))
        elif name == "sx":
            ops.append((cirq.X ** 0.5).on(*qs))
        elif name == "x":
            ops.append(cirq.X.on(*qs))
        elif name == "cx":
            ops.append(cirq.CNOT.on(*qs))
        elif name == "cz":
            ops.append(cirq.CZ.on(*qs))
        elif name == "rzz":
            ops.append(cirq.ZZPowGate(exponent=float(ins.operation.params[0]) / np.pi, global_shift=-0.5).on(*qs))
        else:
            raise AssertionError(f"unexpected gate {name}")
        if name == "rz":
            continue
        n = len(qs)
        r = prof.qubit(0).one_qubit_error if n == 1 else prof.edge(0, 1).two_qubit_error
        p_aer = depolarizing_parameter(r, 1.0, n)
        d2 = 4**n
        ops.append(cirq.depolarize(p_aer * (d2 - 1) / d2, n_qubits=n).on(*qs))
    return ops


def reduced_dm(rho_full, measured, n):
    rest = [q for q in range(n) if q not in measured]
    t = rho_full.reshape([2] * (2 * n))
    row_axes = [n - 1 - q for q in reversed(measured)] + [n - 1 - q for q in reversed(rest)]
    t = t.transpose(row_axes + [n + a for a in row_axes])
    k = len(measured)
    t = t.reshape(2**k, 2 ** (n - k), 2**k, 2 ** (n - k))
    return np.einsum("iaja->ij", t)


@pytest.mark.parametrize("gate_set", ["cx", "cz", "rzz"])
def test_density_matrix_agrees_with_cirq(gate_set):
    # independent simulator: cirq's DensityMatrixSimulator with the equivalent depolarizing
    # channels after every non-virtual gate, and readout as the classical bit-flip channel
    # (Kraus ops sqrt(1-a)|0><0|, sqrt(a)|1><0|, sqrt(b)|0><1|, sqrt(1-b)|1><1|) before measuring
    ansatz, compiled = small_compiled(gate_set, n_vars=3, conn=("line", 4))
    prof = profile(e1=4e-3, e2=3e-2, p10=0.03, p01=0.08)
    sched = schedule(compiled, prof)
    assert "delay" not in sched.circuit.count_ops()  # zero durations: depolarizing + readout only
    rho = simulate_noisy(sched, prof).rho
    q_ours = apply_readout(probabilities_from_rho(rho), readout_matrices(sched, prof))

    n = sched.num_qubits
    qubits = cirq.LineQubit.range(n)
    ops = _to_cirq(sched.circuit, prof, qubits)
    big_endian = cirq.DensityMatrixSimulator(dtype=np.complex128).simulate(
        cirq.Circuit(ops), qubit_order=list(reversed(qubits))).final_density_matrix  # index bit j = qubit j
    rho_cirq = reduced_dm(np.asarray(big_endian), list(sched.measured), n)
    assert np.max(np.abs(rho - rho_cirq)) < 1e-6

    a, b = 0.03, 0.08
    ro = cirq.KrausChannel([np.array([[math.sqrt(1 - a), 0], [0, 0]]), np.array([[0, 0], [math.sqrt(a), 0]]),
                            np.array([[0, math.sqrt(b)], [0, 0]]), np.array([[0, 0], [0, math.sqrt(1 - b)]])])
    ops_ro = ops + [ro.on(qubits[k]) for k in sched.measured]
    dm_ro = cirq.DensityMatrixSimulator(dtype=np.complex128).simulate(
        cirq.Circuit(ops_ro), qubit_order=list(reversed(qubits))).final_density_matrix
    q_cirq = np.real(np.diagonal(reduced_dm(np.asarray(dm_ro), list(sched.measured), n)))
    assert np.max(np.abs(q_ours - q_cirq)) < 1e-6


def test_noiseless_switches_give_the_ideal_state():
    # with every source off the density matrix equals the ideal (statevector) state: by definition
    ansatz, compiled = small_compiled("cx")
    prof = profile(e1=1e-2, e2=5e-2, p10=0.1, p01=0.1, t1=20.0, t2=15.0, ns1=50, ns2=400, nsm=1000)
    sched = schedule(compiled, prof)
    off = NoiseSwitches(two_qubit=False, one_qubit=False, idle=False, readout=False)
    rho = simulate_noisy(sched, prof, off).rho
    m = simulate_ideal(sched).amplitudes
    assert np.max(np.abs(rho - m @ m.conj().T)) < 1e-9
    assert len(build_noise_model(sched, prof, off).noise_instructions) == 0
    assert noisy_circuit(sched, prof, off).count_ops() == sched.circuit.count_ops()


def test_per_qubit_gate_override_reaches_only_its_physical_qubit():
    # per-qubit overrides are keyed by physical index and survive the relabelling: an sx on
    # physical 4 (compact 1) with r = 0.1 loses 1 - p/2 = 1 - r of fidelity (N&C 8.3.4), while
    # physical 1 (compact 0) keeps r = 0.001
    qc = QuantumCircuit(6, 2)
    qc.sx(1)
    qc.sx(4)
    qc.measure(1, 0)
    qc.measure(4, 1)
    prof = profile(e1=1e-3, qubit=[{"index": 4, "one_qubit_error": 0.1}])
    sched = schedule_circuit(qc, (1, 4), prof)
    rho = simulate_noisy(sched, prof).rho
    ideal = simulate_ideal(sched)
    assert ideal.fidelity_with(rho) == pytest.approx((1 - 1e-3) * (1 - 0.1), abs=1e-12)


@pytest.mark.parametrize("e2, t1, t2", [(2e-2, 1e12, 1e12), (2e-2, 200.0, 150.0), (1e-4, 20.0, 15.0)])
def test_esp_gate_error_is_the_simulated_gates_infidelity(e2, t1, t2):
    # Reference library: qiskit.quantum_info.average_gate_fidelity of the gate's own channel. The ESP
    # estimate uses, per gate, the larger of the profile's error and the relaxation during the gate;
    # that must equal 1 - F_avg of what the simulation applies (the last case: relaxation alone
    # exceeds the nominal 1e-4, so the simulated gate is worse than nominal).
    from qiskit.quantum_info import average_gate_fidelity

    from toposcout.compiler.noise import gate_error, operation_errors

    prof = profile(e1=1e-4, e2=e2, t1=t1, t2=t2, ns1=30, ns2=400)
    _, compiled = small_compiled()
    sched = schedule(compiled, prof)
    errs = operation_errors(sched, prof)
    a, b = (sched.physical_qubits[sched.circuit.find_bit(q).index]
            for q in next(ins for ins in sched.circuit.data if ins.operation.num_qubits == 2).qubits)
    channel = gate_error(prof, (a, b), "cx").to_quantumchannel()
    assert errs["two_qubit"][0] == pytest.approx(1 - average_gate_fidelity(channel), abs=1e-12)
    assert errs["two_qubit"][0] >= e2


def test_gate_channel_order_is_depolarizing_then_relaxation():
    # Nielsen & Chuang section 8.3.5: amplitude damping is not unital, so it does not commute with
    # depolarizing. Both orders give the profile's average infidelity (qiskit.quantum_info), but the
    # simulated channel is depolarizing first, then relaxation (the documented order).
    from qiskit.quantum_info import SuperOp, average_gate_fidelity
    from qiskit_aer.noise import depolarizing_error, thermal_relaxation_error

    from toposcout.compiler.noise import gate_error
    from toposcout.compiler.profiles import relaxation_process_fidelity

    prof = profile(e1=2e-2, t1=30.0, t2=20.0, ns1=200)  # relaxation alone: 4.4e-3
    dep = depolarizing_error(depolarizing_parameter(2e-2, relaxation_process_fidelity(30.0, 20.0, 200), 1), 1)
    relax = thermal_relaxation_error(30.0e3, 20.0e3, 200.0)
    ours = SuperOp(gate_error(prof, (0,), "sx").to_quantumchannel())
    dep_then_relax = SuperOp(dep.to_quantumchannel()).compose(SuperOp(relax.to_quantumchannel()))
    relax_then_dep = SuperOp(relax.to_quantumchannel()).compose(SuperOp(dep.to_quantumchannel()))
    assert np.allclose(ours.data, dep_then_relax.data, atol=1e-12)
    assert not np.allclose(ours.data, relax_then_dep.data, atol=1e-9)
    for ch in (dep_then_relax, relax_then_dep):
        assert 1 - average_gate_fidelity(ch) == pytest.approx(2e-2, abs=1e-12)
