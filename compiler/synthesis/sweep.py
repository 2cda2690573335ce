"""Clique sweep: gather each clique's variables with SWAPs, then synthesise its terms locally.

The global greedy of :mod:`toposcout.compiler.synthesis.parity` moves parities, and moving a parity one
hop costs CNOTs for that parity alone. On large sparse graphs it is cheaper to move the
variables themselves: a SWAP (three CNOTs, two when one side holds a relay's ``|0>``, none
when both do) moves everything a wire holds. This module walks through the model's cliques
(the maximal term supports) one at a time, in the spirit of the swap networks of O'Gorman,
Huggins, Rieffel & Whaley, "Generalized swap networks for near-term quantum computing",
2019, but without undoing anything: between cliques the wires always hold plain variables
(the linear map is a permutation), so the next clique starts from wherever the previous one
left its variables.

For each clique, chosen greedily as the one whose variables are currently cheapest to join
(Steiner cost, :mod:`toposcout.compiler.synthesis.steiner`):

1. gather: SWAPs along coupling edges until the variables' Steiner tree has at most
   ``|C| + slack`` nodes (each step is the SWAP that lowers the clique's Steiner cost most,
   else one step of the two nearest separated members towards each other);
2. synthesise its terms not yet done on the tree's wires alone with the greedy parity
   network (best of a few seeds; the tree is small, so this is cheap), which ends in a
   permutation of those wires.
"""

from __future__ import annotations

from collections import deque
from typing import Sequence

from toposcout.compiler.synthesis.parity import ZZ_MODES, ParityNetwork, fuse_zz, synthesize_parities
from toposcout.compiler.synthesis.steiner import SteinerCost, all_pairs_distances, steiner_tree

__all__ = ["maximal_supports", "sweep_parities"]


def maximal_supports(supports: Sequence[Sequence[int]]) -> list[tuple[int, ...]]:
    """The supports (order >= 2) not contained in another, sorted, without repeats."""
    sets = sorted({frozenset(s) for s in supports if len(set(s)) >= 2}, key=lambda s: (-len(s), sorted(s)))
    out: list[frozenset] = []
    for s in sets:
        if not any(s <= t for t in out):
            out.append(s)
    return sorted(tuple(sorted(s)) for s in out)


def group_supports(cliques: Sequence[Sequence[int]], size: int) -> list[tuple[int, ...]]:
    """Merge cliques into units of at most ``size`` variables, most-overlapping pairs first.

    Deterministic: ties go to the lexicographically smallest pair of units.
    """
    units = [frozenset(c) for c in cliques]
    while True:
        best = None
        for i in range(len(units)):
            for j in range(i + 1, len(units)):
                u = units[i] | units[j]
                if len(u) > size:
                    continue
                key = (-len(units[i] & units[j]), len(u), i, j)
                if key[0] < 0 and (best is None or key < best):
                    best = key
        if best is None:
            return sorted(tuple(sorted(u)) for u in units)
        _, _, i, j = best
        merged = units[i] | units[j]
        units = [u for k, u in enumerate(units) if k not in (i, j)] + [merged]


def _parts(adj: list[list[int]], ws: set[int]) -> dict[int, int]:
    """Component label of each wire of ``ws`` in the subgraph ``ws`` induces."""
    part: dict[int, int] = {}
    for w in sorted(ws):
        if w in part:
            continue
        part[w] = w
        stack = [w]
        while stack:
            u = stack.pop()
            for v in adj[u]:
                if v in ws and v not in part:
                    part[v] = w
                    stack.append(v)
    return part


def _path(adj: list[list[int]], a: int, b: int) -> list[int]:
    prev = {a: None}
    q = deque([a])
    while q:
        u = q.popleft()
        if u == b:
            break
        for v in adj[u]:
            if v not in prev:
                prev[v] = u
                q.append(v)
    out = [b]
    while out[-1] != a:
        out.append(prev[out[-1]])
    return out[::-1]


def sweep_parities(
    parities: dict[frozenset, float],
    adj: list[list[int]],
    start: Sequence[int],
    *,
    cost: SteinerCost,
    slack: int = 0,
    seeds: Sequence[int] = (0, 1, 2),
    lams: Sequence[float] = (0.25, 1.0),
    native_zz: bool = False,
    group: int = 0,
) -> tuple[list[tuple], list[int]]:
    """Gates over wires and the variables' final wires.

    parities: variable set -> rz angle (sets of size >= 2; single variables are handled by
        the caller or passed here too, then applied at the start).
    adj: adjacency lists of the region's wires (connected).
    start: variable i -> wire at the start. Wires holding no variable hold ``|0>``.
    native_zz: passed to :func:`toposcout.compiler.synthesis.parity.synthesize_parities`.
    group: default 0 (one clique at a time); else overlapping cliques are merged into units
        of up to ``group`` variables (:func:`group_supports`), gathered and synthesised together,
        so that the local greedy can share CNOTs between them.
    Returns ``(gates, final)``: gates ``("cx", c, t)`` / ``("rz", w, angle)`` /
    ``("zz", a, b, angle)``; ``final[i]``
    the wire of variable i at the end.
    """
    n_w = len(adj)
    at = list(start)
    who: list[int | None] = [None] * n_w
    for v, w in enumerate(at):
        who[w] = v
    gates: list[tuple] = []
    todo = dict(parities)
    for s in [s for s in todo if len(s) == 1]:
        (v,) = tuple(s)
        gates.append(("rz", at[v], todo.pop(s)))
    cliques = maximal_supports([tuple(s) for s in todo])
    if group:
        cliques = group_supports(cliques, group)
    cliques = [frozenset(c) for c in cliques]
    dist = cost.dist

    def swap(a: int, b: int) -> None:
        va, vb = who[a], who[b]
        if va is not None and vb is not None:
            gates.extend((("cx", a, b), ("cx", b, a), ("cx", a, b)))
        elif va is not None:  # b holds |0>: two CNOTs move the value over
            gates.extend((("cx", a, b), ("cx", b, a)))
        elif vb is not None:
            gates.extend((("cx", b, a), ("cx", a, b)))
        who[a], who[b] = vb, va
        if va is not None:
            at[va] = b
        if vb is not None:
            at[vb] = a

    def mask_of(c: frozenset) -> int:
        m = 0
        for v in c:
            m |= 1 << at[v]
        return m

    def tree_nodes(c: frozenset) -> list[int]:
        ws = {at[v] for v in c}
        root = min(ws)
        return sorted(steiner_tree(adj, set(range(n_w)), root, ws))

    while cliques:
        mine = {k: c for k, c in enumerate(cliques) if any(s <= c for s in todo)}
        if not mine:
            break
        k = min(mine, key=lambda j: (cost(mask_of(cliques[j])), j))
        c = cliques.pop(k)
        # 1. gather
        steps = 0
        centre_var = None
        while True:
            nodes = tree_nodes(c)
            if len(nodes) <= len(c) + slack:
                break
            ws = sorted(at[v] for v in c)
            part = _parts(adj, set(ws))
            steps += 1
            if steps <= 2 * n_w:
                # a SWAP that lowers the clique's Steiner cost, else the closest two members
                # in different parts of the induced subgraph one hop towards each other; the
                # two can undo each other, hence the step limit
                here = cost(mask_of(c))
                best = None
                for v in sorted(c):
                    a = at[v]
                    for b in adj[a]:
                        if who[b] is not None and who[b] in c:
                            continue
                        m = mask_of(c) ^ (1 << a) ^ (1 << b)
                        key = (cost(m), a, b)
                        if key[0] < here and (best is None or key < best):
                            best = key
                if best is not None:
                    swap(best[1], best[2])
                    continue
                pair = min(((dist[x][y], x, y) for i, x in enumerate(ws) for y in ws[i + 1:] if part[x] != part[y]),
                           default=None)
                if pair is None:
                    break
                p = _path(adj, pair[1], pair[2])
                swap(p[0], p[1])
                continue
            # past the limit, growth steps, which terminate: the part holding a fixed central
            # member (it never moves) grows by the nearest other member, moved one hop at a
            # time along a shortest path (whose inside holds no member, as it is the nearest)
            if centre_var is None:
                centre_var = who[min(ws, key=lambda x: (sum(dist[x][y] for y in ws), x))]
            centre = at[centre_var]
            core = [w for w in ws if part[w] == part[centre]]
            pair = min(((dist[x][y], x, y) for x in ws if part[x] != part[centre] for y in core), default=None)
            if pair is None:
                break
            p = _path(adj, pair[1], pair[2])
            swap(p[0], p[1])
        # 2. local synthesis on the tree's wires
        local = {w: i for i, w in enumerate(nodes)}
        ladj = [[local[u] for u in adj[w] if u in local] for w in nodes]
        lcost = SteinerCost(all_pairs_distances(ladj))
        mine_terms = sorted((s for s in todo if s <= c), key=lambda s: (len(s), sorted(s)))
        ps = []
        for s in mine_terms:
            m = 0
            for v in s:
                m |= 1 << local[at[v]]
            ps.append((m, todo.pop(s)))
        ps.sort()
        net = None
        for lam in lams:
            for sd in seeds:
                for zz in ZZ_MODES if native_zz else (False,):
                    cand = synthesize_parities(ps, ladj, cost=lcost, lam=lam, seed=sd, native_zz=zz)
                    if native_zz:
                        cand = ParityNetwork(tuple(fuse_zz(cand.gates)), cand.final)
                    if net is None or cand.two_qubit < net.two_qubit:
                        net = cand
        for g in net.gates:
            if g[0] == "cx":
                gates.append(("cx", nodes[g[1]], nodes[g[2]]))
            elif g[0] == "zz":
                gates.append(("zz", nodes[g[1]], nodes[g[2]], g[3]))
            else:
                gates.append(("rz", nodes[g[1]], g[2]))
        # net.final[w] = local wire whose start value ends on w
        old = [who[w] for w in nodes]
        for i, w in enumerate(nodes):
            v = old[net.final[i]]
            who[w] = v
            if v is not None:
                at[v] = w
    return gates, at
