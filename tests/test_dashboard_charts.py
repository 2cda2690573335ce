"""Server-side charts: every chart is labelled, captioned and accessible; drawings mark the layout."""

from __future__ import annotations

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


def test_per_connectivity_charts_use_the_row_nearest_scale_one(sweep_rows):
    desc = charts.chart_description("fidelity", sweep_rows)
    assert "line-5: state fidelity 0.800" in desc  # 0.8 ** 1.0, not the 0.5 or 2.0 rows
    assert "grid-2x3" not in desc  # the failed row is left out


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
