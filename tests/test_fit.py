"""The fit: exact evaluator, adjoint gradients, losses and optimiser (compiler/fit.py)."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from qiskit.quantum_info import Statevector

from toposcout.compiler.ansatz import build_ansatz
from toposcout.compiler.errors import CapacityError, ModelError
from toposcout.compiler.fit import (
    Evaluator,
    KLLoss,
    MMDLoss,
    fit_model,
    mmd_unbiased,
    parameters_dict,
    parse_samples,
    with_parameters,
)
from toposcout.compiler.metrics import kl_divergence
from toposcout.compiler.model import parse_model, target_distribution


def _random_model(rng: np.random.Generator, n: int, *, factors: bool = True) -> dict:
    names = [f"v{i}" for i in range(n)]
    cliques = []
    for i in range(n - 1):  # a chain of pairs and triples, so every variable is covered
        k = int(rng.integers(2, 4))
        cliques.append(names[i:i + k])
    d = {"name": "random", "variables": names, "cliques": cliques}
    if factors:
        d["factors"] = [{"scope": c, "values": [float(x) for x in rng.uniform(0.2, 3.0, size=2 ** len(c))]}
                        for c in cliques]
    return d


def _circuit_probabilities(ev: Evaluator, x: np.ndarray) -> np.ndarray:
    """The probabilities of the circuit ansatz.py builds with the angles ``x``, by qiskit's Statevector."""
    a = ev.ansatz
    m = with_parameters(a.model, parameters_dict(ev, x))
    qc = build_ansatz(m, family=a.family, layers=a.layers).circuit(measure=False)
    return Statevector(qc).probabilities()


@pytest.mark.parametrize("layers", [1, 2, 3])
@pytest.mark.parametrize("family", ["clique", "pairwise"])
def test_state_equals_qiskit_statevector(layers, family):
    # reference: qiskit.quantum_info.Statevector of the circuit ansatz.py builds (same angles)
    rng = np.random.default_rng(10 * layers + len(family))
    for trial in range(3):
        m = parse_model(_random_model(rng, int(rng.integers(3, 7))))
        a = build_ansatz(m, family=family, layers=layers, seed=trial)
        ev = Evaluator(a)
        psi = ev.state(ev.initial())
        ref = Statevector(a.circuit(measure=False)).data
        assert np.max(np.abs(psi - ref)) < 1e-10


def test_random_angles_round_trip_through_the_model_format():
    rng = np.random.default_rng(4)
    m = parse_model(_random_model(rng, 5))
    ev = Evaluator(build_ansatz(m, layers=2))
    x = ev.random(rng)
    # the same circuit from the written parameters: qiskit.quantum_info.Statevector as reference
    assert np.max(np.abs(ev.probabilities(x) - _circuit_probabilities(ev, x))) < 1e-10


@pytest.mark.parametrize("layers", [1, 2])
@pytest.mark.parametrize("loss_kind", ["kl", "mmd"])
def test_gradient_equals_parameter_shift_and_finite_differences(layers, loss_kind):
    rng = np.random.default_rng(layers)
    m = parse_model(_random_model(rng, 4))
    ev = Evaluator(build_ansatz(m, family="clique", layers=layers))
    x = ev.random(rng)
    if loss_kind == "kl":
        loss = KLLoss(target_distribution(m))
    else:
        loss = MMDLoss(rng.integers(0, 16, size=50), 4, bandwidths=(0.5, 1.0, 2.0))
    value, grad = ev.value_and_grad(x, loss)
    p0 = _circuit_probabilities(ev, x)
    _, dl_dp = loss.value_and_grad_p(p0)
    # parameter-shift rule (Mitarai et al., PRA 98, 032309 (2018); Schuld et al., PRA 99, 032331 (2019)):
    # for a gate exp(-i a G) with G² = I, dp/da = p(a + π/4) - p(a - π/4); a term exp(-i θ Z_S) is that with
    # a = θ; u(θ, φ, λ) = RZ(φ) RY(θ) RZ(λ) up to a global phase, each exp(-i a σ/2): dp/da = (p(a+π/2) - p(a-π/2))/2
    k_terms = ev.layers * ev.num_terms
    shift_grad = np.zeros_like(x)
    for i in range(x.size):
        s, scale = (math.pi / 4, 1.0) if i < k_terms else (math.pi / 2, 0.5)
        e = np.zeros_like(x)
        e[i] = s
        dp = scale * (_circuit_probabilities(ev, x + e) - _circuit_probabilities(ev, x - e))
        shift_grad[i] = float(dl_dp @ dp)
    assert np.max(np.abs(grad - shift_grad)) < 1e-6
    # central finite differences of the loss (step 1e-5; truncation error ~1e-10 here)
    h = 1e-5
    fd = np.array([(ev.value_and_grad(x + h * e, loss)[0] - ev.value_and_grad(x - h * e, loss)[0]) / (2 * h)
                   for e in np.eye(x.size)])
    assert np.max(np.abs(grad - fd)) < 1e-6


def test_product_target_fitted_to_kl_below_1e_6():
    # a product of one-variable factors: each qubit's marginal is reachable by H, RZ and u exactly
    m = parse_model({"name": "product", "variables": ["a", "b", "c", "d"], "cliques": [["a"], ["b"], ["c"], ["d"]],
                     "factors": [{"scope": ["a"], "values": [0.8, 0.2]}, {"scope": ["b"], "values": [0.3, 0.7]},
                                 {"scope": ["c"], "values": [0.5, 0.5]}, {"scope": ["d"], "values": [0.95, 0.05]}]})
    r = fit_model(m, restarts=2, seed=0)
    assert r.loss < 1e-6
    # the reported KL is recomputed from the fitted circuit (qiskit Statevector) with metrics.kl_divergence
    fitted = with_parameters(m, r.parameters)
    p = Statevector(build_ansatz(fitted).circuit(measure=False)).probabilities()
    assert kl_divergence(target_distribution(m), p) == pytest.approx(r.kl_target, abs=1e-9)
    assert r.kl_target < 1e-6


def test_three_body_target_fitted_at_least_as_well_by_clique_as_pairwise():
    # a strong three-body interaction: parity-odd configurations much more likely
    values = [0.1 if bin(x).count("1") % 2 == 0 else 2.0 for x in range(8)]
    m = parse_model({"name": "parity", "variables": ["a", "b", "c"], "cliques": [["a", "b", "c"]],
                     "factors": [{"scope": ["a", "b", "c"], "values": values}]})
    clique = fit_model(m, family="clique", restarts=3, seed=1)
    pairwise = fit_model(m, family="pairwise", restarts=3, seed=1)
    # the clique family holds every pairwise term (and one more): a worse clique fit is an optimiser failure
    assert clique.loss <= pairwise.loss + 1e-9
    assert clique.loss < 1e-6


def _direct_mmd2(p: np.ndarray, samples: np.ndarray, n: int, bandwidths) -> float:
    """Gretton et al., JMLR 13 (2012), eq. 3 (unbiased MMD²_u) with the model side an exact expectation:
    E_{x,x'~p} k(x,x') - 2/m sum_j E_{x~p} k(x, y_j) + 1/(m(m-1)) sum_{i≠j} k(y_i, y_j), written with loops."""
    xs = np.array([[(x >> j) & 1 for j in range(n)] for x in range(2 ** n)])

    def k(a, b):
        h = np.sum(xs[a] != xs[b])  # Hamming = squared Euclidean distance of 0/1 vectors
        return np.mean([math.exp(-h / (2 * s * s)) for s in bandwidths])

    big_n = 2 ** n
    kxx = sum(p[a] * p[b] * k(a, b) for a in range(big_n) for b in range(big_n))
    m = len(samples)
    kxy = sum(p[a] * k(a, y) for a in range(big_n) for y in samples) / m
    kyy = sum(k(samples[i], samples[j]) for i in range(m) for j in range(m) if i != j) / (m * (m - 1))
    return kxx - 2 * kxy + kyy


@pytest.mark.parametrize("bandwidths", [(0.5, 1.0, 2.0), (1.5,), (0.7, 3.0)])
def test_mmd_estimator_equals_direct_formula(bandwidths):
    rng = np.random.default_rng(len(bandwidths))
    n = 3
    p = rng.dirichlet(np.ones(2 ** n))
    samples = rng.integers(0, 2 ** n, size=12)
    assert mmd_unbiased(p, samples, n, bandwidths) == pytest.approx(_direct_mmd2(p, samples, n, bandwidths),
                                                                   abs=1e-12)


def test_mmd_fit_on_samples_reaches_the_kl_fit():
    m = parse_model({"name": "pair-chain", "variables": ["a", "b", "c", "d"], "cliques": [["a", "b"], ["b", "c"],
                                                                                      ["c", "d"]],
                     "factors": [{"scope": ["a", "b"], "values": [3.0, 0.5, 0.5, 2.0]},
                                 {"scope": ["b", "c"], "values": [2.5, 0.6, 0.6, 2.5]},
                                 {"scope": ["c", "d"], "values": [0.4, 2.0, 2.0, 0.7]}]})
    target = target_distribution(m)
    samples = np.random.default_rng(7).choice(16, size=10_000, p=target)
    # two layers: the family can represent this target (the KL fit reaches ~0), so both losses aim at the same
    # distribution; with one layer each finds its own best approximation and the two differ (0.03 vs 0.07 nats)
    by_kl = fit_model(m, loss="kl", layers=2, restarts=2, seed=0)
    by_mmd = fit_model(m, loss="mmd", samples=samples, layers=2, restarts=2, seed=0)
    # stated tolerance: 0.01 nats. The empirical distribution of 10 000 samples is itself ~(2^4 - 1)/(2 * 10^4)
    # ~ 1e-3 nats from the target (the chi-square expansion of KL, common practice); measured 0.001 here.
    assert by_kl.kl_target < 1e-6
    assert by_mmd.kl_target <= by_kl.kl_target + 0.01
    assert by_mmd.mmd_data is not None


def test_adam_lowers_the_loss_and_fits_are_reproducible():
    rng = np.random.default_rng(3)
    m = parse_model(_random_model(rng, 4))
    start = fit_model(m, restarts=1, max_iter=1, seed=5, optimizer="adam")
    adam = fit_model(m, restarts=1, max_iter=300, seed=5, optimizer="adam", learning_rate=0.05)
    assert adam.loss < start.loss / 2
    a = fit_model(m, restarts=2, max_iter=50, seed=9)
    b = fit_model(m, restarts=2, max_iter=50, seed=9)
    assert a.parameters == b.parameters and [r.loss for r in a.restarts] == [r.loss for r in b.restarts]


def test_progress_can_stop_and_the_best_so_far_is_returned():
    rng = np.random.default_rng(8)
    m = parse_model(_random_model(rng, 4))
    seen = []

    def progress(event):
        seen.append(event["loss"])
        return len(seen) >= 5

    r = fit_model(m, restarts=3, max_iter=200, seed=0, progress=progress)
    assert r.interrupted and len(r.restarts) == 1 and r.restarts[0].iterations == 5
    assert r.loss <= min(seen) + 1e-12


def test_fit_refuses_bad_options_and_big_models():
    m = parse_model({"variables": ["a", "b"], "cliques": [["a", "b"]]})
    with pytest.raises(ModelError) as e:
        fit_model(m)
    assert e.value.field == "factors"
    with pytest.raises(ModelError) as e:
        fit_model(m, loss="mmd")
    assert e.value.field == "data"
    with pytest.raises(ModelError) as e:
        fit_model(m, loss="hinge", samples=np.array([0, 1, 2]))
    assert e.value.field == "loss"
    with pytest.raises(ModelError) as e:
        fit_model(m, loss="mmd", samples=np.array([0, 1, 2]), restarts=0)
    assert e.value.field == "restarts"
    big = parse_model({"variables": [f"x{i}" for i in range(21)], "cliques": [[f"x{i}", f"x{i + 1}"]
                                                                               for i in range(20)]})
    with pytest.raises(CapacityError, match="at most 20 variables"):
        fit_model(big, loss="mmd", samples=np.array([0, 1]))


def test_parse_samples_reads_columns_in_any_order_and_names_bad_lines():
    v = ["a", "b", "c"]
    idx = parse_samples("c,a,b\n1,0,0\n0,1,1\n1,1,0\n", v)
    assert idx.tolist() == [4, 3, 5]  # little-endian: a is bit 0
    cases = {
        "a,b\n0,1\n1,0\n": "no column for variable 'c'",
        "a,b,z\n0,1,1\n": "'z' is not a variable",
        "a,b,c\n0,1,1\n0,2,1\n": "line 3: value '2'",
        "a,b,c\n0,1,1\n0,1\n": "line 3: 2 values",
        "a,b,c\n0,1,1\n1,1,0\n": "column 'b' is constant",
        "": "empty",
    }
    for text, message in cases.items():
        with pytest.raises(ModelError, match=message):
            parse_samples(text, v)


def test_every_bitstring_order_matches_the_model_index():
    # little-endian convention of model.py: entry x = sum_j b_j 2^j with b_j the value of variables[j]
    v = ["a", "b", "c"]
    lines = ["a,b,c"] + [",".join(str(b) for b in bits) for bits in itertools.product("01", repeat=3)]
    idx = parse_samples("\n".join(lines), v)
    assert sorted(idx.tolist()) == list(range(8))


def test_state_and_gradient_past_one_group_of_qubits():
    # 11 variables: three groups of qubits (5 + 5 + 1), so the batched and the single-product paths all run;
    # reference: qiskit.quantum_info.Statevector, and central finite differences of the loss (step 1e-5)
    rng = np.random.default_rng(11)
    m = parse_model(_random_model(rng, 11))
    a = build_ansatz(m, layers=2, seed=2)
    ev = Evaluator(a)
    x = ev.initial()
    assert np.max(np.abs(ev.state(x) - Statevector(a.circuit(measure=False)).data)) < 1e-10
    loss = MMDLoss(rng.integers(0, 2 ** 11, size=300), 11)
    _, grad = ev.value_and_grad(x, loss)
    h = 1e-5
    picks = rng.choice(x.size, size=20, replace=False)
    for i in picks:
        e = np.zeros_like(x)
        e[i] = h
        fd = (ev.value_and_grad(x + e, loss)[0] - ev.value_and_grad(x - e, loss)[0]) / (2 * h)
        assert abs(grad[i] - fd) < 1e-6
    kl = KLLoss(target_distribution(m))
    _, grad = ev.value_and_grad(x, kl)
    for i in picks:
        e = np.zeros_like(x)
        e[i] = h
        fd = (ev.value_and_grad(x + e, kl)[0] - ev.value_and_grad(x - e, kl)[0]) / (2 * h)
        assert abs(grad[i] - fd) < 1e-6
