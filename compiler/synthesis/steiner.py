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

__all__ = ["all_pairs_distances", "SteinerCost", "steiner_tree", "set_bits"]


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
