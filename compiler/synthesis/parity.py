"""Architecture-aware synthesis of a diagonal block exp(-i Σ θ_S Z_S) as CNOTs and RZs.

Every Z-string commutes with every other, so the block is a phase polynomial: it is
realised by a CNOT network during which each parity ``⊕_{q∈S} x_q`` appears on some wire,
where ``rz(2θ_S)`` is applied (Amy, Azimzadeh & Mosca, "On the CNOT-complexity of CNOT-phase
circuits", 2018). The network may end in any permutation of the wires, which is carried
into the rest of the circuit.

Representation. Let ``A`` be the current linear map (row ``w`` = the parity wire ``w``
holds, over the wires' values at the start of the block). A wanted parity ``y`` is tracked
by its coordinates ``z = y A^{-1}``: the set of wires whose current values XOR to ``y``. It
is on a wire exactly when ``|z| = 1``. A CNOT ``c -> t`` maps every ``z`` with bit ``t`` set
to ``z ^ {c}`` (``A' = E A`` so ``z' = z E``). The map is a permutation exactly when every
unit vector's ``z`` (a row of ``A^{-1}``) has one bit.

Search. Greedy descent on the total Steiner cost (:mod:`toposcout.compiler.synthesis.steiner`) of the
parities not yet produced, plus ``lam`` times the cost of the rows of ``A^{-1}`` (how far the
map is from a permutation), in the spirit of the cost-driven algorithms of Vandaele,
Martiel, Perdrix & Vuillot, "Phase polynomials synthesis algorithms for NISQ architectures
and beyond", 2022. When no CNOT lowers the total, the cheapest parity is forced: there is
always a CNOT on an edge that lowers its own cost by one (merge a leaf of its spanning tree
into its neighbour, or move the leaf one hop along a shortest path), so the loop ends. The
map is finally brought to a permutation by greedy descent on the ``A^{-1}`` cost, then by
:func:`toposcout.compiler.synthesis.linear.peel_to_permutation`.
"""

from __future__ import annotations

import random
from dataclasses import dataclass
from typing import Sequence

from toposcout.compiler.synthesis.linear import peel_to_permutation
from toposcout.compiler.synthesis.steiner import SteinerCost, set_bits

__all__ = ["ParityNetwork", "synthesize_parities", "invert_rows", "fuse_zz", "ZZ_MODES", "cnot_count",
           "two_qubit_count"]


def cnot_count(gates) -> int:
    """CNOTs in a synthesised gate list."""
    return sum(1 for g in gates if g[0] == "cx")


def two_qubit_count(gates) -> int:
    """CNOTs plus native ZZ gates in a synthesised gate list."""
    return sum(1 for g in gates if g[0] != "rz")


#: on a native-ZZ gate set both networks are tried: the plain CNOT one (then fused by
#: :func:`fuse_zz`) and the one that applies neighbouring-wire parities as ZZ gates at once.
ZZ_MODES = (False, True)


@dataclass(frozen=True)
class ParityNetwork:
    """Gates over wires ``0..n-1``: ``("cx", control, target)``, ``("rz", wire, angle)`` or
    ``("zz", a, b, angle)`` (``exp(-i angle/2 Z_a Z_b)``, only with ``native_zz``).

    ``final[w]`` is the wire whose start value ends on wire ``w`` (a permutation).
    """

    gates: tuple[tuple, ...]
    final: tuple[int, ...]

    @property
    def cnots(self) -> int:
        return cnot_count(self.gates)

    @property
    def two_qubit(self) -> int:
        return two_qubit_count(self.gates)


def invert_rows(rows: list[int]) -> list[int]:
    """Inverse of an invertible GF(2) matrix given as row bitmasks (Gauss-Jordan)."""
    n = len(rows)
    a = list(rows)
    inv = [1 << i for i in range(n)]
    for col in range(n):
        piv = next((r for r in range(col, n) if a[r] >> col & 1), None)
        if piv is None:
            raise ValueError("the matrix is singular")
        a[col], a[piv] = a[piv], a[col]
        inv[col], inv[piv] = inv[piv], inv[col]
        for r in range(n):
            if r != col and a[r] >> col & 1:
                a[r] ^= a[col]
                inv[r] ^= inv[col]
    return inv


def synthesize_parities(
    parities: list[tuple[int, float]],
    adj: list[list[int]],
    *,
    cost: SteinerCost,
    lam: float = 0.5,
    seed: int = 0,
    polish: bool = True,
    eager: bool = True,
    native_zz: bool = False,
) -> ParityNetwork:
    """A CNOT+RZ network on the graph ``adj`` producing every parity with its angle.

    parities: ``(mask, angle)``; ``mask`` is the set of wires (bitmask) whose start values
        XOR to the parity; ``rz(angle)`` is applied when it is on a wire. Masks must be
        non-zero and distinct.
    adj: adjacency lists over wires ``0..n-1`` of a connected graph.
    cost: the Steiner cost estimate for this graph.
    lam: default 0.5; weight of the distance-to-a-permutation term in the greedy cost.
    seed: default 0; breaks ties between equally good CNOTs.
    polish: default True; greedy descent towards a permutation before the exact peeling.
    eager: default True; a CNOT that puts a wanted parity on a wire is always preferred
        (the best such by the greedy score), so that consecutive parities share CNOTs as in a
        Gray-code walk.
    native_zz: default False; when the gate set has a ZZ interaction of any angle, a parity
        that is the XOR of two neighbouring wires' current parities is applied at once as
        one ``zz`` gate (``exp(-i φ/2 Z_a Z_b)`` multiplies by ``exp(∓i φ/2)`` by the XOR of
        the two wires), which leaves the linear map unchanged.
    """
    n = len(adj)
    rng = random.Random(seed)
    edges = [(c, t) for t in range(n) for c in adj[t]]
    gates: list[tuple] = []

    masks: list[int] = []
    angles: list[float] = []
    for m, a in parities:
        if m.bit_count() == 1:
            gates.append(("rz", m.bit_length() - 1, a))
        else:
            masks.append(m)
            angles.append(a)
    # items 0..P-1 are parities, P..P+n-1 the rows of A^{-1}
    P = len(masks)
    z = masks + [1 << w for w in range(n)]
    weight = [1.0] * P + [lam] * n
    alive = [True] * (P + n)
    cur = [cost(m) for m in z]
    on_wire: list[set[int]] = [set() for _ in range(n)]
    for k, m in enumerate(z):
        if alive[k]:
            for w in set_bits(m):
                on_wire[w].add(k)
    left = P

    def zz(k: int) -> None:
        nonlocal left
        a, b = set_bits(z[k])
        gates.append(("zz", a, b, angles[k]))
        alive[k] = False
        on_wire[a].discard(k)
        on_wire[b].discard(k)
        left -= 1

    if native_zz:
        for k in range(P):
            if cur[k] == 1:
                zz(k)

    def apply(c: int, t: int) -> None:
        nonlocal left
        gates.append(("cx", c, t))
        bc = 1 << c
        for k in list(on_wire[t]):
            m = z[k] ^ bc
            z[k] = m
            if m & bc:
                on_wire[c].add(k)
            else:
                on_wire[c].discard(k)
            cur[k] = cost(m)
            if k < P and cur[k] == 0:
                gates.append(("rz", m.bit_length() - 1, angles[k]))
                alive[k] = False
                on_wire[m.bit_length() - 1].discard(k)
                left -= 1
            elif native_zz and k < P and cur[k] == 1:
                zz(k)

    def delta(c: int, t: int) -> float:
        bc = 1 << c
        d = 0.0
        for k in on_wire[t]:
            d += weight[k] * (cost(z[k] ^ bc) - cur[k])
        return d

    def best_moves() -> list[tuple[int, int]]:
        """The edge CNOTs that lower the weighted cost most (ties all kept), or []."""
        best_d = 0.0
        best: list[tuple[int, int]] = []
        for c, t in edges:
            if not on_wire[t]:
                continue
            d = delta(c, t)
            if d < best_d - 1e-12:
                best_d = d
                best = [(c, t)]
            elif best and abs(d - best_d) <= 1e-12:
                best.append((c, t))
        return best

    forced = -1
    while left:
        if forced >= 0 and not alive[forced]:
            forced = -1
        if forced < 0 and eager:
            prod = set()
            for k in range(P):
                if alive[k] and cur[k] == 1:
                    m = z[k]
                    a = m.bit_length() - 1
                    b = (m ^ (1 << a)).bit_length() - 1
                    prod.add((a, b))
                    prod.add((b, a))
            if prod:
                scored = sorted((delta(c, t), c, t) for c, t in prod)
                top = [x for x in scored if x[0] <= scored[0][0] + 1e-12]
                _, c, t = top[rng.randrange(len(top))] if len(top) > 1 else top[0]
                apply(c, t)
                continue
        if forced < 0:
            best = best_moves()
            if best:
                apply(*best[rng.randrange(len(best))] if len(best) > 1 else best[0])
                continue
            low = min(cur[k] for k in range(P) if alive[k])
            pool = [k for k in range(P) if alive[k] and cur[k] == low]
            forced = pool[rng.randrange(len(pool))]
        # forced progress on one parity
        m = z[forced]
        bc_best = None
        for t in set_bits(m):
            for c in adj[t]:
                if cost(m ^ (1 << c)) < cur[forced]:
                    d = delta(c, t)
                    if bc_best is None or d < bc_best[0]:
                        bc_best = (d, c, t)
        if bc_best is None:  # cannot happen for a connected graph (see module docstring)
            raise RuntimeError("no CNOT lowers the cost of the forced parity")
        apply(bc_best[1], bc_best[2])

    # towards a permutation: greedy on the rows of A^{-1} only
    for k in range(P):
        alive[k] = False
    for k in range(P, P + n):
        weight[k] = 1.0
    if polish:
        while True:
            best = best_moves()
            if not best:
                break
            apply(*best[rng.randrange(len(best))] if len(best) > 1 else best[0])
    # z[P + j] is row j of A^{-1}; its inverse has the wires' parities as rows
    rows = invert_rows(z[P:])
    more, final_rows = peel_to_permutation(rows, adj, cost)
    for c, t in more:
        gates.append(("cx", c, t))
    final = tuple(r.bit_length() - 1 for r in final_rows)
    return ParityNetwork(tuple(gates), final)


def fuse_zz(gates: Sequence[tuple]) -> list[tuple]:
    """Replace ``cx(c,t) · rz(t)… · cx(c,t)`` by one ``zz(c, t)``.

    Between the two CNOTs wire ``t`` holds ``x_c ⊕ x_t``, so the RZs on ``t`` there (summed)
    are the phase ``exp(-i φ/2 Z_c Z_t)``; RZs on ``c`` commute with both CNOTs and stay.
    Only CNOT pairs with nothing but RZs on ``c`` and ``t`` between them are fused.
    """
    out = list(gates)
    dead = [False] * len(out)
    for i, g in enumerate(out):
        if dead[i] or g[0] != "cx":
            continue
        c, t = g[1], g[2]
        on_t = []
        for j in range(i + 1, len(out)):
            h = out[j]
            if dead[j]:
                continue
            if h[0] == "rz":
                if h[1] == t:
                    on_t.append(j)
                continue
            touches = {h[1], h[2]} & {c, t}
            if not touches:
                continue
            if h[0] == "cx" and (h[1], h[2]) == (c, t) and on_t:
                out[i] = ("zz", c, t, sum(out[k][2] for k in on_t))
                for k in on_t:
                    dead[k] = True
                dead[j] = True
            break
    return [g for g, d in zip(out, dead) if not d]
