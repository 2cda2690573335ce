"""Families: the ladder identity, term counts and parameters from the model file."""

from __future__ import annotations

from functools import reduce
from math import comb

import numpy as np
import pytest
import scipy.linalg
from qiskit import QuantumCircuit
from qiskit.quantum_info import Operator

from toposcout.compiler.ansatz import append_term, build_ansatz
from toposcout.compiler.errors import ModelError
from toposcout.compiler.model import parse_model

Z = np.diag([1.0, -1.0])
I2 = np.eye(2)


def z_string(n: int, qubits) -> np.ndarray:
    # qiskit's little-endian order: qubit 0 is the rightmost tensor factor.
    return reduce(np.kron, [Z if q in qubits else I2 for q in reversed(range(n))])


@pytest.mark.parametrize("qubits", [(0, 1, 2), (0, 2), (1,), (0, 1, 2, 3)])
def test_ladder_equals_matrix_exponential(qubits):
    # Reference library: scipy.linalg.expm of -iθ Z⊗…⊗Z.
    n, theta = 4, 0.731
    qc = QuantumCircuit(n)
    append_term(qc, qubits, theta)
    ref = scipy.linalg.expm(-1j * theta * z_string(n, qubits))
    np.testing.assert_allclose(Operator(qc).data, ref, atol=1e-12)


@pytest.mark.parametrize("k", [1, 2, 3, 5])
def test_ladder_cnot_count(k):
    # Nielsen & Chuang, section 4.7.3: exp(-iθ Z^{⊗k}) with 2(k−1) CNOTs.
    qc = QuantumCircuit(k)
    append_term(qc, tuple(range(k)), 0.3)
    assert qc.count_ops().get("cx", 0) == 2 * (k - 1)


def test_clique_family_counts_every_subset_once():
    # Two overlapping 4-cliques share a pair: C(4,k) per clique minus the shared subsets.
    m = parse_model({"variables": list("abcdef"), "cliques": [list("abcd"), list("cdef")]})
    st = build_ansatz(m).stats()
    shared = {1: 2, 2: 1}
    assert st["terms_per_order"] == {k: 2 * comb(4, k) - shared.get(k, 0) for k in range(1, 5)}


def test_max_order_caps_terms():
    m = parse_model({"variables": list("abcd"), "cliques": [list("abcd")], "max_order": 2})
    assert max(build_ansatz(m).stats()["terms_per_order"]) == 2


def test_pairwise_family():
    m = parse_model({"variables": list("abcde"), "cliques": [["a", "b"]]})
    st = build_ansatz(m, family="pairwise").stats()
    assert st["terms_per_order"] == {1: 5, 2: 10}


def test_layers_repeat_the_block():
    m = parse_model({"variables": list("abc"), "cliques": [list("abc")]})
    one, three = build_ansatz(m).stats(), build_ansatz(m, layers=3).stats()
    assert three["cnots"] == 3 * one["cnots"]


def test_seeded_angles_are_reproducible():
    m = parse_model({"variables": list("abc"), "cliques": [list("abc")]})
    assert build_ansatz(m, seed=5) == build_ansatz(m, seed=5)
    assert build_ansatz(m, seed=5) != build_ansatz(m, seed=6)


def test_parameters_from_the_model_file():
    m = parse_model({"variables": ["a", "b"], "cliques": [["a", "b"]],
                     "parameters": {"terms": {"b,a": 0.25, "a": [0.1, 0.2]},
                                    "rotations": {"b": [[1.0, 2.0, 3.0], [0.5, 0.5, 0.5]]}}})
    a = build_ansatz(m, layers=2)
    terms = {t.variables: t.angles for t in a.terms}
    assert terms[(0, 1)] == (0.25, 0.25) and terms[(0,)] == (0.1, 0.2)
    assert a.rotations[0][1] == (1.0, 2.0, 3.0) and a.rotations[1][1] == (0.5, 0.5, 0.5)


def test_parameter_layer_mismatch():
    m = parse_model({"variables": ["a", "b"], "cliques": [["a", "b"]],
                     "parameters": {"terms": {"a,b": [0.1, 0.2]}}})
    with pytest.raises(ModelError, match="2 angles but the circuit has 1 layers"):
        build_ansatz(m)


def test_parameter_for_a_missing_term():
    m = parse_model({"variables": list("abc"), "cliques": [list("abc")], "max_order": 2,
                     "parameters": {"terms": {"a,b,c": 0.1}}})
    with pytest.raises(ModelError, match="not a term"):
        build_ansatz(m)


def test_circuit_shape():
    m = parse_model({"variables": list("abc"), "cliques": [["a", "b"], ["b", "c"]]})
    qc = build_ansatz(m).circuit()
    ops = qc.count_ops()
    assert ops["h"] == 3 and ops["u"] == 3 and ops["measure"] == 3 and ops["cx"] == 4
