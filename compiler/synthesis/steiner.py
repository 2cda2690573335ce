"""Distances and Steiner-tree estimates on a coupling graph.

A set ``S`` of wires holding parts of one parity can be folded onto a single wire along a
tree that spans ``S``; every tree edge costs one CNOT and every tree node outside ``S`` (a
Steiner node) one more, to cancel its own value (Kissinger & Meijer-van de Griend, "CNOT
circuit extraction for topologically-constrained quantum memories", 2020, sec. 4). We
estimate the tree by the minimum spanning tree of the metric closure (a 2-approximation of
the Steiner tree; Kou, Markowsky & Berman 1981) and count its nodes as if the closure's
paths were disjoint: ``cost(S) = 2 * mst(S) + 1 - |S|``. The estimate is 0 exactly when
``|S| == 1`` and is always at least ``|S| - 1``.
"""

from __future__ import annotations

from collections import deque

__all__ = ["all_pairs_distances", "SteinerCost", "steiner_tree", "set_bits", "Weights", "weighted_distances",
           "WeightedSteinerCost", "kmb_steiner_tree"]


def all_pairs_distances(adj: list[list[int]]) -> list[list[int]]:
    """Hop distances between all wires of a connected graph given as adjacency lists."""
    n = len(adj)
    out = []
    for s in range(n):
        d = [-1] * n
        d[s] = 0
        q = deque([s])
        while q:
            u = q.popleft()
            for v in adj[u]:
                if d[v] < 0:
                    d[v] = d[u] + 1
                    q.append(v)
        if min(d) < 0:
            raise ValueError("the graph is not connected")
        out.append(d)
    return out


class SteinerCost:
    """Memoised ``cost(mask)`` for bitmasks over wires (see the module docstring)."""

    def __init__(self, dist: list[list[int]]):
        self.dist = dist
        self.memo: dict[int, int] = {}

    def __call__(self, mask: int) -> int:
        c = self.memo.get(mask)
        if c is not None:
            return c
        c = self._compute(mask)
        self.memo[mask] = c
        return c

    def mst(self, mask: int) -> int:
        bits = set_bits(mask)
        k = len(bits)
        if k <= 1:
            return 0
        dist = self.dist
        if k == 2:
            return dist[bits[0]][bits[1]]
        # Prim's algorithm on the metric closure.
        best = [dist[bits[0]][b] for b in bits]
        used = [False] * k
        used[0] = True
        total = 0
        for _ in range(k - 1):
            j = -1
            bj = 1 << 30
            for i in range(k):
                if not used[i] and best[i] < bj:
                    bj = best[i]
                    j = i
            used[j] = True
            total += bj
            row = dist[bits[j]]
            for i in range(k):
                if not used[i]:
                    d = row[bits[i]]
                    if d < best[i]:
                        best[i] = d
        return total

    def _compute(self, mask: int) -> int:
        k = mask.bit_count()
        if k <= 1:
            return 0
        return 2 * self.mst(mask) + 1 - k


def set_bits(mask: int) -> list[int]:
    """Indices of the set bits of ``mask``, lowest first."""
    out = []
    while mask:
        low = mask & -mask
        out.append(low.bit_length() - 1)
        mask ^= low
    return out


def steiner_tree(adj: list[list[int]], allowed: set[int], root: int, terminals: set[int]
                 ) -> dict[int, int | None]:
    """A tree in the subgraph induced by ``allowed`` spanning ``terminals`` and ``root``.

    Shortest-path heuristic (Takahashi & Matsumoto 1980): grow the tree from the root by
    attaching the nearest terminal through a shortest path. Returns parent pointers
    (``root`` maps to None). Every leaf of the tree is a terminal.
    """
    parent: dict[int, int | None] = {root: None}
    todo = set(terminals) - {root}
    while todo:
        # multi-source BFS from the current tree
        prev: dict[int, int | None] = {v: None for v in parent}
        q = deque(parent)
        hit = None
        while q and hit is None:
            u = q.popleft()
            for v in adj[u]:
                if v in allowed and v not in prev:
                    prev[v] = u
                    if v in todo:
                        hit = v
                        break
                    q.append(v)
        if hit is None:
            raise ValueError("terminals are not connected within the allowed wires")
        v = hit
        path = []
        while v not in parent:
            path.append(v)
            v = prev[v]
        # v is on the tree; attach the path
        for node in reversed(path):
            parent[node] = v
            v = node
        todo -= set(path)
    return parent


# --- weighted costs: couplers weighted by -log(1 - e) -----------------------------------------
class Weights:
    """Per-element costs of a chip in units of -log(fidelity): ``edge[(a, b)]`` (a < b) for one
    two-qubit gate on the coupler, ``qubit[q]`` for holding one variable on qubit ``q`` (its
    readout, one-qubit gates and idling). Missing entries cost ``default_edge`` / 0."""

    def __init__(self, edge: dict[tuple[int, int], float], qubit: dict[int, float] | None = None,
                 default_edge: float = 1.0):
        self.edge = {(min(a, b), max(a, b)): float(w) for (a, b), w in edge.items()}
        self.qubit = dict(qubit or {})
        self.default_edge = float(default_edge)

    def of_edge(self, a: int, b: int) -> float:
        return self.edge.get((min(a, b), max(a, b)), self.default_edge)

    def of_qubit(self, q: int) -> float:
        return self.qubit.get(q, 0.0)


def weighted_distances(adj: list[list[int]], weight) -> tuple[list[list[float]], list[list[int]]]:
    """All-pairs shortest weighted distances and predecessors (Dijkstra; ``weight(i, j)`` > 0).

    ``pred[s][v]`` is the node before ``v`` on a shortest path from ``s`` (-1 for ``v == s``)."""
    import numpy as np
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import dijkstra

    n = len(adj)
    rows, cols, vals = [], [], []
    for i, nb in enumerate(adj):
        for j in nb:
            rows.append(i)
            cols.append(j)
            vals.append(max(float(weight(i, j)), 1e-12))
    m = csr_matrix((np.array(vals), (np.array(rows), np.array(cols))), shape=(n, n))
    dist, pred = dijkstra(m, directed=False, return_predecessors=True)
    if not np.all(np.isfinite(dist)):
        raise ValueError("the graph is not connected")
    return dist.tolist(), pred.tolist()


class WeightedSteinerCost:
    """``cost(mask)`` = 2 x the weight of a Steiner tree spanning the wires of ``mask``: the
    tree of Kou, Markowsky & Berman (Acta Informatica 15, 141-145 (1981)), within twice the
    optimum: minimum spanning tree of the metric closure, each of its edges expanded into a
    shortest path, the minimum spanning tree of that subgraph, non-terminal leaves pruned.
    A term's CNOT ladder crosses every tree edge about twice, hence the factor 2."""

    def __init__(self, adj: list[list[int]], weight):
        self.adj = adj
        self.weight = weight
        self.dist, self.pred = weighted_distances(adj, weight)
        self.memo: dict[int, float] = {}

    def __call__(self, mask: int) -> float:
        c = self.memo.get(mask)
        if c is None:
            c = 2.0 * sum(self.weight(a, b) for a, b in self.tree(mask))
            self.memo[mask] = c
        return c

    def _path(self, s: int, t: int) -> list[tuple[int, int]]:
        out = []
        v = t
        while v != s:
            u = self.pred[s][v]
            out.append((min(u, v), max(u, v)))
            v = u
        return out

    def tree(self, mask: int) -> list[tuple[int, int]]:
        """The edges (wire pairs) of the tree spanning ``mask``."""
        bits = set_bits(mask)
        if len(bits) <= 1:
            return []
        if len(bits) == 2:
            return self._path(bits[0], bits[1])
        # 1-2: MST of the metric closure (Prim) and its paths
        k = len(bits)
        best = [self.dist[bits[0]][b] for b in bits]
        frm = [0] * k
        used = [False] * k
        used[0] = True
        sub: set[tuple[int, int]] = set()
        for _ in range(k - 1):
            j = min((i for i in range(k) if not used[i]), key=lambda i: (best[i], i))
            used[j] = True
            sub.update(self._path(bits[frm[j]], bits[j]))
            for i in range(k):
                if not used[i] and self.dist[bits[j]][bits[i]] < best[i]:
                    best[i] = self.dist[bits[j]][bits[i]]
                    frm[i] = j
        # 3: MST of the union of paths (Kruskal)
        parent: dict[int, int] = {}

        def find(x):
            while parent.setdefault(x, x) != x:
                parent[x] = parent[parent[x]]
                x = parent[x]
            return x

        tree = []
        for a, b in sorted(sub, key=lambda e: (self.weight(*e), e)):
            ra, rb = find(a), find(b)
            if ra != rb:
                parent[ra] = rb
                tree.append((a, b))
        # 4: prune leaves that are not terminals
        terms = set(bits)
        while True:
            deg: dict[int, int] = {}
            for a, b in tree:
                deg[a] = deg.get(a, 0) + 1
                deg[b] = deg.get(b, 0) + 1
            leaves = {v for v, d in deg.items() if d == 1 and v not in terms}
            if not leaves:
                return tree
            tree = [e for e in tree if e[0] not in leaves and e[1] not in leaves]


def kmb_steiner_tree(graph, terminals, weight: str = "weight"):
    """The weighted Steiner tree the placement uses, on a networkx graph (edge attribute
    ``weight``, default 1): a networkx Graph of the tree's edges with their weights."""
    import networkx as nx

    nodes = sorted(graph.nodes)
    index = {q: i for i, q in enumerate(nodes)}
    adj = [[index[v] for v in graph[q]] for q in nodes]
    w = lambda i, j: graph[nodes[i]][nodes[j]].get(weight, 1.0)  # noqa: E731
    sc = WeightedSteinerCost(adj, w)
    mask = 0
    for t in terminals:
        mask |= 1 << index[t]
    out = nx.Graph()
    out.add_nodes_from(terminals)
    for a, b in sc.tree(mask):
        out.add_edge(nodes[a], nodes[b], **{weight: w(a, b)})
    return out
