"""Server-side charts: every chart is labelled, captioned and accessible; drawings mark the layout."""

from __future__ import annotations

import itertools
import re
import xml.etree.ElementTree as ET

import pytest

from toposcout.compiler.errors import ToposcoutError
from toposcout.compiler.study import make_tasks, run_task
from toposcout.service.web import charts

SVG = "{http://www.w3.org/2000/svg}"
MODEL = {"name": "kite", "variables": ["a", "b", "c", "d", "e"],
         "cliques": [["a", "b", "c"], ["c", "d"], ["a", "e"], ["b", "e"]]}


def _noisy(conn: str, scale: float, fid: float, **extra) -> dict:
    return {"connectivity": conn, "connectivity_family": conn.split("-")[0], "variables": 5, "noise_scale": scale,
            "two_qubit_gates": 12, "depth": 30, "lower_bound_two_qubit": 7, "profile": "superconducting",
            "state_fidelity": fid, "hellinger_fidelity": (1 + fid) / 2, "budget_two_qubit": 0.02,
            "budget_one_qubit": 0.001, "budget_idle": 0.004, "budget_readout": 0.01, "error": None, **extra}


@pytest.fixture(scope="module")
def compiled_rows() -> list[dict]:
    tasks = make_tasks(MODEL, ["line", "grid", "heavy-hex"], compile_only=True, strategy="generic", seeds=1)
    return [run_task(t) for t in tasks]


@pytest.fixture()
def sweep_rows() -> list[dict]:
    rows = []
    for conn, base in (("line-5", 0.8), ("ring-5", 0.85)):
        for s in (0.5, 1.0, 2.0):
            extra = {"fidelity_target": 0.5, "threshold_noise_scale": 3.2} if s == 0.5 else {}
            rows.append(_noisy(conn, s, base ** s, **extra))
    rows.append({"connectivity": "grid-2x3", "error": "boom", "error_field": "connectivity"})
    return rows


def _texts(svg: bytes) -> list[str]:
    root = ET.fromstring(svg)
    return ["".join(t.itertext()) for t in root.iter(f"{SVG}text")]


def _check_svg(svg: bytes, profile: str | None) -> ET.Element:
    root = ET.fromstring(svg)
    assert root.get("role") == "img"
    title, desc = root.find(f"{SVG}title"), root.find(f"{SVG}desc")
    assert title is not None and title.text
    assert desc is not None and "not a device measurement" in desc.text
    joined = " ".join(_texts(svg))
    assert "not a device measurement" in joined.replace("\n", " ")
    if profile:
        assert f"'{profile}'" in joined
    return root


def test_compile_only_rows_give_only_the_gate_chart(compiled_rows):
    assert charts.available_charts(compiled_rows) == ["gates"]
    svg = charts.render_chart("gates", compiled_rows)
    _check_svg(svg, None)
    texts = " ".join(_texts(svg))
    assert "two-qubit gates (count)" in texts and "circuit depth (layers of gates)" in texts
    for r in compiled_rows:
        assert r["connectivity"] in texts
        assert str(r["two_qubit_gates"]) in texts


def test_every_noisy_chart_is_titled_labelled_and_captioned(sweep_rows):
    kinds = charts.available_charts(sweep_rows)
    assert kinds == [k for k in charts.CHART_KINDS if k != "fit"]  # fit: only studies with a fit block
    for kind in kinds:
        svg = charts.render_chart(kind, sweep_rows, fmt="svg")
        _check_svg(svg, "superconducting")
        texts = " ".join(_texts(svg))
        assert re.search(r"\(.*(count|layers|0 to 1|multiple).*\)", texts), kind  # a unit on an axis
        png = charts.render_chart(kind, sweep_rows, fmt="png")
        assert png.startswith(b"\x89PNG\r\n\x1a\n")


def test_sweep_marks_target_and_threshold(sweep_rows):
    texts = " ".join(_texts(charts.render_chart("sweep", sweep_rows)))
    assert "fidelity target 0.5" in texts
    assert "threshold 3.2x" in texts
    assert "noise scale (multiple of the profile's error rates)" in texts


def test_bar_charts_facet_by_noise_scale_and_profile(sweep_rows):
    # rows of different noise scales are never side by side: one panel per (profile, scale)
    desc = charts.chart_description("fidelity", sweep_rows)
    assert "noise scale 1x: line-5: state fidelity 0.800" in desc  # 0.8 ** 1.0 in the scale-1 panel
    assert "noise scale 2x: line-5: state fidelity 0.640" in desc
    assert "grid-2x3" not in desc  # the failed row is left out
    for kind in ("fidelity", "budget"):
        root = ET.fromstring(charts.render_chart(kind, sweep_rows))
        titles = [t for t in _texts(charts.render_chart(kind, sweep_rows)) if t.startswith("noise scale")]
        assert titles == ["noise scale 0.5x", "noise scale 1x", "noise scale 2x"], kind
        assert root is not None
    two = [dict(r, profile="trapped_ion") for r in sweep_rows if r.get("noise_scale") == 1.0] + [
        r for r in sweep_rows if r.get("noise_scale") == 1.0]
    titles = [t for t in _texts(charts.render_chart("budget", two)) if t.startswith("noise scale")]
    assert titles == ["noise scale 1x, profile trapped_ion", "noise scale 1x, profile superconducting"]


def test_budget_bars_are_not_stacked_and_say_they_are_separate_estimates(sweep_rows):
    # the parts are separate estimates (fidelity regained with one source off; metrics.py) that need
    # not add up to the total loss, so no bar may start on top of another
    rows = [r for r in sweep_rows if r.get("noise_scale") == 1.0]
    svg = charts.render_chart("budget", rows)
    assert "not stacked" in " ".join(_texts(svg)).replace("\n", " ")
    assert "separate estimate" in charts.chart_description("budget", rows)
    from matplotlib.figure import Figure

    fig = Figure()
    charts._draw_budget(fig, rows)
    (ax,) = fig.axes
    bars = [p for p in ax.patches if p.get_height() > 0]
    assert len(bars) == 4 * len(rows)
    assert all(p.get_y() == 0 for p in bars)


def test_palette_is_colour_blind_safe_by_machado_2009():
    # Reference: Machado, Oliveira & Fernandes (2009), "A physiologically-based model for simulation of
    # color vision deficiency" (IEEE TVCG 15(6)), as implemented by colorspacious; distances in CAM02-UCS.
    # Colours that share a chart must stay apart for protanopia, deuteranopia and tritanopia (severity 100).
    import itertools

    import numpy as np
    from colorspacious import cspace_convert

    def rgb(h):
        return np.array([int(h[i:i + 2], 16) / 255 for i in (1, 3, 5)])

    def seen(h, cvd):
        c = rgb(h) if cvd is None else np.clip(
            cspace_convert(rgb(h), {"name": "sRGB1+CVD", "cvd_type": cvd, "severity": 100}, "sRGB1"), 0, 1)
        return cspace_convert(c, "sRGB1", "CAM02-UCS")

    need = {"budget": 25.0, "fidelity": 25.0, "gates": 15.0, "drawing": 15.0}
    worst = {}
    for group, roles in charts.PALETTE_GROUPS.items():
        for cvd in (None, "protanomaly", "deuteranomaly", "tritanomaly"):
            d = min(np.linalg.norm(seen(charts.PALETTE[a], cvd) - seen(charts.PALETTE[b], cvd))
                    for a, b in itertools.combinations(roles, 2))
            worst[(group, cvd)] = d
            assert d >= need[group], (group, cvd, d)
    # the budget colours are those of the chart and of the drawing's SWAP couplings
    assert [c for _, _, c in charts._BUDGET] == [charts.PALETTE[k] for k in charts.PALETTE_GROUPS["budget"]]
    # the office-suite palette the budget used before fails the same check (deuteranopia: about 6)
    old = ["#c0504d", "#e8a33d", "#4f81bd", "#8064a2"]
    assert min(np.linalg.norm(seen(a, "deuteranomaly") - seen(b, "deuteranomaly"))
               for a, b in itertools.combinations(old, 2)) < 10


@pytest.mark.parametrize("kind, fmt, field", [("pie", "svg", "chart"), ("gates", "gif", "format"),
                                              ("sweep", "svg", "chart")])
def test_bad_chart_requests_say_what_is_wrong(compiled_rows, kind, fmt, field):
    with pytest.raises(ToposcoutError) as info:
        charts.render_chart(kind, compiled_rows, fmt=fmt)
    assert info.value.field == field


def test_connectivity_drawing_marks_layout_swaps_and_idle_qubits(compiled_rows):
    row = next(r for r in compiled_rows if r["connectivity"].startswith("heavy-hex"))
    conn = charts.connectivity_for_row(row)
    assert conn.name == row["connectivity"] and conn.num_qubits == row["physical_qubits"]
    active = set(row["layout"].values())
    svg = charts.connectivity_chart(row, conn, active=active)
    _check_svg(svg, None)
    texts = _texts(svg)
    for var in MODEL["variables"]:
        assert var in texts
    desc = ET.fromstring(svg).find(f"{SVG}desc").text
    for var, q in row["layout"].items():
        assert f"{var} on q{q}" in desc
    idle = conn.num_qubits - len(active)
    assert f"{idle} idle qubits greyed" in desc
    assert "idle qubit" in texts


def test_swap_edges_are_labelled_with_their_count():
    row = {"connectivity": "line-4", "connectivity_family": "line", "variables": 3,
           "layout": {"x": 0, "y": 1, "z": 3}, "swap_edges": {"1-2": 3}, "two_qubit_gates": 9}
    conn = charts.connectivity_for_row(row)
    svg = charts.connectivity_chart(row, conn)
    assert "3 SWAP" in _texts(svg)
    assert "q1-q2 (3)" in ET.fromstring(svg).find(f"{SVG}desc").text
    assert "0 idle qubits" in ET.fromstring(svg).find(f"{SVG}desc").text  # q2 carried the swaps


def test_custom_connectivity_is_rebuilt_from_the_request():
    edges = [[0, 1], [1, 2], [2, 3], [3, 0], [0, 2]]
    row = {"connectivity": "custom-4", "connectivity_family": "custom", "variables": 3}
    conn = charts.connectivity_for_row(row, {"connectivities": ["line", {"family": "custom", "edges": edges}]})
    assert len(conn.edges) == 5
    with pytest.raises(ToposcoutError):
        charts.connectivity_for_row(row, {"connectivities": ["line"]})


def test_swap_couplings_outside_the_circuits_qubits_are_not_drawn():
    row = {"connectivity": "line-6", "connectivity_family": "line", "variables": 2,
           "layout": {"x": 0, "y": 1}, "swap_edges": {"0-1": 1, "4-5": 2}, "two_qubit_gates": 5}
    conn = charts.connectivity_for_row(row)
    svg = charts.connectivity_chart(row, conn, active={0, 1})
    texts = _texts(svg)
    assert "1 SWAP" in texts and "2 SWAP" not in texts
    desc = ET.fromstring(svg).find(f"{SVG}desc").text
    assert "q0-q1 (1)" in desc and "q4-q5" not in desc and "1 recorded SWAP coupling(s)" in desc
    assert any("never uses" in t for t in texts)


def test_sweep_legend_names_the_threshold_markers(sweep_rows):
    # the dashed vertical threshold lines have legend entries saying what they mark
    from matplotlib.figure import Figure

    fig = Figure()
    charts._draw_sweep(fig, charts.usable_rows(sweep_rows))
    (ax,) = fig.axes
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    for name in ("line-5", "ring-5"):
        assert f"{name}: threshold 3.2x (largest scale reaching the target)" in labels
    assert "fidelity target 0.5" in labels


def test_custom_drawings_are_rebuilt_with_the_studys_names_and_positions():
    ring = [[0, 1], [1, 2], [2, 3], [3, 0]]
    line = [[0, 1], [1, 2], [2, 3]]
    request = {"connectivities": [{"family": "custom", "edges": ring, "size": None},
                                  {"family": "custom", "edges": line, "size": None,
                                   "positions": [[0, 0], [1, 0], [2, 0], [3, 0]]}]}
    row = {"connectivity": "custom-4-2", "connectivity_family": "custom", "variables": 3}
    conn = charts.connectivity_for_row(row, request)
    assert conn.edges == ((0, 1), (1, 2), (2, 3))
    assert conn.coords() == [(0.0, 0.0), (1.0, 0.0), (2.0, 0.0), (3.0, 0.0)]
    assert charts.connectivity_for_row({**row, "connectivity": "custom-4"}, request).edges == (
        (0, 1), (0, 3), (1, 2), (2, 3))


@pytest.mark.parametrize("conn_spec", ["line", "ring", "grid", "heavy-hex", "ladder"])
def test_drawing_labels_overlap_no_node_and_no_other_label(conn_spec):
    # Bounding boxes as matplotlib's renderer lays them out (the same boxes the SVG gets): every
    # variable label and SWAP label stays clear of every qubit marker and of every other label.
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.transforms import Bbox

    from toposcout.compiler.study import connectivity_spec
    from toposcout.compiler.targets import make_connectivity

    names = ["inlet", "reeds", "dock", "outlet", "weir", "sluice", "heron", "moss"]
    model = {"name": "pond", "variables": names,
             "cliques": [names[i:i + 3] for i in range(0, 6, 2)] + [["heron", "moss"], ["moss", "inlet"]]}
    if conn_spec == "ladder":
        spec = connectivity_spec("custom:examples/ladder-chip.edges")
        conn = make_connectivity("custom", 8, edges=spec["edges"], positions=spec["positions"])
        spec = {"family": "custom", "edges": spec["edges"], "size": None}
    else:
        conn = make_connectivity(conn_spec, 8)
        spec = conn_spec
    (task,) = make_tasks(model, [spec], compile_only=True, strategy="generic", seeds=1)
    row = run_task(task)
    fig = charts.connectivity_figure(row, conn)
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    (ax,) = fig.axes
    marks = [c for c in ax.collections if len(c.get_offsets()) == 1]  # one marker per qubit
    assert len(marks) == conn.num_qubits
    nodes = []
    for c in marks:
        (x, y), = ax.transData.transform(c.get_offsets())
        r = (c.get_sizes()[0] ** 0.5) / 2 * fig.dpi / 72  # a marker's size is its area in points^2
        nodes.append(Bbox.from_extents(x - r, y - r, x + r, y + r))
    labels = [t for t in ax.texts if t.get_text() in names or t.get_text().endswith("SWAP")]
    assert {t.get_text() for t in labels} >= set(row["layout"])
    boxes = [(t.get_text(), t.get_window_extent(renderer)) for t in labels]
    for name, box in boxes:
        for q, node in enumerate(nodes):
            assert not box.overlaps(node), (conn_spec, name, "over qubit", q)
    for (a, ba), (b, bb) in itertools.combinations(boxes, 2):
        assert not ba.overlaps(bb), (conn_spec, a, b)
