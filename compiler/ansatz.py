"""Families: how a model becomes a logical circuit.

A circuit of either family is: a Hadamard on every qubit; then, per layer, one
Z-string rotation exp(-i θ_S Z_S) per term S (all of them commute: together one
diagonal block), written as a CNOT ladder onto the last qubit of S, RZ(2θ_S) there,
and the ladder undone; then a general rotation u(θ, φ, λ) on every qubit; finally
qubit i is measured into bit i.

* ``clique``: one term per distinct non-empty subset of every clique of the model,
  of order at most ``model.max_order`` when set.
* ``pairwise``: every pair of variables and every single variable: the
  problem-agnostic baseline, blind to the model's structure.

Angles come from ``model.parameters`` when given (terms keyed by variable names
joined with commas, in any order: ``"a,b"``; rotations by variable name), else from a
seeded generator: term angles uniform in [-π/2, π/2), rotation angles θ in [0, π),
φ and λ in [-π, π).

Examples:
    >>> from toposcout.compiler.model import parse_model
    >>> m = parse_model({"variables": ["a", "b", "c"], "cliques": [["a", "b", "c"]]})
    >>> a = build_ansatz(m, seed=3)
    >>> a.stats()["terms_per_order"], a.stats()["cnots"]
    ({1: 3, 2: 3, 3: 1}, 10)
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import combinations
from typing import Any

import numpy as np
from qiskit import QuantumCircuit

from toposcout.compiler.errors import ModelError
from toposcout.compiler.model import Model

__all__ = ["Term", "Ansatz", "build_ansatz", "FAMILIES", "append_term"]

FAMILIES = ("clique", "pairwise")


@dataclass(frozen=True)
class Term:
    """A Z-string on sorted logical qubits ``variables``; ``angles[l]`` is θ in layer l."""

    variables: tuple[int, ...]
    angles: tuple[float, ...]

    @property
    def order(self) -> int:
        return len(self.variables)


def append_term(qc: QuantumCircuit, qubits: tuple[int, ...] | list[int], theta: float) -> None:
    """Append exp(-i θ Z⊗…⊗Z) on ``qubits`` as a CNOT ladder, RZ(2θ), ladder back.

    A k-qubit term costs 2(k-1) CNOTs (Nielsen & Chuang, section 4.7.3).
    """
    qs = list(qubits)
    for a, b in zip(qs, qs[1:]):
        qc.cx(a, b)
    qc.rz(2.0 * theta, qs[-1])
    for a, b in reversed(list(zip(qs, qs[1:]))):
        qc.cx(a, b)


@dataclass(frozen=True)
class Ansatz:
    """A model's logical circuit: its terms, angles per layer and final rotations."""

    model: Model
    family: str
    layers: int
    terms: tuple[Term, ...]
    rotations: tuple[tuple[tuple[float, float, float], ...], ...]  # [layer][qubit] -> (θ, φ, λ)

    @property
    def num_qubits(self) -> int:
        return self.model.num_variables

    def layer_terms(self, layer: int) -> list[tuple[tuple[int, ...], float]]:
        """The (qubits, θ) pairs of one layer's diagonal block."""
        return [(t.variables, t.angles[layer]) for t in self.terms]

    def circuit(self, *, measure: bool = True) -> QuantumCircuit:
        """The logical circuit (n qubits; with ``measure``, n bits and qubit i → bit i)."""
        n = self.num_qubits
        qc = QuantumCircuit(n, n if measure else 0, name=self.model.name)
        qc.h(range(n))
        for layer in range(self.layers):
            for t in self.terms:
                append_term(qc, t.variables, t.angles[layer])
            for q, (th, ph, la) in enumerate(self.rotations[layer]):
                qc.u(th, ph, la, q)
        if measure:
            qc.measure(range(n), range(n))
        return qc

    def stats(self) -> dict[str, Any]:
        """Logical figures: terms per order, CNOT count and depth (without measurement)."""
        per: dict[int, int] = {}
        for t in self.terms:
            per[t.order] = per.get(t.order, 0) + 1
        return {
            "terms_per_order": dict(sorted(per.items())),
            "terms": len(self.terms),
            "lower_bound_two_qubit": sum(1 for t in self.terms if t.order >= 2) * self.layers,
            "cnots": sum(2 * (t.order - 1) for t in self.terms) * self.layers,
            "depth": self.circuit(measure=False).depth(),
            "parameters": len(self.terms) * self.layers + 3 * self.num_qubits * self.layers,
        }


def _family_terms(model: Model, family: str) -> list[tuple[int, ...]]:
    n = model.num_variables
    if family == "pairwise":
        return [(i,) for i in range(n)] + list(combinations(range(n), 2))
    if family != "clique":
        raise ModelError(f"unknown family {family!r}; choose one of {', '.join(FAMILIES)}", field="family")
    pos = {v: i for i, v in enumerate(model.variables)}
    seen: set[tuple[int, ...]] = set()
    out: list[tuple[int, ...]] = []
    for clique in model.cliques:
        idx = sorted(pos[v] for v in clique)
        top = len(idx) if model.max_order is None else min(len(idx), model.max_order)
        for r in range(1, top + 1):
            for sub in combinations(idx, r):
                if sub not in seen:
                    seen.add(sub)
                    out.append(sub)
    return out


def build_ansatz(model: Model, *, family: str = "clique", layers: int = 1, seed: int = 0) -> Ansatz:
    """Build the logical circuit description of ``model``.

    family: default ``"clique"``; or ``"pairwise"``.
    layers: default 1; the diagonal block and the rotation layer are repeated.
    seed: default 0; seeds the angles not given in ``model.parameters``.
    """
    if not isinstance(layers, int) or isinstance(layers, bool) or layers < 1:
        raise ModelError(f"layers must be a positive integer, got {layers!r}", field="layers")
    subsets = _family_terms(model, family)
    rng = np.random.default_rng(seed)
    n = model.num_variables
    params = model.parameters or {}
    pos = {v: i for i, v in enumerate(model.variables)}

    given: dict[tuple[int, ...], list[float]] = {}
    for key, val in params.get("terms", {}).items():
        sub = tuple(sorted(pos[p.strip()] for p in key.split(",")))
        angles = val if isinstance(val, list) else [val] * layers
        if len(angles) != layers:
            raise ModelError(
                f"parameters.terms[{key!r}] has {len(angles)} angles but the circuit has {layers} layers; "
                f"give one number (every layer) or one per layer",
                field=f"parameters.terms.{key}",
            )
        given[sub] = [float(a) for a in angles]
    if family == "clique":
        known = set(subsets)
        for sub in given:
            if sub not in known:
                key = ",".join(model.variables[i] for i in sub)
                raise ModelError(
                    f"parameters.terms[{key!r}] is not a term of this model (is it in a clique, and within "
                    f"max_order={model.max_order}?)",
                    field=f"parameters.terms.{key}",
                )

    terms = []
    for sub in subsets:
        random_angles = rng.uniform(-np.pi / 2, np.pi / 2, size=layers)
        angles = given.get(sub, [float(a) for a in random_angles])
        terms.append(Term(sub, tuple(angles)))

    rot_given: dict[int, list[tuple[float, float, float]]] = {}
    for name, val in params.get("rotations", {}).items():
        triples = val if isinstance(val[0], list) else [val] * layers
        if len(triples) != layers:
            raise ModelError(
                f"parameters.rotations[{name!r}] has {len(triples)} triples but the circuit has {layers} layers",
                field=f"parameters.rotations.{name}",
            )
        rot_given[pos[name]] = [tuple(float(x) for x in tri) for tri in triples]
    rotations = []
    for layer in range(layers):
        row = []
        for q in range(n):
            th = rng.uniform(0, np.pi)
            ph, la = rng.uniform(-np.pi, np.pi, size=2)
            row.append(rot_given[q][layer] if q in rot_given else (float(th), float(ph), float(la)))
        rotations.append(tuple(row))
    return Ansatz(model=model, family=family, layers=layers, terms=tuple(terms), rotations=tuple(rotations))
