"""The probability that independent parity flips cancel (compiler/parity.py), and the clifford
estimate built on it when returns are too rare to count.

Checks against the outside:
* brute-force enumeration of every fire pattern (the definition of the probability);
* the Pauli eigenvalues of a one-qubit Pauli channel from qiskit.quantum_info's PTM
  (Nielsen & Chuang, section 8.3: a Pauli channel is diagonal in the Pauli basis);
* the exact density matrix of qiskit-aer for a Clifford circuit under Pauli noise (where the
  stabilizer average is exact: Merkel, Proctor et al., arXiv:2503.05943 (2025)): in
  tests/test_clifford.py (test_clifford_circuit_under_pauli_noise_is_exact_within_3_se, whose
  "auto" cases are the exact stabilizer average);
* stim's own shot sampler (counted returns), an independent path through the same twin.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from qiskit.quantum_info import PTM
from qiskit_aer.noise import pauli_error

from toposcout.compiler import build_ansatz, compile_ansatz, get_gate_set, make_connectivity, parse_model
from toposcout.compiler import clifford as C
from toposcout.compiler import parity as P
from toposcout.compiler.model import load_model
from toposcout.compiler.noise import NoiseSwitches, schedule
from toposcout.compiler.profiles import load_profile


def _random_problem(rng, mechanisms: int, checks: int, p_max: float = 0.3):
    symptoms = [int(rng.integers(1, 1 << checks)) for _ in range(mechanisms)]
    probs = rng.uniform(0.0, p_max, size=mechanisms)
    return symptoms, probs


def _brute_force(symptoms, probs) -> float:
    # the definition: the sum over every fire pattern whose symptoms add up (XOR) to zero
    total = 0.0
    for fired in itertools.product((0, 1), repeat=len(symptoms)):
        acc, pr = 0, 1.0
        for f, v, p in zip(fired, symptoms, probs):
            pr *= p if f else 1 - p
            acc ^= v if f else 0
        total += pr if acc == 0 else 0.0
    return total


@pytest.mark.parametrize("seed", range(6))
def test_exact_transform_equals_brute_force_enumeration(seed):
    rng = np.random.default_rng(seed)
    symptoms, probs = _random_problem(rng, mechanisms=11, checks=5 + seed % 3)
    # repeated symptoms on purpose: merging them must keep the answer
    symptoms[3] = symptoms[1]
    problem = P.ParityProblem(symptoms, [math.log1p(-2 * p) for p in probs])
    assert problem.rank <= 7 and problem.mechanisms <= 10
    assert P.exact_cancellation(problem) == pytest.approx(_brute_force(symptoms, probs), rel=1e-10, abs=1e-15)
    # the no-fire term is a lower bound (every other term is a non-negative probability)
    assert math.exp(problem.no_fire_log_probability()) <= P.exact_cancellation(problem) + 1e-15


@pytest.mark.parametrize("probs", [(0.01, 0.01, 0.03), (0.002, 0.0, 0.0), (0.1, 0.05, 0.02), (0.0, 0.0, 0.2),
                                   (0.01, 0.01, 0.0)])
def test_independent_flips_have_the_pauli_eigenvalues_of_the_channel(probs):
    px, py, pz = probs
    channel = pauli_error([("I", 1 - px - py - pz), ("X", px), ("Y", py), ("Z", pz)])
    diag = np.diag(PTM(channel).data).real  # [1, l_X, l_Y, l_Z] (Pauli basis order I, X, Y, Z)
    gx, gy, gz = P.independent_flips(px, py, pz)
    # an X flip anticommutes with Y and Z, and so on: l_X = c_Y c_Z, l_Y = c_X c_Z, l_Z = c_X c_Y
    assert math.exp(gy + gz) == pytest.approx(diag[1], abs=1e-12)
    assert math.exp(gx + gz) == pytest.approx(diag[2], abs=1e-12)
    assert math.exp(gx + gy) == pytest.approx(diag[3], abs=1e-12)
    if pz == 0 and px > 0 and py > 0:
        assert gz > 0  # pure X/Y channel: no product of independent flips, a factor above one


def test_weighted_estimate_agrees_with_the_exact_one_within_3_se():
    rng = np.random.default_rng(11)
    symptoms, probs = _random_problem(rng, mechanisms=400, checks=18, p_max=0.05)
    problem = P.ParityProblem(symptoms, [math.log1p(-2 * p) for p in probs])
    assert problem.rank == 18
    exact = P.exact_cancellation(problem)
    assert 1e-9 < exact < 1e-2  # far too rare to count returns cheaply
    for seed in range(3):
        est = P.weighted_cancellation(problem, rel_se=0.03, max_samples=400_000, seed=seed)
        assert not est.exact and est.effective_samples >= P.MIN_EFFECTIVE_SAMPLES
        assert est.se <= 0.031 * est.value
        assert abs(est.value - exact) <= 3 * est.se, (est.value, est.se, exact)


def test_weighted_parts_merge_to_one_estimate():
    rng = np.random.default_rng(5)
    symptoms, probs = _random_problem(rng, mechanisms=300, checks=16, p_max=0.05)
    problem = P.ParityProblem(symptoms, [math.log1p(-2 * p) for p in probs])
    a = P.weighted_cancellation(problem, rel_se=0.1, max_samples=20_000, seed=1)
    b = P.weighted_cancellation(problem, rel_se=0.1, max_samples=20_000, seed=2)
    both = a + b
    assert both.samples == a.samples + b.samples
    # the pooled mean is the sample-weighted mean of the parts, and its error is smaller
    assert both.value == pytest.approx((a.value * a.samples + b.value * b.samples) / both.samples, rel=1e-12)
    assert both.se < max(a.se, b.se)
    again = P.ParityEstimate.from_dict(both.to_dict())
    assert again == both
    with pytest.raises(ValueError):
        _ = both + P.ParityEstimate(0.5, 0.0, True)


def _sched(model: dict, connectivity: str, n: int, profile):
    m = parse_model(model)
    compiled = compile_ansatz(build_ansatz(m, seed=0), make_connectivity(connectivity, n), get_gate_set("cx"),
                              strategy="structured", seeds=1)
    return schedule(compiled, profile)


@pytest.mark.parametrize("switches", [NoiseSwitches(), NoiseSwitches().without("idle")], ids=["all", "no-idle"])
def test_stabilizer_average_agrees_with_counted_returns_on_the_same_twin(switches, chain_model):
    # 10 variables on a line (rank <= 20: exact) against stim's shot sampler on the same twin
    profile = load_profile("superconducting", noise_scale=3.0)
    sched = _sched(chain_model(10), "line", 10, profile)
    avg = C.clifford_figures(sched, profile, switches, estimator="weighted")
    shots = C.clifford_figures(sched, profile, switches, estimator="returns", rel_se=0.01, seed=3)
    assert avg["clifford_estimator"] == "exact stabilizer average"
    assert shots["clifford_estimator"] == "counted returns" and shots["clifford_shots"] > 0
    for key in ("clifford_state_fidelity", "clifford_read_fidelity"):
        assert abs(avg[key] - shots[key]) <= 3 * shots[f"{key}_se"], (key, avg[key], shots[key])


def test_weighted_average_agrees_with_counted_returns_at_24_variables():
    # the 24-variable example on grid: F ~ 1e-3, where counting still works (a few hundred
    # thousand shots) and the span (24 checks) is above the exact limit, so the average is sampled
    model = load_model("examples/greenhouse-humidity-24.json").to_dict()
    profile = load_profile("superconducting")
    sched = _sched(model, "grid", 24, profile)
    avg = C.clifford_figures(sched, profile, estimator="weighted", rel_se=0.03, seed=1)
    shots = C.clifford_figures(sched, profile, estimator="returns", rel_se=0.03, seed=1)
    assert avg["clifford_estimator"] == "weighted stabilizer average" and avg["clifford_samples"] > 0
    assert avg["clifford_effective_samples"] >= P.MIN_EFFECTIVE_SAMPLES
    assert shots["clifford_returns"] > 0
    gap = abs(avg["clifford_state_fidelity"] - shots["clifford_state_fidelity"])
    assert gap <= 3 * math.hypot(avg["clifford_state_fidelity_se"], shots["clifford_state_fidelity_se"]), (
        avg["clifford_state_fidelity"], shots["clifford_state_fidelity"])


def test_auto_estimator_gives_a_figure_where_no_shot_would_return(chain_model):
    # 20 variables under 20x noise: F ~ 1e-4, counting would need ~1e7 shots; the weighted
    # average gives a figure with its standard error (not an upper bound), and a budget
    profile = load_profile("superconducting", noise_scale=20.0)
    sched = _sched(chain_model(20), "line", 20, profile)
    est = C.clifford_figures(sched, profile)
    assert est["clifford_estimator"] != "counted returns" and est["clifford_upper_bound"] is False
    assert est["clifford_state_fidelity"] < 1e-3
    assert est["clifford_state_fidelity_se"] <= 0.05 * est["clifford_state_fidelity"]
    budget = C.clifford_budget(sched, profile, base=est)
    assert budget["clifford_budget_state_two_qubit"] > 0 and "error_budget_note" not in budget
    with pytest.raises(Exception, match="estimator"):
        C.clifford_figures(sched, profile, estimator="guess")


def test_the_cli_table_marks_each_estimator():
    from toposcout.service.output import CLIFFORD_NOTE, rows_table

    base = {"connectivity": "line-4", "method": "clifford"}
    rows = [dict(base, clifford_state_fidelity=0.5161, clifford_state_fidelity_se=0.0,
                 clifford_estimator="exact stabilizer average"),
            dict(base, clifford_state_fidelity=5.6e-16, clifford_state_fidelity_se=2.8e-17,
                 clifford_estimator="weighted stabilizer average"),
            dict(base, clifford_state_fidelity=1.5e-6, clifford_upper_bound=True, clifford_estimator="counted returns")]
    text = rows_table(rows)
    lines = text.splitlines()
    assert "~0.516 " in lines[1] + " " and "±" not in lines[1]       # exact: no sampling error to show
    assert "~5.6e-16±2.8e-17" in lines[2]
    assert "<1.5e-06" in lines[3]
    assert CLIFFORD_NOTE in text
