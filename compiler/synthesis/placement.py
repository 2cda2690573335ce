"""Placement of a model's variables on physical qubits for the structured strategy.

Candidates, best first:

1. an exact embedding: for a chain model a long path of the coupling graph found by a
   Warnsdorff walk; otherwise a subgraph monomorphism of the interaction graph (variables joined
   when they share a term) into the coupling graph, found with VF2 (Cordella, Foggia, Sansone
   & Vento 2004; rustworkx's implementation, with a call limit so it cannot run away);
2. seeded greedy placements polished by local search, minimising the total Steiner cost of
   the terms (:mod:`toposcout.compiler.synthesis.steiner`): grow from a central qubit, always placing
   the unplaced variable most tied to the placed ones on the free qubit that adds least
   cost; then move or swap single variables while that lowers the total.
"""

from __future__ import annotations

import random
from typing import Sequence

import networkx as nx
import rustworkx as rx

from toposcout.compiler.synthesis.steiner import SteinerCost, Weights, WeightedSteinerCost, all_pairs_distances

__all__ = ["interaction_graph", "exact_embedding", "path_embedding", "placement_cost", "search_placement",
           "candidate_placements", "region_placements"]


def interaction_graph(supports: Sequence[Sequence[int]], n: int) -> nx.Graph:
    """Variables 0..n-1, an edge between two variables that share a term (weight = count)."""
    g = nx.Graph()
    g.add_nodes_from(range(n))
    for s in supports:
        s = sorted(set(s))
        for i, a in enumerate(s):
            for b in s[i + 1:]:
                w = g.get_edge_data(a, b, {"weight": 0})["weight"]
                g.add_edge(a, b, weight=w + 1)
    return g


def exact_embedding(inter: nx.Graph, coupling: nx.Graph, *, call_limit: int = 200_000) -> list[int] | None:
    """Variable -> qubit such that every interaction edge is a coupling edge, or None."""
    n = inter.number_of_nodes()
    if inter.number_of_edges() > coupling.number_of_edges() or n > coupling.number_of_nodes():
        return None
    big = rx.PyGraph()
    cnodes = sorted(coupling.nodes)
    big.add_nodes_from(cnodes)
    cidx = {q: i for i, q in enumerate(cnodes)}
    big.add_edges_from_no_data([(cidx[a], cidx[b]) for a, b in coupling.edges])
    small = rx.PyGraph()
    small.add_nodes_from(range(n))
    small.add_edges_from_no_data(list(inter.edges))
    try:
        it = rx.vf2_mapping(big, small, subgraph=True, induced=False, call_limit=call_limit)
        mapping = next(iter(it), None)
    except Exception:  # rustworkx raises when the call limit is hit on some versions
        mapping = None
    if mapping is None:
        return None
    out = [0] * n
    for qi, v in mapping.items():
        out[v] = cnodes[qi]
    return out


class _Scorer:
    """Total cost of a placement: Steiner cost of every term (order >= 2) in CNOT counts, or
    with ``weights`` in units of -log(fidelity): twice the weighted Steiner tree of each term
    (couplers weighted -log(1 - e)) plus every variable's qubit cost (a pseudo-term of one
    variable), so a search over placements minimises an estimate of -log(ESP)."""

    def __init__(self, supports: Sequence[Sequence[int]], coupling: nx.Graph, n: int,
                 weights: Weights | None = None):
        self.nodes = sorted(coupling.nodes)
        self.index = {q: i for i, q in enumerate(self.nodes)}
        adj = [[self.index[v] for v in coupling[q]] for q in self.nodes]
        self.adj = adj
        self.dist = all_pairs_distances(adj)  # hops: the search's neighbourhoods
        self.weights = weights
        if weights is None:
            self.cost = SteinerCost(self.dist)
            self.qubit_cost = None
        else:
            nodes = self.nodes
            self.cost = WeightedSteinerCost(adj, lambda i, j: weights.of_edge(nodes[i], nodes[j]))
            self.qubit_cost = [weights.of_qubit(q) for q in nodes]
        self.supports = [tuple(sorted(set(s))) for s in supports if len(set(s)) >= 2]
        if weights is not None:
            self.supports += [(v,) for v in range(n)]
        self.by_var: list[list[int]] = [[] for _ in range(n)]
        for k, s in enumerate(self.supports):
            for v in s:
                self.by_var[v].append(k)

    def term(self, k: int, pos: list[int]) -> float:
        s = self.supports[k]
        if len(s) == 1:
            p = pos[s[0]]
            return self.qubit_cost[p] if p >= 0 else 0.0
        m = 0
        for v in s:
            if pos[v] >= 0:
                m |= 1 << pos[v]
        return self.cost(m)

    def total(self, pos: list[int]) -> int:
        return sum(self.term(k, pos) for k in range(len(self.supports)))


def placement_cost(supports: Sequence[Sequence[int]], coupling: nx.Graph, placement: Sequence[int],
                   weights: Weights | None = None) -> float:
    """Total Steiner cost of the terms (order >= 2) under ``placement`` (weighted: see ``_Scorer``)."""
    sc = _Scorer(supports, coupling, len(placement), weights)
    return sc.total([sc.index[p] for p in placement])


def search_placement(supports: Sequence[Sequence[int]], coupling: nx.Graph, n: int, *, seed: int = 0,
                     sweeps: int = 4, scorer: _Scorer | None = None,
                     start: Sequence[int] | None = None, first_qubit: int | None = None) -> list[int]:
    """A greedy placement (or ``start``) improved by local search; deterministic per seed.

    first_qubit: default None (a central qubit): the physical qubit the greedy grows from."""
    sc = scorer or _Scorer(supports, coupling, n)
    rng = random.Random(seed)
    N = len(sc.nodes)
    dist = sc.dist
    inter = interaction_graph(sc.supports, n)
    if start is not None:
        pos = [sc.index[p] for p in start]
    else:
        pos = [-1] * n
        free = set(range(N))
        ecc = [max(row) for row in dist]
        centre_val = min(ecc)
        centres = [q for q in range(N) if ecc[q] == centre_val]
        first_q = centres[rng.randrange(len(centres))] if seed else centres[0]
        if first_qubit is not None:
            first_q = sc.index[first_qubit]
        degs = sorted(range(n), key=lambda v: (-inter.degree(v, weight="weight"), v))
        first_v = degs[0] if seed == 0 else degs[rng.randrange(min(len(degs), 3))]
        pos[first_v] = first_q
        free.discard(first_q)
        placed = {first_v}
        while len(placed) < n:
            tie = {}
            for v in range(n):
                if pos[v] < 0:
                    tie[v] = sum(d["weight"] for u, d in inter[v].items() if u in placed)
            top = max(tie.values())
            cands = sorted(v for v, t in tie.items() if t == top)
            v = cands[rng.randrange(len(cands))] if seed else cands[0]
            if top == 0:
                # a new component: put it next to what is placed
                near = min(free, key=lambda q: (min(dist[q][pos[u]] for u in placed), q))
                pos[v] = near
            else:
                best = None
                # candidate qubits: free qubits within distance 2 of a placed neighbour
                nb = [pos[u] for u in inter[v] if u in placed]
                cand = {q for q in free if min(dist[q][p] for p in nb) <= 2} or free
                for q in sorted(cand):
                    pos[v] = q
                    c = sum(sc.term(k, pos) for k in sc.by_var[v])
                    c2 = sum(dist[q][p] for p in nb)
                    # Warnsdorff's rule: prefer qubits with few free neighbours, which keeps
                    # the placed set compact and avoids growing into dead ends
                    c3 = sum(1 for u in sc.adj[q] if u in free)
                    key = (c, c2, c3, rng.random() if seed else 0.0, q)
                    if best is None or key < best[0]:
                        best = (key, q)
                pos[v] = best[1]
            free.discard(pos[v])
            placed.add(v)
    # local search: move a variable to a free qubit or swap two variables
    for _ in range(sweeps):
        improved = False
        order = list(range(n))
        rng.shuffle(order)
        occupied = {p: v for v, p in enumerate(pos)}
        for v in order:
            here = pos[v]
            base_v = sum(sc.term(k, pos) for k in sc.by_var[v])
            near = [q for q in range(N) if 0 < dist[here][q] <= 2]
            best = (0, None)
            for q in near:
                u = occupied.get(q)
                if u is None:
                    pos[v] = q
                    d = sum(sc.term(k, pos) for k in sc.by_var[v]) - base_v
                    pos[v] = here
                else:
                    ks = set(sc.by_var[v]) | set(sc.by_var[u])
                    before = sum(sc.term(k, pos) for k in ks)
                    pos[v], pos[u] = q, here
                    d = sum(sc.term(k, pos) for k in ks) - before
                    pos[v], pos[u] = here, q
                if d < best[0]:
                    best = (d, q)
            if best[1] is not None:
                q = best[1]
                u = occupied.get(q)
                if u is None:
                    del occupied[here]
                    pos[v] = q
                    occupied[q] = v
                else:
                    pos[v], pos[u] = q, here
                    occupied[q], occupied[here] = v, u
                improved = True
        if not improved:
            break
    return [sc.nodes[p] for p in pos]


def path_embedding(inter: nx.Graph, coupling: nx.Graph, *, tries: int = 200) -> list[int] | None:
    """For an interaction graph that is a simple path: a simple path of the same length in the
    coupling graph, found by Warnsdorff-rule walks (always step to the unvisited neighbour
    with the fewest unvisited neighbours) from the lowest-degree qubits; None otherwise."""
    n = inter.number_of_nodes()
    if n < 2 or inter.number_of_edges() != n - 1 or max(d for _, d in inter.degree) > 2 \
            or not nx.is_connected(inter):
        return None
    ends = [v for v, d in inter.degree if d == 1]
    order = [ends[0]]
    prev = None
    while len(order) < n:
        nxt = next(u for u in inter[order[-1]] if u != prev)
        prev = order[-1]
        order.append(nxt)
    rng = random.Random(0)
    starts = sorted(coupling.nodes, key=lambda q: (coupling.degree(q), q))
    for attempt in range(tries):
        s0 = starts[attempt % len(starts)]
        walk = [s0]
        seen = {s0}
        while len(walk) < n:
            options = [u for u in coupling[walk[-1]] if u not in seen]
            if not options:
                break
            u = min(options, key=lambda x: (sum(1 for y in coupling[x] if y not in seen),
                                            rng.random() if attempt else x))
            walk.append(u)
            seen.add(u)
        if len(walk) == n:
            out = [0] * n
            for v, q in zip(order, walk):
                out[v] = q
            return out
    return None


def candidate_placements(supports: Sequence[Sequence[int]], coupling: nx.Graph, n: int, *, seed: int = 0,
                         count: int = 3, weights: Weights | None = None) -> list[tuple[str, list[int]]]:
    """Up to ``count`` distinct placements, the cheapest (by Steiner cost, or with ``weights``
    by the weighted cost of ``_Scorer``) first.

    Each is ``(how, placement)`` with ``how`` one of ``"exact"``, ``"search"``. With weights,
    greedy placements grown from the chip's best qubits (lowest qubit cost plus the cost of
    its couplers) are candidates too.
    """
    sc = _Scorer(supports, coupling, n, weights)
    found: list[tuple[float, str, list[int]]] = []
    seen: set[tuple[int, ...]] = set()
    complete = coupling.number_of_edges() == len(sc.nodes) * (len(sc.nodes) - 1) // 2
    if complete and weights is None:
        p = list(sorted(coupling.nodes)[:n])
        return [("exact", p)]
    inter = interaction_graph(sc.supports, n)
    emb = path_embedding(inter, coupling) or exact_embedding(inter, coupling)
    if emb is not None:
        emb = search_placement(supports, coupling, n, seed=seed, scorer=sc, start=emb)
        seen.add(tuple(emb))
        found.append((sc.total([sc.index[p] for p in emb]), "exact", emb))
    starts: list[int | None] = [None] * count
    if weights is not None:
        quality = sorted(sc.nodes, key=lambda q: (weights.of_qubit(q) + sum(weights.of_edge(q, u) for u in coupling[q])
                                                  / max(1, coupling.degree(q)), q))
        starts += quality[:count]
    for s, first in enumerate(starts):
        p = search_placement(supports, coupling, n, seed=seed * 1000 + s, scorer=sc, first_qubit=first)
        if tuple(p) not in seen:
            seen.add(tuple(p))
            found.append((sc.total([sc.index[q] for q in p]), "search", p))
    if weights is not None:  # greedy placements grown all over the chip: the weighted cost is not local
        for p in region_placements(supports, coupling, n, 4 * count, weights=weights, seed=seed, scorer=sc):
            if tuple(p) not in seen:
                seen.add(tuple(p))
                found.append((sc.total([sc.index[q] for q in p]), "search", p))
    found.sort(key=lambda x: x[0])
    return [(how, p) for _, how, p in found[:count]]


def region_placements(supports: Sequence[Sequence[int]], coupling: nx.Graph, n: int, k: int, *,
                      weights: Weights | None = None, seed: int = 0, scorer: _Scorer | None = None
                      ) -> list[list[int]]:
    """Up to ``k`` placements on different regions of the chip: greedy placements grown from
    start qubits spread over the chip by farthest-point order (the next start is the qubit
    farthest in hops from every start so far), each polished by a short local search; two
    placements on the same set of qubits count once."""
    sc = scorer or _Scorer(supports, coupling, n, weights)
    N = len(sc.nodes)
    order = [min(range(N), key=lambda q: (max(sc.dist[q]), q))]
    near = list(sc.dist[order[0]])
    while len(order) < N:
        q = max(range(N), key=lambda x: (near[x], -x))
        order.append(q)
        near = [min(a, b) for a, b in zip(near, sc.dist[q])]
    out: list[list[int]] = []
    sets: set[frozenset[int]] = set()
    for q in order:
        if len(out) >= k:
            break
        p = search_placement(supports, coupling, n, seed=seed, scorer=sc, first_qubit=sc.nodes[q], sweeps=2)
        key = frozenset(p)
        if key not in sets:
            sets.add(key)
            out.append(p)
    return out
