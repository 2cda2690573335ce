"""Trajectories against the exact density matrix, and the clique marginals against qiskit.

Reference of the agreement checks: the density matrix of the same noise model
(qiskit-aer ``method="density_matrix"``); the trajectory average is an unbiased estimate of it
(Dalibard, Castin & Molmer, PRL 68, 580 (1992)), so the state fidelity must agree within
3 standard errors, and the plug-in distribution figures within 3 standard errors plus their
jackknife bias estimate. Marginals are checked against
``qiskit.quantum_info.DensityMatrix.probabilities(qargs)``.
"""

from __future__ import annotations

import numpy as np
import pytest
from qiskit import QuantumCircuit
from qiskit.quantum_info import DensityMatrix, random_density_matrix

from toposcout.compiler import build_ansatz, compile_ansatz, get_gate_set, make_connectivity, parse_model
from toposcout.compiler import trajectories as T
from toposcout.compiler.metrics import clique_indices, marginal, noise_figures
from toposcout.compiler.noise import schedule, schedule_circuit
from toposcout.compiler.profiles import load_profile
from toposcout.compiler.simulate import simulate_ideal, simulate_noisy

TRI = parse_model({"name": "tri", "variables": list("abcdef"),
                   "cliques": [list("abc"), list("bcd"), list("cde"), list("def")]})


def _exact_and_trajectories(connectivity: str, profile_name: str, strategy: str, method: str, n: int, seed: int):
    ansatz = build_ansatz(TRI, seed=2)
    compiled = compile_ansatz(ansatz, make_connectivity(connectivity, 6), get_gate_set("cx"), strategy=strategy,
                              seeds=1)
    profile = load_profile(profile_name)
    exact = noise_figures(compiled, ansatz, profile, error_budget=False)
    sched = schedule(compiled, profile)
    ideal = simulate_ideal(sched)
    p = ideal.probabilities / ideal.probabilities.sum()
    cliques = clique_indices(TRI)
    run = T.run_trajectories(sched, profile, cliques, ideal_amplitudes=ideal.amplitudes, n_trajectories=n,
                             seed=seed, method=method)
    est = T.trajectory_figures(sched, profile, TRI, run, p_ideal=p, p_cliques=[marginal(p, c) for c in cliques])
    return exact, est


# every built-in profile and every named lattice once (few cases: the suite stays quick)
@pytest.mark.parametrize("connectivity,profile_name,strategy", [
    ("line", "superconducting", "generic"),
    ("grid", "trapped_ion", "structured"),
    ("heavy-hex", "neutral_atom", "generic"),
])
def test_trajectories_agree_with_the_density_matrix(connectivity, profile_name, strategy):
    exact, est = _exact_and_trajectories(connectivity, profile_name, strategy, "statevector", 400, seed=11)
    assert est["trajectories"] == 400 and est["state_fidelity_se"] > 0
    # unbiased estimator: 3 standard errors
    assert abs(est["state_fidelity"] - exact["state_fidelity"]) <= 3 * est["state_fidelity_se"]
    # plug-in (biased) estimators: 3 standard errors plus the jackknife bias estimate
    for key in ("hellinger_fidelity", "tvd"):
        assert abs(est[key] - exact[key]) <= 3 * est[f"{key}_se"] + abs(est[f"{key}_bias"]), key
    for e, x in zip(est["clique_hellinger"], exact["clique_hellinger"]):
        assert e["clique"] == x["clique"]
        assert abs(e["fidelity"] - x["fidelity"]) <= 3 * e["se"] + 1e-9, e["clique"]
    assert exact["clique_hellinger_worst"] in {",".join(c["clique"]) for c in exact["clique_hellinger"]}
    assert exact["log10_state_fidelity"] == pytest.approx(np.log10(exact["state_fidelity"]))


def test_matrix_product_state_trajectories_equal_statevector_ones_with_the_same_seeds():
    # the same seeds pick the same Kraus branches: the MPS overlap contraction must reproduce the
    # statevector overlap (no truncation at this size), and both agree with the density matrix
    exact, sv = _exact_and_trajectories("line", "superconducting", "structured", "statevector", 64, seed=5)
    _exact, mps = _exact_and_trajectories("line", "superconducting", "structured", "matrix_product_state", 64, seed=5)
    assert mps["state_fidelity"] == pytest.approx(sv["state_fidelity"], abs=1e-9)
    assert mps["clique_hellinger_mean"] == pytest.approx(sv["clique_hellinger_mean"], abs=1e-9)
    assert mps["mps_bond_dimension_reached"] >= 1 and mps["mps_truncated"] is False
    assert abs(mps["state_fidelity"] - exact["state_fidelity"]) <= 3 * mps["state_fidelity_se"]


def test_precision_stop_and_ancilla_scope():
    # a hand-made circuit whose variable b travels through an ancilla (qubit 1) by three CNOTs
    qc = QuantumCircuit(3, 2)
    qc.h(0)
    qc.cx(0, 1)
    qc.cx(1, 2)
    qc.cx(2, 1)
    qc.cx(1, 2)
    qc.measure(0, 0)
    qc.measure(2, 1)
    profile = load_profile("superconducting", noise_scale=3.0)
    sched = schedule_circuit(qc, (0, 2), profile)
    assert sched.num_qubits == 3 and len(sched.measured) == 2
    ideal = simulate_ideal(sched)
    exact = ideal.fidelity_with(simulate_noisy(sched, profile).rho)
    run = T.run_trajectories(sched, profile, [(0, 1)], ideal_amplitudes=ideal.amplitudes, precision=0.02, seed=3,
                             method="statevector")
    f, se = run.fidelity()
    assert se < 0.02 and "standard error" in run.stop and run.scope == "variables"
    assert abs(f - exact) <= 3 * se
    # MPS: the whole register's fidelity, a lower bound of the variables' one
    mps = T.run_trajectories(sched, profile, [(0, 1)], n_trajectories=200, seed=3, method="matrix_product_state")
    fm, sem = mps.fidelity()
    assert "lower bound" in mps.scope and fm <= exact + 3 * sem


@pytest.mark.parametrize("qargs", [[0], [2], [1, 3], [3, 1], [2, 0, 1]])
def test_marginal_matches_qiskit_probabilities(qargs):
    # source: qiskit.quantum_info.DensityMatrix.probabilities(qargs) (little-endian over qargs)
    rho = random_density_matrix(16, seed=3)
    p = np.real(np.diag(rho.data))
    assert np.allclose(marginal(p, qargs), rho.probabilities(qargs=qargs))


def test_exact_clique_figures_match_a_partial_trace_of_the_density_matrix():
    ansatz = build_ansatz(TRI, seed=2)
    compiled = compile_ansatz(ansatz, make_connectivity("line", 6), get_gate_set("cx"), strategy="structured", seeds=1)
    profile = load_profile("superconducting", noise_scale=2.0)
    fig = noise_figures(compiled, ansatz, profile, error_budget=False)
    sched = schedule(compiled, profile)
    rho = DensityMatrix(simulate_noisy(sched, profile).rho)
    ideal = DensityMatrix(simulate_ideal(sched).amplitudes @ simulate_ideal(sched).amplitudes.conj().T)
    from qiskit.quantum_info import hellinger_fidelity as qiskit_hellinger

    from toposcout.compiler.metrics import apply_readout
    from toposcout.compiler.noise import readout_matrices

    def as_dict(v):  # qiskit's hellinger_fidelity takes (normalised) count dictionaries
        return {format(i, "b"): float(x) for i, x in enumerate(v)}

    mats = readout_matrices(sched, profile)
    for c, item in zip(clique_indices(TRI), fig["clique_hellinger"]):
        # partial trace by qiskit (DensityMatrix.probabilities(qargs)), readout applied, then
        # qiskit.quantum_info.hellinger_fidelity
        q = apply_readout(rho.probabilities(qargs=list(c)), [mats[v] for v in c])
        ref = qiskit_hellinger(as_dict(ideal.probabilities(qargs=list(c))), as_dict(q))
        assert item["fidelity"] == pytest.approx(ref, abs=1e-9)
    assert fig["clique_hellinger_min"] == min(i["fidelity"] for i in fig["clique_hellinger"])


def test_jackknife_of_a_linear_function_has_no_bias_and_the_textbook_se():
    # for f = mean the delete-one jackknife SE equals the standard error of the group means
    # (Efron & Tibshirani 1993, chapter 11) and the bias estimate is 0
    rng = np.random.default_rng(0)
    x = rng.normal(size=(10, 1))
    val, se, bias = T.jackknife(x.copy(), np.ones(10, dtype=int), lambda m: float(m[0]))
    assert val == pytest.approx(x.mean()) and abs(bias) < 1e-12
    assert se == pytest.approx(x.std(ddof=1) / np.sqrt(10))


# --- the full distribution from the first trajectories only (matrix product states) ---------
def test_capped_distribution_uses_the_first_trajectories_and_changes_no_trajectory(chain_model):
    # common practice: trajectory i is seeded seed_simulator + i whatever the batching, so a run
    # that stops saving the 2^k probabilities after 40 trajectories has the same 120 trajectories
    # as one that saves them all, and its distribution sums are those of the first 40
    m = parse_model(chain_model(6))
    c = compile_ansatz(build_ansatz(m, seed=0), make_connectivity("line", 6), get_gate_set("cx"),
                       strategy="structured", seeds=1)
    profile = load_profile("superconducting", noise_scale=3.0)
    s = schedule(c, profile)
    kw = dict(method="matrix_product_state", seed=4)
    capped = T.run_trajectories(s, profile, clique_indices(m), n_trajectories=120, distribution_trajectories=40, **kw)
    first = T.run_trajectories(s, profile, clique_indices(m), n_trajectories=40, **kw)
    full = T.run_trajectories(s, profile, clique_indices(m), n_trajectories=120, **kw)
    assert capped.fidelities == pytest.approx(full.fidelities, abs=1e-12)
    assert int(capped.distribution_counts.sum()) == 40 and int(capped.counts.sum()) == 120
    assert np.allclose(capped.dist_sums, first.dist_sums, atol=1e-9)
    assert full.dist_counts is None and np.array_equal(full.distribution_counts, full.counts)
    with pytest.raises(T.ToposcoutError, match="distribution_trajectories"):
        T.run_trajectories(s, profile, clique_indices(m), n_trajectories=8, distribution_trajectories=-1, **kw)


def test_capped_distribution_figures_agree_with_the_density_matrix():
    # the distribution figures of the first 200 of 400 MPS trajectories against the exact density
    # matrix (qiskit-aer), the state fidelity from all 400
    ansatz = build_ansatz(TRI, seed=2)
    compiled = compile_ansatz(ansatz, make_connectivity("line", 6), get_gate_set("cx"), strategy="structured", seeds=1)
    profile = load_profile("superconducting")
    exact = noise_figures(compiled, ansatz, profile, error_budget=False)
    sched = schedule(compiled, profile)
    ideal = simulate_ideal(sched)
    p = ideal.probabilities / ideal.probabilities.sum()
    cliques = clique_indices(TRI)
    run = T.run_trajectories(sched, profile, cliques, n_trajectories=400, seed=9, method="matrix_product_state",
                             distribution_trajectories=200)
    est = T.trajectory_figures(sched, profile, TRI, run, p_ideal=p, p_cliques=[marginal(p, c) for c in cliques])
    assert est["trajectories"] == 400 and est["distribution_trajectories"] == 200
    assert abs(est["state_fidelity"] - exact["state_fidelity"]) <= 3 * est["state_fidelity_se"]
    for key in ("hellinger_fidelity", "tvd"):
        assert abs(est[key] - exact[key]) <= 3 * est[f"{key}_se"] + abs(est[f"{key}_bias"]), key
