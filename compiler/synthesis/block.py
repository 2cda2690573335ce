"""The diagonal block of one layer on physical qubits: terms in, CNOT+RZ circuit out."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import networkx as nx
from qiskit import QuantumCircuit

from toposcout.compiler.synthesis.parity import ZZ_MODES, ParityNetwork, cnot_count, fuse_zz, synthesize_parities, two_qubit_count
from toposcout.compiler.synthesis.steiner import SteinerCost, all_pairs_distances

__all__ = ["Block", "Region", "make_region", "synthesize_block", "block_circuit", "append_gates"]


@dataclass(frozen=True)
class Region:
    """The physical qubits a block may use (a connected set) and their adjacency."""

    qubits: tuple[int, ...]            # wire index -> physical qubit
    adj: tuple[tuple[int, ...], ...]   # adjacency over wire indices
    cost: SteinerCost

    def wire(self, physical: int) -> int:
        return self.qubits.index(physical)


def make_region(graph: nx.Graph, used: Sequence[int]) -> Region:
    """The used qubits plus, if they are not connected, the nodes of a Steiner tree joining them.

    The extra qubits hold |0> and act as relays; they end in |0> because the block ends in a
    permutation of the region's wires.
    """
    used = sorted(set(used))
    nodes = set(used)
    if len(used) > 1 and not nx.is_connected(graph.subgraph(used)):
        from networkx.algorithms.approximation import steiner_tree

        nodes |= set(steiner_tree(graph, used, method="mehlhorn").nodes)
    qubits = tuple(sorted(nodes))
    index = {q: i for i, q in enumerate(qubits)}
    adj = tuple(tuple(sorted(index[v] for v in graph[q] if v in index)) for q in qubits)
    dist = all_pairs_distances([list(a) for a in adj])
    return Region(qubits, adj, SteinerCost(dist))


@dataclass(frozen=True)
class Block:
    """A synthesised block: gates on physical qubits and where each variable ends.

    gates: ``("cx", control, target)``, ``("rz", qubit, angle)`` or ``("zz", a, b, angle)``
        (``exp(-i angle/2 Z_a Z_b)``, only when synthesised with ``native_zz``), physical indices.
    final_placement: variable i -> physical qubit after the block.
    global_phase: from terms on the empty set (exp(-i θ) each).
    """

    gates: tuple[tuple, ...]
    initial_placement: tuple[int, ...]
    final_placement: tuple[int, ...]
    global_phase: float

    @property
    def cnots(self) -> int:
        return cnot_count(self.gates)

    @property
    def two_qubit(self) -> int:
        """CNOTs plus native ZZ gates."""
        return two_qubit_count(self.gates)


def _to_physical(gates, q) -> tuple[tuple, ...]:
    out = []
    for g in gates:
        if g[0] == "cx":
            out.append(("cx", q[g[1]], q[g[2]]))
        elif g[0] == "zz":
            out.append(("zz", q[g[1]], q[g[2]], g[3]))
        else:
            out.append(("rz", q[g[1]], g[2]))
    return tuple(out)


def synthesize_block(
    terms: Sequence[tuple[Sequence[int], float]],
    region: Region,
    placement: Sequence[int],
    *,
    seeds: Sequence[int] = (0,),
    lams: Sequence[float] = (0.25, 1.0),
    native_zz: bool = False,
) -> Block:
    """Synthesise ``Π exp(-i θ Z_S)`` on ``region`` starting from ``placement``.

    terms: ``(S, θ)`` with ``S`` logical qubit indices; repeated sets add their angles.
    placement: logical qubit i -> physical qubit (all inside the region).
    seeds, lams: every pair is tried; the network with the fewest two-qubit gates is kept.
    native_zz: default False; apply parities sitting on two neighbouring wires as one ZZ
        gate (for gate sets whose entangling gate is a ZZ or XX interaction of any angle).
    """
    wire_of = {q: i for i, q in enumerate(region.qubits)}
    start = [wire_of[p] for p in placement]
    phase = 0.0
    acc: dict[int, float] = {}
    for support, theta in terms:
        m = 0
        for v in support:
            m ^= 1 << start[v]
        if m == 0:
            phase -= theta
            continue
        acc[m] = acc.get(m, 0.0) + 2.0 * theta
    parities = sorted(acc.items())
    adj = [list(a) for a in region.adj]
    best: ParityNetwork | None = None
    for lam in lams:
        for seed in seeds:
            for zz in ZZ_MODES if native_zz else (False,):
                net = synthesize_parities(parities, adj, cost=region.cost, lam=lam, seed=seed, native_zz=zz)
                if native_zz:
                    net = ParityNetwork(tuple(fuse_zz(net.gates)), net.final)
                if best is None or net.two_qubit < best.two_qubit:
                    best = net
    q = region.qubits
    gates = _to_physical(best.gates, q)
    end_of = {s: w for w, s in enumerate(best.final)}
    final = tuple(q[end_of[s]] for s in start)
    return Block(gates, tuple(placement), final, phase)


def append_gates(qc: QuantumCircuit, gates: Sequence[tuple]) -> None:
    """Append a synthesised gate list (``("cx", c, t)``, ``("zz", a, b, θ)``, ``("rz", q, φ)``) to ``qc``."""
    for g in gates:
        if g[0] == "cx":
            qc.cx(g[1], g[2])
        elif g[0] == "zz":
            qc.rzz(g[3], g[1], g[2])
        else:
            qc.rz(g[2], g[1])


def block_circuit(block: Block, num_qubits: int) -> QuantumCircuit:
    """The block as a circuit on ``num_qubits`` physical wires (cx, rz and rzz only)."""
    qc = QuantumCircuit(num_qubits, global_phase=block.global_phase)
    append_gates(qc, block.gates)
    return qc


def sweep_block(
    terms: Sequence[tuple[Sequence[int], float]],
    region: Region,
    placement: Sequence[int],
    *,
    slack: int = 0,
    seeds: Sequence[int] = (0, 1, 2),
    lams: Sequence[float] = (0.25, 1.0),
    native_zz: bool = False,
    group: int = 0,
) -> Block:
    """Like :func:`synthesize_block`, by the clique sweep of :mod:`toposcout.compiler.synthesis.sweep`."""
    from toposcout.compiler.synthesis.sweep import sweep_parities

    wire_of = {q: i for i, q in enumerate(region.qubits)}
    start = [wire_of[p] for p in placement]
    phase = 0.0
    acc: dict[frozenset, float] = {}
    for support, theta in terms:
        s = frozenset(v for v in set(support) if list(support).count(v) % 2)
        if not s:
            phase -= theta
            continue
        acc[s] = acc.get(s, 0.0) + 2.0 * theta
    adj = [list(a) for a in region.adj]
    gates, at = sweep_parities(acc, adj, start, cost=region.cost, slack=slack, seeds=seeds, lams=lams,
                               native_zz=native_zz, group=group)
    q = region.qubits
    out = _to_physical(fuse_zz(gates) if native_zz else gates, q)  # SWAP/CNOT seams between cliques
    return Block(out, tuple(placement), tuple(q[w] for w in at), phase)
