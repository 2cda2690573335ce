"""Connectivities (coupling graphs) and gate sets: the hardware side of a target.

The families and gate sets are described in ``topologies/connectivities.toml`` and
``topologies/gate_sets.toml``; the generators are here. Each connectivity is sized to
the smallest instance that fits the model unless a size is given.

Examples:
    >>> make_connectivity("grid", 10).name
    'grid-4x3'
    >>> make_connectivity("heavy-hex", 20).num_qubits      # distance 5: (5·25 − 10 − 1)/2
    57
    >>> make_connectivity("line", 9, size=8)
    Traceback (most recent call last):
    ...
    toposcout.compiler.errors.TargetError: the model has 9 variables but line-8 has 8 qubits; pick a connectivity with at least 9 qubits or let toposcout size it
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass, field, replace
from functools import lru_cache
from pathlib import Path
from typing import Sequence

import networkx as nx
from qiskit.circuit import Delay, Parameter
from qiskit.circuit.library import (
    CXGate,
    CZGate,
    Measure,
    RXGate,
    RXXGate,
    RYGate,
    RZGate,
    RZZGate,
    SXGate,
    XGate,
)
from qiskit.transpiler import CouplingMap, Target

from toposcout.compiler.errors import TargetError

__all__ = [
    "TOPOLOGY_DIR",
    "CONNECTIVITY_FAMILIES",
    "GATE_SETS",
    "Connectivity",
    "GateSet",
    "TWO_QUBIT_GATES",
    "make_connectivity",
    "check_edge_list",
    "parse_connectivity",
    "get_gate_set",
    "build_target",
    "heavy_hex_qubits",
    "connectivity_catalogue",
    "gate_set_catalogue",
]

#: the folder of connectivity, gate-set and profile data files.
TOPOLOGY_DIR = Path(__file__).resolve().parent.parent / "topologies"


@lru_cache(maxsize=None)
def _toml(name: str) -> dict:
    with open(TOPOLOGY_DIR / name, "rb") as fh:
        return tomllib.load(fh)


def connectivity_catalogue() -> dict[str, dict]:
    """The connectivity families with their descriptions (from the data file)."""
    return dict(_toml("connectivities.toml"))


def gate_set_catalogue() -> dict[str, dict]:
    """The gate sets with their descriptions (from the data file)."""
    return dict(_toml("gate_sets.toml"))


CONNECTIVITY_FAMILIES: tuple[str, ...] = tuple(connectivity_catalogue())
GATE_SETS: tuple[str, ...] = tuple(gate_set_catalogue())
#: the families `toposcout compare` uses when none is named.
BUILTIN_FAMILIES: tuple[str, ...] = tuple(f for f in CONNECTIVITY_FAMILIES if f != "custom")


@dataclass(frozen=True)
class Connectivity:
    """An undirected coupling graph on ``num_qubits`` physical qubits."""

    name: str
    family: str
    num_qubits: int
    edges: tuple[tuple[int, int], ...]
    size: str | None = None  # the size argument that rebuilds it (e.g. "3x4", "5")
    #: drawing positions of a custom graph's qubits, from its file (``pos Q X Y`` lines); None: computed
    positions: tuple[tuple[float, float], ...] | None = field(default=None, compare=False)

    def coupling_map(self) -> CouplingMap:
        """A bidirectional qiskit CouplingMap."""
        cm = CouplingMap()
        for q in range(self.num_qubits):
            cm.add_physical_qubit(q)
        for a, b in self.edges:
            cm.add_edge(a, b)
            cm.add_edge(b, a)
        return cm

    def graph(self) -> nx.Graph:
        g = nx.Graph()
        g.add_nodes_from(range(self.num_qubits))
        g.add_edges_from(self.edges)
        return g

    def coords(self) -> list[tuple[float, float]]:
        """Drawing coordinates for each physical qubit: lattice positions (line, ring, grid,
        heavy-hex as its brick-wall lattice with every coupling of unit length), a custom graph's
        positions from its file, else a planar straight-line layout when the graph is planar
        (networkx), and only otherwise a force-directed one."""
        n = self.num_qubits
        if self.positions is not None and len(self.positions) == n:
            return [(float(x), float(y)) for x, y in self.positions]
        if self.family == "heavy-hex":
            pos = _heavy_hex_coords(self)
            if pos is not None:
                return pos
        if self.family == "line":
            return [(float(i), 0.0) for i in range(n)]
        if self.family in ("ring", "all-to-all"):
            return [(math.cos(2 * math.pi * i / n), math.sin(2 * math.pi * i / n)) for i in range(n)]
        if self.family == "grid":
            _, cols = (int(x) for x in self.size.split("x"))
            return [(float(i % cols), -float(i // cols)) for i in range(n)]
        g = self.graph()
        planar, _ = nx.check_planarity(g)
        pos = nx.planar_layout(g) if planar else nx.kamada_kawai_layout(g)
        return [(float(pos[i][0]), float(pos[i][1])) for i in range(n)]

    def to_dict(self) -> dict:
        return {"name": self.name, "family": self.family, "num_qubits": self.num_qubits,
                "edges": [list(e) for e in self.edges], "size": self.size}


def _heavy_hex_coords(conn: "Connectivity") -> list[tuple[float, float]] | None:
    """The heavy-hex lattice drawn as a brick wall: qiskit's ``from_heavy_hex(d)`` numbers the d x d
    data qubits first (row-major); they go on a grid of spacing 2, every other qubit at the mean of
    its placed neighbours (flag qubits between two data qubits, syndrome qubits between two flags).
    None when the result is not a lattice drawing (positions collide or a coupling is not of unit
    length), e.g. if the numbering changes."""
    d = int(conn.size) if conn.size and conn.size.isdigit() else 0
    n = conn.num_qubits
    if d < 3 or d * d > n:
        return None
    nb: dict[int, set[int]] = {i: set() for i in range(n)}
    for a, b in conn.edges:
        nb[a].add(b)
        nb[b].add(a)
    pos = {i: (2.0 * (i % d), -2.0 * (i // d)) for i in range(d * d)}
    for _ in range(4):
        for q in range(n):
            placed = [pos[x] for x in nb[q] if x in pos]
            if q not in pos and len(placed) >= 2:
                pos[q] = (sum(p[0] for p in placed) / len(placed), sum(p[1] for p in placed) / len(placed))
    if len(pos) != n or len(set(pos.values())) != n:
        return None
    if any(abs(math.dist(pos[a], pos[b]) - 1.0) > 1e-9 for a, b in conn.edges):
        return None
    return [pos[i] for i in range(n)]


def heavy_hex_qubits(distance: int) -> int:
    """Qubits of the heavy-hex lattice of odd code distance d: (5d² − 2d − 1)/2.

    Chamberland, Zhu, Yoder, Hertzberg & Cross, "Topological and subsystem codes on
    low-degree graphs with flag qubits", Phys. Rev. X 10, 011022 (2020).
    """
    return (5 * distance * distance - 2 * distance - 1) // 2


def _undirected(edges) -> tuple[tuple[int, int], ...]:
    return tuple(sorted({(min(a, b), max(a, b)) for a, b in edges if a != b}))


def _too_small(n_vars: int, name: str, n_qubits: int) -> TargetError:
    return TargetError(
        f"the model has {n_vars} variables but {name} has {n_qubits} qubits; pick a connectivity with at "
        f"least {n_vars} qubits or let toposcout size it",
        field="connectivity",
    )


def _positive_int(size, family: str) -> int:
    try:
        v = int(size)
    except (TypeError, ValueError):
        raise TargetError(f"{family} size {size!r} is not an integer; "
                          f"{connectivity_catalogue()[family]['size']}", field="connectivity") from None
    if v < 1 or str(v) != str(size).strip():
        raise TargetError(f"{family} size {size!r} must be a positive integer", field="connectivity")
    return v


#: a custom connectivity's name (its row name and its --qasm-dir file name)
NAME_PATTERN = r"[A-Za-z0-9][A-Za-z0-9._-]{0,47}"


def name_from_path(path: str | Path) -> str:
    """A custom connectivity's default name: the file's stem, other characters turned into '-'.

    >>> name_from_path("chips/lab ladder (v2).txt")
    'lab-ladder-v2'
    """
    stem = re.sub(r"[^A-Za-z0-9._-]+", "-", Path(path).stem).strip("-._")[:48]
    return stem or "custom"


def read_edge_list(path: str | Path) -> list[tuple[int, int]]:
    """Read a custom coupling graph: one ``a b`` pair of qubit indices per line."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (FileNotFoundError, IsADirectoryError, UnicodeDecodeError):
        raise TargetError(f"edge-list file {str(p)!r} cannot be read; give the path of a text file with one "
                          f"'a b' pair per line", field="connectivity") from None
    return parse_edge_list(text, str(p))


#: the most edges and the largest qubit index of a custom coupling graph (checked as read)
MAX_CUSTOM_EDGES = 20000
MAX_CUSTOM_QUBIT = 9999


def check_edge_list(edges: Sequence[Sequence[int]], where: str = "edges") -> list[tuple[int, int]]:
    """A custom coupling graph's edges as given, refused (naming the edge) when an edge is a
    self-loop, repeats an earlier edge (in either direction), or names a qubit past
    :data:`MAX_CUSTOM_QUBIT`; at most :data:`MAX_CUSTOM_EDGES` edges.

    >>> check_edge_list([[0, 1], [1, 0]])
    Traceback (most recent call last):
    ...
    toposcout.compiler.errors.TargetError: edges[1]: the edge [1, 0] repeats edges[0] (an edge is undirected); list each coupler once
    """
    if len(edges) > MAX_CUSTOM_EDGES:
        raise TargetError(f"{where}: {len(edges)} edges is over the cap of {MAX_CUSTOM_EDGES} edges of a custom "
                          "coupling graph", field=where)
    first: dict[tuple[int, int], int] = {}
    out = []
    for k, pair in enumerate(edges):
        if len(pair) != 2:
            raise TargetError(f"{where}[{k}]: an edge is two qubit indices [a, b]", field=f"{where}[{k}]")
        a, b = (int(x) for x in pair)
        if a < 0 or b < 0 or a > MAX_CUSTOM_QUBIT or b > MAX_CUSTOM_QUBIT:
            raise TargetError(f"{where}[{k}]: qubit indices must be from 0 to {MAX_CUSTOM_QUBIT}, got [{a}, {b}]",
                              field=f"{where}[{k}]")
        if a == b:
            raise TargetError(f"{where}[{k}]: the edge [{a}, {b}] joins qubit {a} to itself; a coupler joins two "
                              "different qubits", field=f"{where}[{k}]")
        key = (min(a, b), max(a, b))
        if key in first:
            raise TargetError(f"{where}[{k}]: the edge [{a}, {b}] repeats {where}[{first[key]}] (an edge is "
                              "undirected); list each coupler once", field=f"{where}[{k}]")
        first[key] = k
        out.append((a, b))
    return out


def read_positions(path: str | Path) -> list[list[float]] | None:
    """Drawing positions from an edge-list file's ``pos Q X Y`` lines (one per qubit), or None
    when it has none; raises TargetError naming the line of a malformed one."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except (FileNotFoundError, IsADirectoryError, UnicodeDecodeError):
        return None
    found: dict[int, list[float]] = {}
    for lineno, line in enumerate(text.splitlines(), start=1):
        parts = line.split("#", 1)[0].replace(",", " ").split()
        if not parts or parts[0] != "pos":
            continue
        try:
            q, x, y = int(parts[1]), float(parts[2]), float(parts[3])
            if len(parts) != 4 or q < 0 or not (math.isfinite(x) and math.isfinite(y)):
                raise ValueError
        except (ValueError, IndexError):
            raise TargetError(f"{path} line {lineno}: expected 'pos QUBIT X Y', found {line.strip()!r}",
                              field=f"line {lineno}") from None
        found[q] = [x, y]
    if not found:
        return None
    n = max(found) + 1
    missing = [q for q in range(n) if q not in found]
    if missing:
        raise TargetError(f"{path}: positions are given for some qubits but not for {missing[:5]}; give a "
                          "'pos Q X Y' line for every qubit or none", field="connectivity")
    return [found[q] for q in range(n)]


def parse_edge_list(text: str, where: str = "edge list") -> list[tuple[int, int]]:
    edges = []
    first: dict[tuple[int, int], int] = {}
    for lineno, line in enumerate(text.splitlines(), start=1):
        line = line.split("#", 1)[0].strip()
        if not line:
            continue
        parts = line.replace(",", " ").split()
        if parts[0] == "pos":  # a drawing position (read_positions), not an edge
            continue
        if len(parts) != 2 or not all(p.isdigit() for p in parts):
            raise TargetError(f"{where} line {lineno}: expected two qubit indices 'a b', found {line!r}",
                              field=f"line {lineno}")
        a, b = int(parts[0]), int(parts[1])
        if a == b:
            raise TargetError(f"{where} line {lineno}: an edge from qubit {a} to itself", field=f"line {lineno}")
        if len(parts[0]) > 6 or len(parts[1]) > 6 or max(a, b) > MAX_CUSTOM_QUBIT:
            raise TargetError(f"{where} line {lineno}: qubit indices must be from 0 to {MAX_CUSTOM_QUBIT}",
                              field=f"line {lineno}")
        key = (min(a, b), max(a, b))
        if key in first:
            raise TargetError(f"{where} line {lineno}: the edge {a} {b} repeats line {first[key]} (an edge is "
                              "undirected); list each coupler once", field=f"line {lineno}")
        first[key] = lineno
        edges.append((a, b))
        if len(edges) > MAX_CUSTOM_EDGES:
            raise TargetError(f"{where}: more than the cap of {MAX_CUSTOM_EDGES} edges", field=f"line {lineno}")
    if not edges:
        raise TargetError(f"{where} has no edges", field="connectivity")
    return edges


def make_connectivity(
    family: str,
    num_variables: int,
    *,
    size: int | str | Sequence[int] | None = None,
    edges: Sequence[Sequence[int]] | None = None,
    name: str | None = None,
    positions: Sequence[Sequence[float]] | None = None,
) -> Connectivity:
    """The connectivity of ``family`` sized for ``num_variables`` (or to ``size``).

    size: default None: the smallest instance that fits. Line, ring, all-to-all: the
        number of qubits; grid: ``"RxC"``, ``(R, C)`` or one number for a square; heavy-hex:
        the odd code distance.
    edges: the edge list of a ``custom`` connectivity.
    name: a ``custom`` connectivity's row name (:data:`NAME_PATTERN`); default ``custom-Q``.
    """
    n = num_variables
    if family not in CONNECTIVITY_FAMILIES:
        raise TargetError(
            f"unknown connectivity {family!r}; choose one of {', '.join(CONNECTIVITY_FAMILIES)}",
            field="connectivity",
        )
    if family == "line":
        q = n if size is None else _positive_int(size, family)
        c = Connectivity(f"line-{q}", family, q, tuple((i, i + 1) for i in range(q - 1)), str(q))
    elif family == "ring":
        q = max(3, n) if size is None else _positive_int(size, family)
        if q < 3:
            raise TargetError("a ring needs at least 3 qubits", field="connectivity")
        c = Connectivity(f"ring-{q}", family, q, _undirected([(i, (i + 1) % q) for i in range(q)]), str(q))
    elif family == "all-to-all":
        q = n if size is None else _positive_int(size, family)
        c = Connectivity(f"all-to-all-{q}", family, q, tuple((i, j) for i in range(q) for j in range(i + 1, q)), str(q))
    elif family == "grid":
        if size is None:
            r = math.isqrt(n - 1) + 1 if n > 1 else 1
            cols = max(1, math.ceil(n / r))
        else:
            if isinstance(size, (tuple, list)) and len(size) == 2:
                r, cols = (_positive_int(x, family) for x in size)
            elif isinstance(size, str) and "x" in size.lower():
                parts = size.lower().split("x")
                if len(parts) != 2:
                    raise TargetError(f"grid size {size!r}: write rows x columns, e.g. 3x4", field="connectivity")
                r, cols = (_positive_int(x, family) for x in parts)
            else:
                r = cols = _positive_int(size, family)
        edges_g = []
        for i in range(r):
            for j in range(cols):
                q = i * cols + j
                if j + 1 < cols:
                    edges_g.append((q, q + 1))
                if i + 1 < r:
                    edges_g.append((q, q + cols))
        c = Connectivity(f"grid-{r}x{cols}", family, r * cols, _undirected(edges_g), f"{r}x{cols}")
    elif family == "heavy-hex":
        if size is None:
            d = 3
            while heavy_hex_qubits(d) < n:
                d += 2
        else:
            d = _positive_int(size, family)
            if d < 3 or d % 2 == 0:
                raise TargetError(f"heavy-hex distance must be odd and at least 3, got {d}", field="connectivity")
        cm = CouplingMap.from_heavy_hex(d)
        c = Connectivity(f"heavy-hex-{d}", family, cm.size(), _undirected(cm.get_edges()), str(d))
    else:  # custom
        if edges is None:
            raise TargetError("a custom connectivity needs an edge list (custom:FILE)", field="connectivity")
        e = _undirected(check_edge_list(edges))
        q = max(max(p) for p in e) + 1
        g = nx.Graph(e)
        g.add_nodes_from(range(q))
        if not nx.is_connected(g):
            parts = nx.number_connected_components(g)
            raise TargetError(f"the custom coupling graph has {parts} disconnected parts; every qubit must be "
                              f"reachable from every other", field="connectivity")
        if name is not None and not re.fullmatch(NAME_PATTERN, str(name)):
            raise TargetError(f"custom connectivity name {str(name)[:60]!r}: use letters, digits, '.', '_' and '-' "
                              "(at most 48, starting with a letter or digit)", field="connectivity")
        if positions is not None and len(positions) != q:
            raise TargetError(f"the custom coupling graph has {q} qubits but {len(positions)} drawing positions; "
                              "give one position per qubit or none", field="connectivity")
        pos = None if positions is None else tuple((float(x), float(y)) for x, y in positions)
        c = Connectivity(str(name) if name else f"custom-{q}", family, q, e, None, positions=pos)
    if c.num_qubits < n:
        raise _too_small(n, c.name, c.num_qubits)
    return c


def parse_connectivity(spec: str, num_variables: int) -> Connectivity:
    """Read ``FAMILY[:SIZE]`` as written on the command line (``custom:FILE`` for a file)."""
    family, _, size = spec.partition(":")
    family = family.strip()
    if family == "custom":
        if not size:
            raise TargetError("custom needs an edge-list file: custom:PATH", field="connectivity")
        name, eq, path = size.partition("=")
        if eq and re.fullmatch(NAME_PATTERN, name) and path:
            return make_connectivity("custom", num_variables, edges=read_edge_list(path), name=name)
        return make_connectivity("custom", num_variables, edges=read_edge_list(size), name=name_from_path(size))
    return make_connectivity(family, num_variables, size=size or None)


@dataclass(frozen=True)
class GateSet:
    """A native basis: one entangling gate and some single-qubit gates.

    couplers: default () (one two-qubit gate everywhere); else the couplers whose native
        two-qubit gate is not ``two_qubit``, as ``((a, b), gate)`` with a < b, sorted (a device
        file's per-coupler ``native_gate``); see :meth:`with_couplers`.

    >>> gs = get_gate_set("cz").with_couplers({(2, 1): "cx", (0, 1): "cz"})
    >>> gs.couplers, gs.two_qubit_on(1, 2), gs.two_qubit_on(0, 1), gs.two_qubit_names
    ((((1, 2), 'cx'),), 'cx', 'cz', ('cz', 'cx'))
    """

    name: str
    one_qubit: tuple[str, ...]
    two_qubit: str
    couplers: tuple[tuple[tuple[int, int], str], ...] = ()

    @property
    def basis(self) -> tuple[str, ...]:
        """Every native gate name: the two-qubit gates (the default first), then the one-qubit ones."""
        return self.two_qubit_names + self.one_qubit

    @property
    def two_qubit_names(self) -> tuple[str, ...]:
        """The two-qubit gates of the set: the default, then the couplers' others (sorted)."""
        return (self.two_qubit,) + tuple(sorted({g for _, g in self.couplers} - {self.two_qubit}))

    def two_qubit_on(self, a: int, b: int) -> str:
        """The native two-qubit gate of the coupler between physical qubits ``a`` and ``b``."""
        return dict(self.couplers).get((min(a, b), max(a, b)), self.two_qubit)

    def native_of(self):
        """``native(a, b) -> gate name`` for many look-ups (the coupler table built once)."""
        local, default = dict(self.couplers), self.two_qubit
        return lambda a, b: local.get((min(a, b), max(a, b)), default)

    def with_couplers(self, gates) -> "GateSet":
        """This gate set with per-coupler two-qubit gates (``{(a, b): gate}`` or pairs of those);
        couplers whose gate is this set's ``two_qubit`` are not listed (they use the default).
        Raises TargetError on a gate no gate set offers (:data:`TWO_QUBIT_GATES`)."""
        items = gates.items() if hasattr(gates, "items") else gates
        out: dict[tuple[int, int], str] = {}
        for (a, b), gate in items:
            if gate not in TWO_QUBIT_GATES:
                raise TargetError(f"coupler[{min(a, b)}-{max(a, b)}].native_gate: unknown two-qubit gate {gate!r}; "
                                  f"choose one of {', '.join(TWO_QUBIT_GATES)}",
                                  field=f"coupler[{min(a, b)}-{max(a, b)}].native_gate")
            if gate != self.two_qubit:
                out[(min(a, b), max(a, b))] = gate
        return replace(self, couplers=tuple(sorted(out.items())))


def get_gate_set(name: str) -> GateSet:
    """The gate set ``name`` (one of :data:`GATE_SETS`)."""
    cat = gate_set_catalogue()
    if name not in cat:
        raise TargetError(f"unknown gate set {name!r}; choose one of {', '.join(cat)}", field="gate_set")
    e = cat[name]
    return GateSet(name, tuple(e["one_qubit"]), e["two_qubit"])


#: the two-qubit gates the gate sets offer: what a coupler's native gate may be.
TWO_QUBIT_GATES: tuple[str, ...] = tuple(dict.fromkeys(e["two_qubit"] for e in gate_set_catalogue().values()))


_GATES = {
    "cx": lambda: CXGate(),
    "cz": lambda: CZGate(),
    "rzz": lambda: RZZGate(Parameter("θ")),
    "rxx": lambda: RXXGate(Parameter("θ")),
    "rz": lambda: RZGate(Parameter("λ")),
    "ry": lambda: RYGate(Parameter("θ")),
    "rx": lambda: RXGate(Parameter("θ")),
    "sx": lambda: SXGate(),
    "x": lambda: XGate(),
}


def build_target(connectivity: Connectivity, gate_set: GateSet, *, properties=None) -> Target:
    """A qiskit Target of the connectivity and gate set (dt = 1 ns).

    properties: default None (no errors or durations); else a callable
        ``properties(gate_name, qubits) -> InstructionProperties | None`` used for every
        instruction (the noise study passes durations this way).
    """
    prop = properties or (lambda name, qubits: None)
    n = connectivity.num_qubits
    t = Target(num_qubits=n, dt=1e-9)
    for g in gate_set.one_qubit:
        t.add_instruction(_GATES[g](), {(q,): prop(g, (q,)) for q in range(n)})
    # each coupler (both directions) carries its own native two-qubit gate: with per-coupler gates
    # the Target is heterogeneous, and qiskit's BasisTranslator, UnitarySynthesis and
    # GatesInBasis read the instruction set of each qubit pair (qiskit 2.x: non-global operations)
    directed = [(a, b) for a, b in connectivity.edges] + [(b, a) for a, b in connectivity.edges]
    native = gate_set.native_of()
    for name in gate_set.two_qubit_names:
        on = [e for e in directed if native(*e) == name]
        if on:
            t.add_instruction(_GATES[name](), {e: prop(name, e) for e in on})
    t.add_instruction(Measure(), {(q,): prop("measure", (q,)) for q in range(n)})
    t.add_instruction(Delay(Parameter("t")), {(q,): None for q in range(n)})
    return t
