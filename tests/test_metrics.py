"""Metrics against outside references, monotonicity in the noise scale, the error budget,
ESP, KL to the target, and the two-qubit error threshold."""

import json
import math

import numpy as np
import pytest
from qiskit.quantum_info import hellinger_fidelity as qiskit_hellinger
from scipy.stats import entropy

from toposcout.compiler import build_ansatz, compile_ansatz, get_gate_set, make_connectivity, parse_model, target_distribution
from toposcout.compiler.metrics import (
    FIGURE_KEYS,
    apply_readout,
    esp,
    hamming_kernel_by_weight,
    hellinger_fidelity,
    kl_divergence,
    mmd,
    noise_figures,
    threshold_two_qubit_error,
    total_variation_distance,
)
from toposcout.compiler.noise import operation_errors, schedule
from toposcout.compiler.profiles import load_profile, parse_profile

RNG = np.random.default_rng(7)


def rand_dist(k):
    p = RNG.random(2**k) ** 3
    return p / p.sum()


def test_hellinger_matches_qiskit():
    # reference: qiskit.quantum_info.hellinger_fidelity on count dictionaries
    for k in (1, 3, 5):
        p, q = rand_dist(k), rand_dist(k)
        dp = {format(x, f"0{k}b"): v * 1e6 for x, v in enumerate(p)}
        dq = {format(x, f"0{k}b"): v * 1e6 for x, v in enumerate(q)}
        assert hellinger_fidelity(p, q) == pytest.approx(qiskit_hellinger(dp, dq), abs=1e-12)
    assert hellinger_fidelity(p, p) == pytest.approx(1.0)


def test_kl_matches_scipy_and_tvd_by_definition():
    # references: scipy.stats.entropy(p, q) is KL(p||q) in nats; TVD = 1/2 sum |p - q|
    for k in (1, 4):
        p, q = rand_dist(k), rand_dist(k)
        assert kl_divergence(p, q) == pytest.approx(entropy(p, q), abs=1e-12)
        assert total_variation_distance(p, q) == pytest.approx(0.5 * sum(abs(a - b) for a, b in zip(p, q)))
    assert math.isinf(kl_divergence(np.array([0.5, 0.5]), np.array([1.0, 0.0])))


def test_mmd_equals_the_kernel_matrix_definition():
    # definition: MMD^2 = (p-q)^T K (p-q), K[x,y] = mean_sigma exp(-|x-y|^2 / (2 sigma^2)) on
    # the bit vectors (Gaussian RBF kernel, positive definite: MMD^2 >= 0)
    for k in (1, 3, 6):
        p, q = rand_dist(k), rand_dist(k)
        x = np.arange(2**k)
        bits = (x[:, None] >> np.arange(k)) & 1
        sq = ((bits[:, None, :] - bits[None, :, :]) ** 2).sum(axis=2).astype(float)
        K = np.mean([np.exp(-sq / (2 * s * s)) for s in (0.5, 1.0, 2.0)], axis=0)
        assert np.all(np.linalg.eigvalsh(K) > -1e-12)
        d = p - q
        assert mmd(p, q) == pytest.approx(math.sqrt(d @ K @ d), abs=1e-12)
        assert mmd(p, p) == pytest.approx(0.0, abs=1e-9)
    assert hamming_kernel_by_weight(3)[0] == 1.0


def test_apply_readout_is_the_kronecker_product():
    # by definition: little-endian bits, so the joint confusion is M_{k-1} (x) ... (x) M_0
    mats = [np.array([[0.9, 0.1], [0.3, 0.7]]), np.array([[0.8, 0.2], [0.05, 0.95]]),
            np.array([[1.0, 0.0], [0.4, 0.6]])]
    p = rand_dist(3)
    joint = np.kron(np.kron(mats[2], mats[1]), mats[0])
    assert np.allclose(apply_readout(p, mats), p @ joint, atol=1e-14)


def setup_row(gate_set="cx", factors=False, n=4, family="line", size=None):
    names = [f"v{i}" for i in range(n)]
    d = {"name": "m", "variables": names, "cliques": [names[:3]] + [[names[i], names[i + 1]] for i in range(2, n - 1)]}
    if factors:
        d["factors"] = [{"scope": names[:3], "values": [3.0, 1.0, 1.0, 2.0, 0.5, 1.0, 1.0, 4.0]},
                        {"scope": names[2:4], "values": [2.0, 1.0, 1.0, 2.0]}]
    model = parse_model(d)
    ansatz = build_ansatz(model, seed=4)
    compiled = compile_ansatz(ansatz, make_connectivity(family, n, size=size), get_gate_set(gate_set),
                              strategy="generic", seeds=1)
    return ansatz, compiled


def test_fidelities_decrease_with_noise_scale_and_are_one_at_zero():
    # requirement: fidelity monotone in noise_scale; at scale 0 every fidelity is 1 within 1e-9
    ansatz, compiled = setup_row(n=4, family="ring", size=5)
    rows = [noise_figures(compiled, ansatz, load_profile("superconducting", noise_scale=s), error_budget=False)
            for s in (0.0, 0.25, 0.5, 1.0, 2.0, 4.0)]
    zero = rows[0]
    for key in ("state_fidelity", "hellinger_fidelity", "esp"):
        assert zero[key] == pytest.approx(1.0, abs=1e-9)
    for key in ("tvd", "kl_ideal_noisy", "mmd"):
        assert zero[key] == pytest.approx(0.0, abs=1e-9)
    for key in ("state_fidelity", "hellinger_fidelity", "esp"):
        vals = [r[key] for r in rows]
        assert all(a > b for a, b in zip(vals, vals[1:])), (key, vals)
    tvds = [r["tvd"] for r in rows]
    assert all(a < b for a, b in zip(tvds, tvds[1:]))


def test_figures_are_flat_json_and_budget_is_attributed():
    # contract keys, plain JSON; budget by switching one source off (documented in metrics.py)
    ansatz, compiled = setup_row(factors=True)
    f = noise_figures(compiled, ansatz, load_profile("superconducting"))
    assert tuple(f) == FIGURE_KEYS
    json.dumps(f, allow_nan=False)
    for s in ("two_qubit", "one_qubit", "idle", "readout"):
        assert f[f"budget_{s}"] > 0
    assert f["budget_two_qubit"] > f["budget_one_qubit"]
    assert 0 < f["state_fidelity"] < 1 and 0 < f["hellinger_fidelity"] < 1
    # KL to the target against scipy (target from the model's factors)
    target = target_distribution(ansatz.model)
    assert f["kl_target_ideal"] is not None and f["kl_target_noisy"] is not None
    assert f["kl_target_ideal"] >= 0 and f["kl_target_noisy"] >= 0
    f2 = noise_figures(setup_row(factors=False)[1], setup_row(factors=False)[0], load_profile("superconducting"),
                       error_budget=False)
    assert f2["kl_target_ideal"] is None and f2["budget_two_qubit"] is None
    assert target.shape == (16,)


def test_budget_of_the_only_source_is_the_whole_loss():
    # by definition: with two-qubit gates as the only noise, switching them off restores
    # everything, so budget_two_qubit = 1 - hellinger_fidelity and the other budgets are 0
    ansatz, compiled = setup_row()
    prof = parse_profile({"name": "only2q",
                          "gates": {"one_qubit_error": 0.0, "two_qubit_error": 2e-2, "one_qubit_ns": 0,
                                    "two_qubit_ns": 0, "measure_ns": 0},
                          "readout": {"p1_given_0": 0.0, "p0_given_1": 0.0},
                          "coherence": {"t1_us": 1e12, "t2_us": 1e12}})
    f = noise_figures(compiled, ansatz, prof)
    assert f["budget_two_qubit"] == pytest.approx(1 - f["hellinger_fidelity"], abs=1e-9)
    assert f["budget_state_two_qubit"] == pytest.approx(1 - f["state_fidelity"], abs=1e-9)
    for s in ("one_qubit", "idle", "readout"):
        assert abs(f[f"budget_{s}"]) < 1e-9
    # ESP by definition: (1 - r2)^(number of two-qubit gates)
    assert f["esp"] == pytest.approx((1 - 2e-2) ** compiled.two_qubit_gates(), rel=1e-9)


def test_esp_counts_every_operation():
    # definition of ESP: product of (1 - error) over gates, idle windows and readouts
    ansatz, compiled = setup_row()
    prof = load_profile("superconducting")
    sched = schedule(compiled, prof)
    errs = operation_errors(sched, prof)
    n2 = sum(1 for ins in sched.circuit.data if ins.operation.num_qubits == 2)
    n1 = sum(1 for ins in sched.circuit.data if ins.operation.name in ("sx", "x"))
    assert len(errs["two_qubit"]) == n2 and len(errs["one_qubit"]) == n1
    assert len(errs["readout"]) == 4 and errs["idle"]
    assert esp(errs) == pytest.approx(np.prod([1 - e for v in errs.values() for e in v]))
    assert 0 < esp(errs) < 1


def test_threshold_brackets_the_target():
    # bisection: the fidelity reaches the target at the threshold scale and misses it at the
    # upper end of the final bracket (checked with fresh runs of noise_figures)
    ansatz, compiled = setup_row()
    prof = load_profile("superconducting")
    res = threshold_two_qubit_error(compiled, ansatz, prof, fidelity_target=0.6, rel_tol=0.05)
    assert not res["saturated"]
    lo, hi = res["threshold_noise_scale"], res["upper_noise_scale"]
    assert 0 < lo < hi <= lo * 1.06 + 1e-12
    assert res["threshold_two_qubit_error"] == pytest.approx(prof.two_qubit_error * lo)
    f_lo = noise_figures(compiled, ansatz, prof.scaled(lo), error_budget=False)["state_fidelity"]
    f_hi = noise_figures(compiled, ansatz, prof.scaled(hi), error_budget=False)["state_fidelity"]
    assert f_lo >= 0.6 > f_hi
    assert res["fidelity_at_threshold"] == pytest.approx(f_lo, abs=1e-12)


def test_requirement_default_tolerance_brackets_the_true_threshold():
    # Reference library: scipy.optimize.brentq finds the scale where the state fidelity crosses
    # the target (to 1e-10); the default bisection's bracket must contain it and be at most
    # 0.1 % wide, and the row must report that bracket and the tolerance used.
    from scipy.optimize import brentq

    from toposcout.compiler.options import DEFAULT_REQUIREMENT_TOLERANCE

    ansatz, compiled = setup_row(n=3)
    prof = load_profile("superconducting")
    res = threshold_two_qubit_error(compiled, ansatz, prof, fidelity_target=0.6)
    assert res["requirement_tolerance"] == DEFAULT_REQUIREMENT_TOLERANCE == 0.001
    lower, upper = res["threshold_bracket_two_qubit_error"]
    assert lower == res["threshold_two_qubit_error"] and (upper - lower) / upper <= 0.001

    def f(s):
        return noise_figures(compiled, ansatz, prof.scaled(s), error_budget=False)["state_fidelity"] - 0.6

    true_scale = brentq(f, res["threshold_noise_scale"] * 0.5, res["upper_noise_scale"] * 1.5, xtol=1e-10)
    true_error = prof.two_qubit_error * true_scale
    assert lower <= true_error <= upper
