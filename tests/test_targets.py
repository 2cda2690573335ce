"""Connectivities and gate sets."""

from __future__ import annotations

from pathlib import Path

import networkx as nx
import pytest
from qiskit.transpiler import CouplingMap

from toposcout.compiler.errors import TargetError
from toposcout.compiler.targets import (
    BUILTIN_FAMILIES,
    GATE_SETS,
    build_target,
    get_gate_set,
    heavy_hex_qubits,
    make_connectivity,
    parse_connectivity,
)


@pytest.mark.parametrize("d", [3, 5, 7, 9])
def test_heavy_hex_counts_match_closed_form(d):
    # Published closed form (5d² − 2d − 1)/2: Chamberland, Zhu, Yoder, Hertzberg & Cross,
    # "Topological and subsystem codes on low-degree graphs with flag qubits", PRX 10, 011022 (2020);
    # cross-checked against qiskit's own generator CouplingMap.from_heavy_hex.
    assert CouplingMap.from_heavy_hex(d).size() == heavy_hex_qubits(d)
    c = make_connectivity("heavy-hex", 1, size=d)
    assert c.num_qubits == heavy_hex_qubits(d)
    degrees = [deg for _, deg in c.graph().degree()]
    assert max(degrees) == 3  # heavy-hex: every qubit has degree 2 or 3 (same paper)
    assert nx.is_connected(c.graph())


@pytest.mark.parametrize("n,name", [(1, "grid-1x1"), (4, "grid-2x2"), (5, "grid-3x2"), (9, "grid-3x3"),
                                    (10, "grid-4x3"), (12, "grid-4x3"), (16, "grid-4x4")])
def test_grid_sizing(n, name):
    c = make_connectivity("grid", n)
    assert c.name == name and c.num_qubits >= n
    # A grid graph of r×c has r(c−1) + c(r−1) edges (networkx grid_2d_graph as reference).
    r, cols = map(int, c.size.split("x"))
    assert nx.is_isomorphic(c.graph(), nx.grid_2d_graph(r, cols))


@pytest.mark.parametrize("family", BUILTIN_FAMILIES)
def test_auto_size_fits_smallest(family):
    for n in (3, 7, 12, 20):
        c = make_connectivity(family, n)
        assert c.num_qubits >= n
        assert nx.is_connected(c.graph())


def test_ring_and_line_edges():
    assert nx.is_isomorphic(make_connectivity("ring", 6).graph(), nx.cycle_graph(6))
    assert nx.is_isomorphic(make_connectivity("line", 6).graph(), nx.path_graph(6))
    assert nx.is_isomorphic(make_connectivity("all-to-all", 5).graph(), nx.complete_graph(5))


def test_too_small_explicit_size():
    with pytest.raises(TargetError, match="9 variables but grid-2x4 has 8 qubits"):
        make_connectivity("grid", 9, size="2x4")


@pytest.mark.parametrize("spec,needle", [
    ("hexagon", "unknown connectivity 'hexagon'"),
    ("heavy-hex:4", "odd"),
    ("grid:3xq", "not an integer"),
    ("line:-2", "positive"),
    ("custom", "edge-list file"),
    ("custom:/nonexistent.edges", "cannot be read"),
])
def test_bad_connectivity(spec, needle):
    with pytest.raises(TargetError, match=needle):
        parse_connectivity(spec, 3)


def test_custom_edge_list(tmp_path):
    p = tmp_path / "chip.edges"
    p.write_text("# a small chip\n0 1\n1 2\n2 3\n3 0\n1 3\n")
    c = parse_connectivity(f"custom:{p}", 4)
    assert c.num_qubits == 4 and len(c.edges) == 5


def test_custom_disconnected(tmp_path):
    p = tmp_path / "two.edges"
    p.write_text("0 1\n2 3\n")
    with pytest.raises(TargetError, match="disconnected"):
        parse_connectivity(f"custom:{p}", 2)


def test_custom_bad_line(tmp_path):
    p = tmp_path / "bad.edges"
    p.write_text("0 1\n1 x\n")
    with pytest.raises(TargetError, match="line 2"):
        parse_connectivity(f"custom:{p}", 2)


@pytest.mark.parametrize("name", GATE_SETS)
def test_gate_set_targets(name):
    gs = get_gate_set(name)
    t = build_target(make_connectivity("line", 3), gs)
    assert gs.two_qubit in t.operation_names
    assert t.instruction_supported(gs.two_qubit, (0, 1)) and t.instruction_supported(gs.two_qubit, (1, 0))
    assert not t.instruction_supported(gs.two_qubit, (0, 2))


def test_unknown_gate_set():
    with pytest.raises(TargetError, match="unknown gate set"):
        get_gate_set("toffoli")


@pytest.mark.parametrize("d", [3, 5, 7])
def test_heavy_hex_is_drawn_as_its_lattice(d):
    # Reference: qiskit's CouplingMap.from_heavy_hex; drawn as a brick wall, every coupling has unit
    # length and no two qubits share a position (a lattice, not a force-directed picture)
    import math

    conn = make_connectivity("heavy-hex", 1, size=d)
    xy = conn.coords()
    assert len(set(xy)) == conn.num_qubits
    assert all(abs(math.dist(xy[a], xy[b]) - 1.0) < 1e-9 for a, b in conn.edges)


def test_custom_graph_is_drawn_at_the_positions_of_its_file_or_planar(tmp_path):
    # the example ladder keeps its rails (file positions); without positions, a planar graph gets
    # a drawing without crossing couplings (networkx.check_planarity / planar_layout)
    import itertools

    import networkx as nx

    from toposcout.compiler.study import connectivity_spec

    root = Path(__file__).resolve().parent.parent
    spec = connectivity_spec(f"custom:{root / 'examples' / 'ladder-chip.edges'}")
    conn = make_connectivity("custom", 4, edges=spec["edges"], positions=spec["positions"])
    assert conn.coords()[:5] == [(float(i), 0.0) for i in range(5)] and conn.coords()[7] == (2.0, -1.0)
    plain = make_connectivity("custom", 4, edges=spec["edges"])
    assert nx.check_planarity(plain.graph())[0]
    xy = plain.coords()

    def cross(p1, p2, p3, p4):
        def orient(a, b, c):
            return (b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0])
        return (orient(p1, p2, p3) * orient(p1, p2, p4) < 0) and (orient(p3, p4, p1) * orient(p3, p4, p2) < 0)

    for (a, b), (c, d) in itertools.combinations(plain.edges, 2):
        if len({a, b, c, d}) == 4:
            assert not cross(xy[a], xy[b], xy[c], xy[d]), ((a, b), (c, d))
    bad = tmp_path / "half.edges"
    bad.write_text("0 1\n1 2\npos 0 0 0\npos 2 1 0\n")
    with pytest.raises(TargetError, match="not for \\[1\\]"):
        connectivity_spec(f"custom:{bad}")
