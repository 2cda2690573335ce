"""Bring a linear reversible map to *some* permutation with CNOTs on a coupling graph.

The map is given by its rows: ``rows[w]`` is the parity (bitmask over the original wires'
values) that wire ``w`` holds. A CNOT ``(c, t)`` does ``rows[t] ^= rows[c]``. The result only
has to be a permutation matrix, not the identity, which is cheaper.

The method peels one wire at a time, always a wire whose removal keeps the rest connected
(a non-cut vertex), in the style of Steiner-Gauss elimination (Kissinger & Meijer-van de
Griend, "CNOT circuit extraction for topologically-constrained quantum memories", 2020) with
the row/column split and the free choice of the column of the later RowCol / PermRowCol
variants (Wu et al. 2023; Meijer-van de Griend & Li 2023):

1. column step: make the chosen column ``i`` equal to the unit vector of wire ``w`` among
   the wires not yet peeled (fill the Steiner tree with ones bottom-up, then clear each node
   from its parent, deepest first);
2. row step: make row ``w`` equal to ``e_i`` by adding, along a Steiner tree rooted at ``w``,
   the rows of a subset of the remaining wires whose sum is ``rows[w] ^ e_i``. A Steiner
   node ``s`` contributes nothing: ``s -> parent``, then its children into ``s``, then
   ``s -> parent`` again.

Every CNOT acts on an edge between two wires that are not yet peeled, so the output respects
the graph.
"""

from __future__ import annotations

import networkx as nx

from toposcout.compiler.synthesis.steiner import SteinerCost, steiner_tree

__all__ = ["peel_to_permutation"]


def _solve(rows: list[int], candidates: list[int], target: int) -> set[int]:
    """A subset of ``candidates`` whose rows XOR to ``target`` (GF(2) elimination)."""
    basis: dict[int, tuple[int, int]] = {}  # pivot bit -> (row value, combination mask)
    for k, v in enumerate(candidates):
        val, comb = rows[v], 1 << k
        while val:
            pivot = val.bit_length() - 1
            if pivot in basis:
                bv, bc = basis[pivot]
                val ^= bv
                comb ^= bc
            else:
                basis[pivot] = (val, comb)
                break
    comb = 0
    val = target
    while val:
        pivot = val.bit_length() - 1
        if pivot not in basis:
            raise ValueError("the map is not invertible")
        bv, bc = basis[pivot]
        val ^= bv
        comb ^= bc
    return {candidates[k] for k in range(len(candidates)) if comb >> k & 1}


def _children(parent: dict[int, int | None]) -> dict[int, list[int]]:
    ch: dict[int, list[int]] = {v: [] for v in parent}
    for v, p in parent.items():
        if p is not None:
            ch[p].append(v)
    for v in ch:
        ch[v].sort()
    return ch


def _post_order(root: int, ch: dict[int, list[int]]) -> list[int]:
    out: list[int] = []
    stack = [(root, False)]
    while stack:
        v, done = stack.pop()
        if done:
            out.append(v)
        else:
            stack.append((v, True))
            for c in reversed(ch[v]):
                stack.append((c, False))
    return out


def peel_to_permutation(rows: list[int], adj: list[list[int]], cost: SteinerCost | None = None
                        ) -> tuple[list[tuple[int, int]], list[int]]:
    """CNOTs ``(control, target)`` that turn ``rows`` into a permutation, and the final rows.

    ``adj`` are adjacency lists over wires ``0..len(rows)-1`` (a connected graph); ``cost``
    (optional) scores the candidate columns, by default the hop-count Steiner estimate.
    """
    A = list(rows)
    n = len(A)
    gates: list[tuple[int, int]] = []

    def cx(c: int, t: int) -> None:
        A[t] ^= A[c]
        gates.append((c, t))

    remaining = set(range(n))
    while len(remaining) > 1:
        g = nx.Graph()
        g.add_nodes_from(remaining)
        g.add_edges_from((u, v) for u in remaining for v in adj[u] if v in remaining and u < v)
        cut = set(nx.articulation_points(g))
        best = None
        for w in sorted(remaining - cut):
            weight = A[w].bit_count() - 1
            m = A[w]
            while m:
                low = m & -m
                i = low.bit_length() - 1
                m ^= low
                members = 0
                for v in remaining:
                    if A[v] >> i & 1:
                        members |= 1 << v
                est = (cost(members) if cost is not None else members.bit_count() - 1) + weight
                key = (est, w, i)
                if best is None or key < best:
                    best = key
        _, w, i = best
        bit = 1 << i
        # 1. column step
        terms = {v for v in remaining if A[v] & bit}
        if terms != {w}:
            parent = steiner_tree(adj, remaining, w, terms)
            ch = _children(parent)
            order = _post_order(w, ch)
            for p in order:
                if not A[p] & bit:
                    src = next(c for c in ch[p] if A[c] & bit)
                    cx(src, p)
            for c in order:
                if c != w:
                    cx(parent[c], c)
        # 2. row step
        target = A[w] ^ bit
        if target:
            others = sorted(remaining - {w})
            subset = _solve(A, others, target)
            parent = steiner_tree(adj, remaining, w, subset)
            ch = _children(parent)

            def acc(v: int) -> None:
                p = parent[v]
                if v in subset:
                    for c in ch[v]:
                        acc(c)
                    cx(v, p)
                else:
                    cx(v, p)
                    for c in ch[v]:
                        acc(c)
                    cx(v, p)

            for c in ch[w]:
                acc(c)
        assert A[w] == bit
        remaining.discard(w)
    return gates, A
