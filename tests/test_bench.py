"""`toposcout bench --quick`: the JSON's structure, and every ratio recomputed from the counts."""

from __future__ import annotations

import io
import json
import statistics
from itertools import combinations

import pytest

from toposcout.compiler.ansatz import build_ansatz
from toposcout.compiler.model import parse_model
from toposcout.compiler.bench import (
    lower_bound,
    plaquette_model,
    random_clique_model,
    ring_triples_model,
    suite_models,
    triangle_model,
)
from toposcout.service.cli import main


def distinct_order2(cliques) -> int:
    """LB by brute force over the union of every clique's subsets of size >= 2."""
    return len({tuple(sorted(s)) for c in cliques for k in range(2, len(c) + 1) for s in combinations(c, k)})


@pytest.fixture(scope="module")
def quick(tmp_path_factory):
    path = tmp_path_factory.mktemp("bench") / "bench.json"
    out, err = io.StringIO(), io.StringIO()
    code = main(["bench", "--quick", "--json", str(path)], out=out, err=err)
    assert code == 0, err.getvalue()
    return json.loads(path.read_text()), out.getvalue()


def test_quick_json_structure(quick):
    doc, text = quick
    for key in ("models", "cells", "pairs", "medians", "checks", "strategies", "seeds", "gate_set"):
        assert key in doc
    assert doc["strategies"] == ["generic", "structured", "auto"]
    names = [m["name"] for m in doc["models"]]
    assert names == [m["name"] for m in suite_models(quick=True)]
    fams = doc["families"]
    # every (model, connectivity, strategy) cell is there exactly once
    keys = [(c["model"], c["family"], c["strategy"]) for c in doc["cells"]]
    assert len(keys) == len(set(keys)) == len(names) * len(fams) * 3
    for c in doc["cells"]:
        for k in ("two_qubit_gates", "depth", "two_qubit_depth", "compile_seconds", "ratio_lb", "lb"):
            assert k in c
        assert c["two_qubit_depth"] <= c["two_qubit_gates"]
        assert c["two_qubit_depth"] <= c["depth"]
        assert c["compile_seconds"] > 0
    assert len(doc["pairs"]) == len(names) * len(fams)
    # the table names every model and connectivity, and the checks
    for p in doc["pairs"]:
        assert p["connectivity"] in text and p["model"] in text
    # every check reads as a comparison with its target (met / not met), not an internal word
    from toposcout.compiler.bench import CHECK_GOALS

    for k, v in doc["checks"].items():
        what, goal = CHECK_GOALS[k]
        line = next(x for x in text.splitlines() if what in x)
        assert line.strip().startswith("met" if v["ok"] else "not met") and f"target {goal}" in line
        assert "measured" in line
    assert "FAIL" not in text and "PASS" not in text and "_" not in text.split("targets (met", 1)[1]


def test_lb_is_the_number_of_distinct_terms_of_order_two_or_more(quick):
    doc, _ = quick
    for m in doc["models"]:
        assert m["lb"] == distinct_order2(m["cliques"])
        ansatz = build_ansatz(parse_model({"name": m["name"], "variables": m["variables"], "cliques": m["cliques"]}))
        assert m["lb"] == sum(1 for t in ansatz.terms if t.order >= 2)
    for c in doc["cells"]:
        assert c["lb"] == next(m["lb"] for m in doc["models"] if m["name"] == c["model"])


def test_ratios_are_computed_from_the_counts(quick):
    doc, _ = quick
    cell = {(c["model"], c["connectivity"], c["strategy"]): c for c in doc["cells"]}
    for c in doc["cells"]:
        assert c["ratio_lb"] == pytest.approx(c["two_qubit_gates"] / c["lb"], abs=1e-4)
    for p in doc["pairs"]:
        g = cell[(p["model"], p["connectivity"], "generic")]
        s = cell[(p["model"], p["connectivity"], "structured")]
        a = cell[(p["model"], p["connectivity"], "auto")]
        assert p["generic_two_qubit_gates"] == g["two_qubit_gates"]
        assert p["structured_two_qubit_gates"] == s["two_qubit_gates"]
        assert p["structured_over_generic"] == pytest.approx(s["two_qubit_gates"] / g["two_qubit_gates"], abs=1e-4)
        assert p["depth_structured_over_generic"] == pytest.approx(s["depth"] / g["depth"], abs=1e-4)
        # auto keeps the better of the two by (2q count, depth)
        assert (a["two_qubit_gates"], a["depth"]) == min((g["two_qubit_gates"], g["depth"]),
                                                         (s["two_qubit_gates"], s["depth"]))
        assert p["auto_worse_than_generic"] is ((a["two_qubit_gates"], a["depth"])
                                                > (g["two_qubit_gates"], g["depth"]))
        if p["qiskit_best"] is not None:
            assert p["qiskit_best"] <= g["two_qubit_gates"]
            assert p["structured_over_qiskit_best"] == pytest.approx(s["two_qubit_gates"] / p["qiskit_best"],
                                                                     abs=1e-4)
    # the reference 3x3 plaquette figures are used where the quick suite has them
    assert any(p["qiskit_best_source"] and "reference" in p["qiskit_best_source"] for p in doc["pairs"])

    cons = [p for p in doc["pairs"] if p["family"] != "all-to-all"]
    med = doc["medians"]
    assert med["structured_over_generic_constrained"] == pytest.approx(
        statistics.median(p["structured_two_qubit_gates"] / p["generic_two_qubit_gates"] for p in cons), abs=1e-3)
    assert med["depth_structured_over_generic"] == pytest.approx(
        statistics.median(p["structured_depth"] / p["generic_depth"] for p in doc["pairs"]), abs=1e-3)
    best = [p["structured_two_qubit_gates"] / p["qiskit_best"] for p in cons if p["qiskit_best"]]
    assert med["qiskit_best_cells"] == len(best)
    assert med["structured_over_qiskit_best_constrained"] == pytest.approx(statistics.median(best), abs=1e-3)


def test_checks_follow_the_cells(quick):
    doc, _ = quick
    checks = doc["checks"]
    a2a = [c for c in doc["cells"] if c["strategy"] == "structured" and c["family"] == "all-to-all"]
    assert checks["all_to_all_structured_within_1_5_lb"]["ok"] is all(
        c["two_qubit_gates"] <= 1.5 * c["lb"] for c in a2a)
    assert checks["auto_not_worse_than_generic"]["ok"] is not any(p["auto_worse_than_generic"] for p in doc["pairs"])
    q = doc["medians"]["structured_over_qiskit_best_constrained"]
    assert checks["median_structured_over_qiskit_best"]["ok"] is (q <= 0.75)
    st = [c["compile_seconds"] for c in doc["cells"] if c["strategy"] == "structured"]
    assert checks["structured_compile_under_2s_to_16_variables"]["ok"] is (max(st) < 2.0)


def test_generators_match_the_suite_models():
    # LB column of the suite table measured with qiskit (README): 40, 59, 24, 30
    assert [lower_bound(m) for m in (plaquette_model(3, 3), plaquette_model(3, 4), triangle_model(3, 3),
                                     ring_triples_model(10))] == [40, 59, 24, 30]
    assert len(triangle_model(3, 3)["cliques"]) == 8
    a, b = random_clique_model(12, 8, seed=1), random_clique_model(12, 8, seed=1)
    assert a == b and a != random_clique_model(12, 8, seed=2)
    assert {v for c in a["cliques"] for v in c} == set(a["variables"])
    sizes = {m["name"]: len(m["variables"]) for m in suite_models()}
    assert max(sizes.values()) <= 16 and "plaquettes-4x4" in sizes


def test_bench_rejects_bad_seeds():
    out, err = io.StringIO(), io.StringIO()
    assert main(["bench", "--quick", "--seeds", "0"], out=out, err=err) == 2
    assert "seeds" in err.getvalue()
