"""The ``structured`` compilation strategy: place, synthesise each layer's block, translate.

Circuit layout (the contract): H on every variable's qubit; per layer the synthesised
diagonal block (starting from the previous layer's permutation), then ``u`` on the qubit
where each variable sits; finally physical ``final_layout[i]`` is measured into bit ``i``.
The CNOT+RZ circuit is translated to the gate set and its one-qubit runs merged with qiskit's
own passes (no layout or routing pass runs, so nothing moves); the result is checked against
the coupling map.

Per-coupler native gates (``gate_set.couplers``, from a device file): the synthesis plans with
the default two-qubit gate (``native_zz`` when that is rzz/rxx) and the translation reads the
heterogeneous Target of :func:`~toposcout.compiler.targets.build_target`, so each two-qubit gate
comes out as its coupler's own gate plus one-qubit gates. The synthesis's gate count does not
see the per-coupler gates (a ZZ parity planned as one gate costs two CNOTs on a cx coupler);
the error-aware weights do see each coupler's figures.
"""

from __future__ import annotations

import time
from typing import Sequence

import networkx as nx
from qiskit import QuantumCircuit
from qiskit.circuit.equivalence_library import SessionEquivalenceLibrary
from qiskit.circuit.library import CXGate
from qiskit.transpiler import PassManager
from qiskit.transpiler.passes import BasisTranslator, InverseCancellation, Optimize1qGatesDecomposition

from toposcout.compiler.compiled import Compiled, check_coupling, measured_layout
from toposcout.compiler.errors import CompileError, TargetError
from toposcout.compiler.synthesis.block import Block, append_gates, make_region, sweep_block, synthesize_block
from toposcout.compiler.synthesis.placement import candidate_placements
from toposcout.compiler.synthesis.steiner import Weights
from toposcout.compiler.targets import build_target

__all__ = ["compile_structured", "structured_layers", "search_budget", "log_cost"]


#: above this many (parities x coupling edges) the global greedy is not run (one run of it
#: takes seconds there, and the clique sweep wins on such sizes).
GREEDY_WORK = 30_000

#: (Steiner slack, unit size) of the clique sweeps tried; unit size 0 = one clique at a time.
SWEEPS = ((0, 0), (1, 0), (0, 6), (0, 8), (1, 8))

#: two-qubit gates that are a ZZ (or, up to one-qubit basis changes, XX) interaction of any
#: angle: on these gate sets a parity on two neighbouring wires is one native gate.
NATIVE_ZZ = ("rzz", "rxx")


def search_budget(num_parities: int, num_edges: int) -> tuple[int, tuple[float, ...], int]:
    """(placements, greedy weights, seeds per weight) tried, from the problem size alone.

    Deterministic (no clocks). One greedy run costs roughly parities x edges x steps, so
    the number of runs falls as that product grows: about 36 runs for a 9-variable model,
    one run for models with hundreds of parities.
    """
    work = max(1, num_parities) * max(1, num_edges)
    runs = max(1, min(36, 20_000 // work))
    if runs >= 12:
        return 3, (0.25, 1.0), runs // 6
    if runs >= 4:
        return 2, (0.25, 1.0), runs // 4
    if runs >= 2:
        return 1, (0.5, 1.0), 1
    return 1, (0.5,), 1


def structured_layers(
    layers: Sequence[Sequence[tuple[Sequence[int], float]]],
    graph: nx.Graph,
    n: int,
    *,
    seed: int = 0,
    native_zz: bool = False,
    weights: Weights | None = None,
    placements: Sequence[Sequence[int]] | None = None,
) -> tuple[list[Block], str, str]:
    """Blocks for every layer on ``graph`` (the cheapest over placements and methods).

    Methods: the global greedy parity network (:func:`synthesize_block`), skipped when the
    problem is so large that even one run is slow (more than ``GREEDY_WORK`` parity-edge
    products), and the clique sweeps (:func:`sweep_block`) of ``SWEEPS``.
    Returns the blocks (block l starts where block l-1 ended), how the placement was found
    and which method won. ``native_zz``: see :func:`synthesize_block`.

    weights: default None (the fewest two-qubit gates wins); else the per-element costs of the
    chip: placements are searched by the weighted cost, the synthesis also runs on the coupling
    graph without its poor couplers (weight over three times the median, when the placement stays
    connected without them), and the result with the lowest estimated -log(ESP) (every two-qubit
    gate's coupler cost plus the qubit cost of every variable's final qubit) wins.
    placements: default None (searched); else exactly these placements are tried.
    """
    supports = [tuple(s) for s, _ in layers[0]] if layers else []
    parities = {frozenset(s) for layer in layers for s, _ in layer if len(set(s)) >= 2}
    n_place, lams, n_seeds = search_budget(len(parities), graph.number_of_edges())
    greedy = len(parities) * graph.number_of_edges() <= GREEDY_WORK
    if placements is not None:
        cands = [("given", list(p)) for p in placements]
    else:
        cands = candidate_placements(supports, graph, n, seed=seed, count=n_place + (2 if weights else 0),
                                     weights=weights)
    graphs = [graph]
    if weights is not None and graph.number_of_edges():
        ws = sorted(weights.of_edge(a, b) for a, b in graph.edges)
        cut = 3.0 * ws[len(ws) // 2]
        pruned = graph.copy()
        pruned.remove_edges_from([(a, b) for a, b in graph.edges if weights.of_edge(a, b) > cut])
        if pruned.number_of_edges() < graph.number_of_edges():
            graphs.append(pruned)
    methods: list[tuple[str, object]] = []
    if greedy:
        methods.append(("greedy", lambda layer, region, where: synthesize_block(
            layer, region, where, seeds=[seed * 100 + s for s in range(n_seeds)], lams=lams, native_zz=native_zz)))
    for slack, group in SWEEPS:
        methods.append(("sweep", lambda layer, region, where, _k=slack, _g=group: sweep_block(
            layer, region, where, slack=_k, group=_g, seeds=[seed * 100 + s for s in range(3)],
            native_zz=native_zz)))
    best: tuple[tuple, list[Block], str, str] | None = None
    for how, placement in cands:
        for gi, g in enumerate(graphs):
            if gi:  # the pruned graph: only the connected part holding the whole placement
                part = next((c for c in nx.connected_components(g) if set(placement) <= c), None)
                if part is None:
                    continue
                g = g.subgraph(part)
            region = make_region(g, placement)
            for name, method in methods:
                blocks: list[Block] = []
                where = list(placement)
                for layer in layers:
                    b = method(layer, region, where)
                    blocks.append(b)
                    where = list(b.final_placement)
                total = sum(b.two_qubit for b in blocks)
                key = (total,) if weights is None else (round(log_cost(blocks, where, weights), 12), total)
                if best is None or key < best[0]:
                    best = (key, blocks, how, name)
    return best[1], best[2], best[3]


def log_cost(blocks: Sequence[Block], final: Sequence[int], weights: Weights) -> float:
    """Estimated -log(ESP) of synthesised blocks: the coupler cost of every two-qubit gate plus
    the qubit cost of every variable's final qubit."""
    c = 0.0
    for b in blocks:
        for g in b.gates:
            if g[0] in ("cx", "zz"):
                c += weights.of_edge(g[1], g[2])
    return c + sum(weights.of_qubit(q) for q in final)


def _translation(gate_set, connectivity) -> PassManager:
    """cx/rz/rzz/u → the gate set. With per-coupler native gates (``gate_set.couplers``) the
    translation reads a heterogeneous qiskit Target (:func:`build_target`): qiskit's
    BasisTranslator translates each two-qubit gate into the instruction set of its own qubit pair
    (its documented handling of non-global operations), so each coupler gets its own native gate."""
    if gate_set.couplers:
        target = build_target(connectivity, gate_set)
        return PassManager([
            InverseCancellation([CXGate()]),
            BasisTranslator(SessionEquivalenceLibrary, None, target=target),
            Optimize1qGatesDecomposition(target=target),
        ])
    basis = list(gate_set.basis)
    return PassManager([
        InverseCancellation([CXGate()]),
        BasisTranslator(SessionEquivalenceLibrary, basis),
        Optimize1qGatesDecomposition(basis=basis),
    ])


def compile_structured(ansatz, connectivity, gate_set, *, seed: int = 0, weights: Weights | None = None,
                       placements: Sequence[Sequence[int]] | None = None):
    """Compile ``ansatz`` with the structured strategy (see the module docstring).

    seed: default 0; seeds the placement search and the greedy tie-breaking.
    weights, placements: see :func:`structured_layers` (error-aware placement; fixed placements).
    """
    start = time.perf_counter()
    n = ansatz.num_qubits
    N = connectivity.num_qubits
    if n > N:
        raise TargetError(f"the model has {n} variables but {connectivity.name} has {N} qubits",
                          field="connectivity")
    graph = connectivity.graph()
    if n > 0 and not nx.is_connected(graph):
        comp = max(nx.connected_components(graph), key=len)
        if len(comp) < n:
            raise CompileError(f"no connected part of {connectivity.name} has {n} qubits", field="connectivity")
        graph = graph.subgraph(comp).copy()
    layers = [ansatz.layer_terms(layer) for layer in range(ansatz.layers)]
    native_zz = gate_set.two_qubit in NATIVE_ZZ
    if placements is not None:
        placements = [p for p in placements if all(q in graph for q in p)] or None
    blocks, how, method = structured_layers(layers, graph, n, seed=seed, native_zz=native_zz, weights=weights,
                                            placements=placements)
    placement = list(blocks[0].initial_placement) if blocks else list(sorted(graph.nodes)[:n])
    qc = QuantumCircuit(N, n, name=ansatz.model.name)
    for p in placement:
        qc.h(p)
    where = list(placement)
    for layer, block in enumerate(blocks):
        qc.global_phase += block.global_phase
        append_gates(qc, block.gates)
        where = list(block.final_placement)
        for v, (th, ph, la) in enumerate(ansatz.rotations[layer]):
            qc.u(th, ph, la, where[v])
    for v in range(n):
        qc.measure(where[v], v)
    synth_cx = sum(b.cnots for b in blocks)
    synth_zz = sum(b.two_qubit - b.cnots for b in blocks)
    out = _translation(gate_set, connectivity).run(qc)
    check_coupling(out, connectivity, gate_set)
    final = measured_layout(out)
    if list(final) != where:
        raise CompileError(f"measurement map {list(final)} differs from the synthesised layout {where}",
                           field="circuit")
    elapsed = time.perf_counter() - start
    return Compiled(
        circuit=out,
        initial_layout=tuple(placement),
        final_layout=tuple(final),
        strategy="structured",
        seed=seed,
        compile_seconds=elapsed,
        swaps=0,
        connectivity=connectivity,
        gate_set=gate_set,
        extra={"placement": how, "synthesis": method, "synthesis_cnots": synth_cx, "synthesis_zz": synth_zz,
               "region_qubits": len(make_region(graph, placement).qubits) if n else 0},
    )
