"""Device files, error-aware placement, chip regions, calibration drift, the chip drawing.

Outside references, each named beside its check:

* ESP as the product of (1 - error) over a circuit's operations, and error-aware placement as
  maximising it: Nishio, Pan, Satzinger, Amano & Van Meter, "Extracting success from IBM's 20-qubit
  machines using error-aware compilation", ACM J. Emerg. Technol. Comput. Syst. 16, 32 (2020).
* the weighted Steiner tree: networkx.algorithms.approximation.steiner_tree and the bound of
  Kou, Markowsky & Berman, Acta Informatica 15, 141-145 (1981).
* the noise channels: qiskit-aer's own noise primitives (depolarizing_error,
  thermal_relaxation_error, ReadoutError) and Nielsen's relation F_avg = (d F_pro + 1)/(d + 1)
  (Phys. Lett. A 303, 249 (2002)).
"""

from __future__ import annotations

import io
import itertools
import math
import random
import tomllib

import networkx as nx
import numpy as np
import pytest

from toposcout.compiler.ansatz import build_ansatz
from toposcout.compiler.compile import compile_ansatz
from toposcout.compiler.devices import DEVICE_NAMES, device_dirs, load_device, parse_device, parse_device_text
from toposcout.compiler.errors import ProfileError, TargetError
from toposcout.compiler.model import parse_model
from toposcout.compiler.regions import placement_gain
from toposcout.compiler.synthesis.steiner import kmb_steiner_tree
from toposcout.compiler.targets import Connectivity, get_gate_set, make_connectivity

CX = get_gate_set("cx")


def _device(conn, *, default_2q=0.005, couplers=(), qubits=(), base="superconducting"):
    return parse_device({"name": "t", "qubits": conn.num_qubits, "edges": [list(e) for e in conn.edges],
                         "base": base, "defaults": {"two_qubit_error": default_2q},
                         "coupler": list(couplers), "qubit": list(qubits)})


def _uses(compiled, edge) -> bool:
    c = compiled.circuit
    want = sorted(edge)
    return any(ins.operation.num_qubits == 2 and sorted(c.find_bit(q).index for q in ins.qubits) == want
               for ins in c.data)


# --- the device file ------------------------------------------------------------------------------
def test_example_devices_are_the_promised_chips():
    assert set(DEVICE_NAMES) == {"alder-27", "birch-36"}
    hh, grid = load_device("alder-27"), load_device("birch-36")
    g = hh.connectivity.graph()
    assert hh.num_qubits == 27 and nx.is_connected(g) and max(d for _, d in g.degree) <= 3  # heavy-hex-like
    # 6x6 grid: isomorphic to networkx's grid graph (reference library)
    assert nx.is_isomorphic(grid.connectivity.graph(), nx.grid_2d_graph(6, 6))
    for d in (hh, grid):
        text = (device_dirs()[0] / f"{d.name}.toml").read_text()
        assert "TYPICAL VALUES FROM MEMORY" in text and d.per_element and len(d.coords()) == d.num_qubits
        e = np.array([d.profile.edge(a, b).two_qubit_error for a, b in d.connectivity.edges])
        ro = np.array([d.profile.qubit(q).p0_given_1 for q in range(d.num_qubits)])
        # log-normal-ish spread with a few poor elements: the worst several times the median
        assert e.max() > 4 * np.median(e) and ro.max() > 3 * np.median(ro)
        assert len(set(np.round(e, 6))) > len(e) // 2  # not uniform


def test_device_values_reach_the_profile():
    d = parse_device_text("""
name = "ex"
qubits = 3
edges = [[0, 1], [1, 2]]
[defaults]
t1_us = 100.0
t2_us = 80.0
one_qubit_error = 1e-3
p1_given_0 = 0.01
p0_given_1 = 0.02
one_qubit_ns = 30
two_qubit_error = 0.01
two_qubit_ns = 200
measure_ns = 1000
[[qubit]]
index = 2
t1_us = 20.0
t2_us = 30.0
one_qubit_ns = 50
[[coupler]]
qubits = [2, 1]
two_qubit_error = 0.04
native_gate = "cx"
""")
    q2, q0 = d.profile.qubit(2), d.profile.qubit(0)
    assert (q2.t1_us, q2.t2_us, q2.one_qubit_ns, q0.t1_us, q0.one_qubit_ns) == (20.0, 30.0, 50.0, 100.0, 30.0)
    assert d.profile.edge(1, 2).two_qubit_error == 0.04 and d.profile.edge(0, 1).two_qubit_error == 0.01
    assert d.source["coupler"][0]["qubits"] == [1, 2]


BAD = [
    ({"edges": [[0, 1], [1, 5]]}, "edges[1]", "outside the chip"),
    ({"edges": [[0, 1], [1, 0]]}, "edges[1]", "duplicate"),
    ({"edges": [[0, 1], [2, 2]]}, "edges[1]", "self edge"),
    ({"qubit": [{"index": 1, "t1_us": 10.0, "t2_us": 25.0}]}, "qubit[index=1].t2_us", "2*T1"),
    ({"qubit": [{"index": 2, "p0_given_1": 1.0}]}, "qubit[index=2].p0_given_1", "[0, 1)"),
    ({"coupler": [{"qubits": [1, 2], "two_qubit_error": -0.1}]}, "coupler[1-2].two_qubit_error", "[0, 1)"),
    ({"coupler": [{"qubits": [0, 3], "two_qubit_error": 0.1}]}, "coupler[0].qubits", "not a coupling edge"),
    ({"coupler": [{"qubits": [0, 1], "native_gate": "iswap"}]}, "coupler[0-1].native_gate",
     "choose one of cx, cz, rzz, rxx"),
    ({"qubit": [{"index": 9}]}, "qubit[0].index", "outside"),
    ({"base": "nosuch"}, "base", "unknown built-in profile"),
    ({"base": None}, "defaults.t1_us", "missing with no default"),
    ({"colour": "red"}, "colour", "unknown device key"),
]


@pytest.mark.parametrize("change,field,words", BAD)
def test_bad_device_names_field_and_element(change, field, words):
    d = {"name": "bad", "qubits": 4, "edges": [[0, 1], [1, 2], [2, 3]], "base": "superconducting", **change}
    if d["base"] is None:
        del d["base"]
    with pytest.raises(ProfileError) as exc:
        parse_device(d)
    assert exc.value.field == field and words in str(exc.value), str(exc.value)


def test_model_larger_than_chip_or_its_connected_part():
    d = parse_device({"name": "two-parts", "qubits": 6, "edges": [[0, 1], [1, 2], [3, 4], [4, 5]],
                      "base": "superconducting"})
    d.check_fits(3)
    with pytest.raises(TargetError, match="largest connected part has 3 qubits"):
        d.check_fits(4)
    with pytest.raises(TargetError, match="7 variables but device 'two-parts' has 6 qubits"):
        d.check_fits(7)


def test_cli_refuses_bad_devices_with_exit_2(tmp_path, chain_model):
    import json

    from toposcout.service.cli import main

    model = tmp_path / "m.json"
    model.write_text(json.dumps(chain_model(4)))
    bad = tmp_path / "bad.toml"
    bad.write_text('name = "bad"\nqubits = 3\nedges = [[0, 1], [1, 3]]\n')
    small = tmp_path / "small.toml"
    small.write_text('name = "small"\nqubits = 3\nbase = "superconducting"\nedges = [[0, 1], [1, 2]]\n')
    for argv, words in (([str(model), "--device", str(bad)], "edges[1]: qubit 3 is outside"),
                        ([str(model), "--device", str(small)], "4 variables but device 'small' has 3 qubits"),
                        ([str(model), "--device", "alder-27", "-c", "line"], "either --device or --connectivity"),
                        ([str(model), "--device", "alder-27", "--regions", "0"], "--regions"),
                        ([str(model), "--device", "alder-27", "--placement", "best"], "invalid choice")):
        err = io.StringIO()
        assert main(["compare", *argv, "--compile-only"], out=io.StringIO(), err=err) == 2, argv
        assert words in err.getvalue(), err.getvalue()


# --- error-aware placement --------------------------------------------------------------------------
def _bad_coupler_cases():
    three = {"variables": list("abc"), "cliques": [["a", "b"], ["b", "c"]]}
    four = {"variables": list("abcd"), "cliques": [["a", "b", "c"], ["c", "d"]]}
    out = []
    for model, fam, size in ((three, "ring", "8"), (four, "grid", "3x3")):
        conn = make_connectivity(fam, 1, size=size)
        out += [(model, conn, bad) for bad in conn.edges]
    return out


@pytest.mark.parametrize("strategy", ["generic", "structured"])
def test_a_ten_times_worse_coupler_is_avoided_when_an_equally_short_alternative_exists(strategy):
    # Nishio et al. (2020): error-aware placement maximises the ESP, so a coupler 10x worse than the
    # rest is left unused whenever a placement as short (same two-qubit count) avoids it.
    avoided = count_used = alternatives = 0
    for model, conn, bad in _bad_coupler_cases():
        ans = build_ansatz(parse_model(model))
        dev = _device(conn, couplers=[{"qubits": list(bad), "two_qubit_error": 0.05}])
        aware = compile_ansatz(ans, dev.connectivity, CX, strategy=strategy, seeds=1, profile=dev.profile)
        count = compile_ansatz(ans, dev.connectivity, CX, strategy=strategy, seeds=1)
        # an equally short alternative: the count-only compilation on the chip without that coupler
        rest = nx.Graph([e for e in conn.edges if e != bad])
        part = max(nx.connected_components(rest), key=len)
        alt = None
        if len(part) >= ans.num_qubits:  # compile on the largest part that remains, relabelled
            label = {q: i for i, q in enumerate(sorted(part))}
            cut = Connectivity("cut", "custom", len(part), tuple(sorted(
                (min(label[a], label[b]), max(label[a], label[b])) for a, b in rest.subgraph(part).edges)))
            alt = compile_ansatz(ans, cut, CX, strategy=strategy, seeds=1)
        if alt is not None and alt.two_qubit_gates() <= aware.two_qubit_gates():
            alternatives += 1
            assert not _uses(aware, bad), (conn.name, bad)
            avoided += 1
        count_used += _uses(count, bad)
    assert alternatives >= 12 and avoided == alternatives
    assert count_used >= 1  # the count-only placement does use it somewhere: the check can fail


def test_error_aware_placement_is_not_worse_on_random_devices():
    # Nishio et al. (2020): ESP = prod (1 - e) over gates, idling and readout; error-aware placement
    # should raise it. 32 seeded random devices and models, strategies alternating
    # (toposcout.compiler.regions.placement_gain, which benchmarks/bench_regions.py prints).
    ratios = np.array([r for _strategy, r in placement_gain(32, seed=2026)])
    tol = 0.01  # ESP is exact arithmetic here; 1 % relative allowance
    assert np.mean(ratios >= 1 - tol) >= 0.95, ratios
    assert ratios.mean() > 1.0, ratios


# --- the weighted Steiner tree -----------------------------------------------------------------------
def _weight(t: nx.Graph) -> float:
    return t.size(weight="weight")


def test_weighted_steiner_tree_within_the_kmb_bound_of_networkx():
    # Kou, Markowsky & Berman (1981): their tree weighs at most 2 (1 - 1/l) OPT <= 2 x any Steiner tree,
    # in particular networkx's; against the exact optimum (all subsets of Steiner nodes) on small graphs.
    rng = random.Random(7)
    for k in range(25):
        g = nx.connected_watts_strogatz_graph(10, 4, 0.3, seed=k)
        for a, b in g.edges:
            g[a][b]["weight"] = rng.uniform(0.1, 3.0)
        terms = rng.sample(sorted(g.nodes), rng.randint(2, 5))
        ours = kmb_steiner_tree(g, terms)
        ref = nx.algorithms.approximation.steiner_tree(g, terms, weight="weight", method="kou")
        assert nx.is_tree(ours) and set(terms) <= set(ours.nodes)
        assert _weight(ours) <= 2 * _weight(ref) + 1e-9
        others = [v for v in g.nodes if v not in terms]
        opt = min(_weight(nx.minimum_spanning_tree(g.subgraph(list(terms) + list(extra))))
                  for r in range(len(others) + 1) for extra in itertools.combinations(others, r)
                  if nx.is_connected(g.subgraph(list(terms) + list(extra))))
        assert _weight(ours) <= 2 * (1 - 1 / len(terms)) * opt + 1e-9
        assert _weight(ours) >= opt - 1e-9


def test_weighted_steiner_tree_equals_networkx_on_trees():
    # on a tree the Steiner tree is the unique minimal subtree spanning the terminals (networkx agrees)
    rng = random.Random(3)
    for k in range(20):
        g = nx.random_labeled_tree(12, seed=k) if hasattr(nx, "random_labeled_tree") else nx.random_tree(12, seed=k)
        for a, b in g.edges:
            g[a][b]["weight"] = rng.uniform(0.1, 2.0)
        terms = rng.sample(sorted(g.nodes), rng.randint(2, 6))
        ours = kmb_steiner_tree(g, terms)
        ref = nx.algorithms.approximation.steiner_tree(g, terms, weight="weight")
        assert {tuple(sorted(e)) for e in ours.edges} == {tuple(sorted(e)) for e in ref.edges}
        assert math.isclose(_weight(ours), _weight(ref))


# --- the noise model from a device file ---------------------------------------------------------------
DEVICE_TEXT = """
name = "noise-check"
qubits = 4
base = "superconducting"
edges = [[0, 1], [1, 2], [2, 3]]
[[qubit]]
index = 0
t1_us = 60.0
t2_us = 50.0
one_qubit_error = 8e-4
p1_given_0 = 0.02
p0_given_1 = 0.05
one_qubit_ns = 40
[[qubit]]
index = 2
t1_us = 20.0
t2_us = 35.0
p0_given_1 = 0.12
[[coupler]]
qubits = [1, 2]
two_qubit_error = 0.03
two_qubit_ns = 420
[[coupler]]
qubits = [2, 3]
two_qubit_error = 0.012
"""


#: the same chip with per-coupler native gates: cz by default, coupler 1-2 cx, coupler 2-3 rzz
MIXED_TEXT = DEVICE_TEXT.replace('base = "superconducting"', 'base = "superconducting"\nnative_gate = "cz"', 1).replace(
    "two_qubit_ns = 420", 'two_qubit_ns = 420\nnative_gate = "cx"', 1).replace(
    "two_qubit_error = 0.012", 'two_qubit_error = 0.012\nnative_gate = "rzz"', 1)


@pytest.mark.parametrize("text", [DEVICE_TEXT, MIXED_TEXT], ids=["one-gate", "per-coupler-gates"])
def test_per_element_noise_model_equals_one_built_with_aer_primitives(chain_model, text):
    from qiskit_aer.noise import ReadoutError, depolarizing_error, thermal_relaxation_error

    from toposcout.compiler.noise import build_noise_model, schedule

    dev = parse_device_text(text)
    ans = build_ansatz(parse_model(chain_model(4)))
    compiled = compile_ansatz(ans, dev.connectivity, dev.gate_set(), strategy="structured", profile=dev.profile)
    sched = schedule(compiled, dev.profile)
    ours = build_noise_model(sched, dev.profile)
    # the reference reads the file itself: base values + the file's entries, nothing of our loader
    raw = tomllib.loads(text)
    # each coupler's native gate as the file names it (the device's native_gate where it names none)
    native = {tuple(e): raw.get("native_gate", "cx") for e in raw["edges"]}
    native.update({tuple(sorted(e["qubits"])): e["native_gate"] for e in raw["coupler"] if "native_gate" in e})
    from toposcout.compiler.profiles import profile_dirs

    base = tomllib.loads((profile_dirs()[0] / "superconducting.toml").read_text())
    qfig = {q: {"t1_us": base["coherence"]["t1_us"], "t2_us": base["coherence"]["t2_us"],
                "one_qubit_error": base["gates"]["one_qubit_error"], "one_qubit_ns": base["gates"]["one_qubit_ns"],
                "p1_given_0": base["readout"]["p1_given_0"], "p0_given_1": base["readout"]["p0_given_1"]}
            for q in range(4)}
    for e in raw["qubit"]:
        qfig[e["index"]].update({k: v for k, v in e.items() if k != "index"})
    cfig = {tuple(e): {"two_qubit_error": base["gates"]["two_qubit_error"], "two_qubit_ns": base["gates"]["two_qubit_ns"]}
            for e in raw["edges"]}
    for e in raw["coupler"]:
        cfig[tuple(sorted(e["qubits"]))].update({k: v for k, v in e.items() if k not in ("qubits", "native_gate")})

    def relax(q, t):
        return thermal_relaxation_error(qfig[q]["t1_us"] * 1e3, qfig[q]["t2_us"] * 1e3, t)

    def f_pro(q, t):  # process fidelity of thermal relaxation: (1 + e^{-t/T1} + 2 e^{-t/T2}) / 4
        return (1 + math.exp(-t * 1e-3 / qfig[q]["t1_us"]) + 2 * math.exp(-t * 1e-3 / qfig[q]["t2_us"])) / 4

    def expected(name, phys):
        if len(phys) == 1:
            (q,) = phys
            r, t, fr, rel = (qfig[q]["one_qubit_error"], qfig[q]["one_qubit_ns"], f_pro(q, qfig[q]["one_qubit_ns"]),
                             relax(q, qfig[q]["one_qubit_ns"]))
        else:
            a, b = phys
            assert name == native[tuple(sorted(phys))], (name, phys)  # the coupler's own gate carries its figures
            c = cfig[tuple(sorted(phys))]
            r, t = c["two_qubit_error"], c["two_qubit_ns"]
            fr, rel = f_pro(a, t) * f_pro(b, t), relax(a, t).expand(relax(b, t))
        d = 2 ** len(phys)
        f_target = ((d + 1) * (1 - r) - 1) / d            # Nielsen (2002)
        p = (fr - f_target) / (fr - 1 / d**2)
        if p <= 0:  # relaxation alone exceeds the nominal error: the gate is its relaxation (documented clip)
            return rel
        return depolarizing_error(p, len(phys)).compose(rel)

    checked = 0
    for name, sites in ours._local_quantum_errors.items():
        for qubits, err in sites.items():
            phys = [sched.physical_qubits[k] for k in qubits]
            assert err == expected(name, phys), (name, phys)
            checked += 1
    for name in ours._default_quantum_errors:  # a uniform site set: every site has the same channel
        for ins in sched.circuit.data:
            if ins.operation.name == name:
                phys = [sched.physical_qubits[sched.circuit.find_bit(q).index] for q in ins.qubits]
                assert ours._default_quantum_errors[name] == expected(name, phys)
                checked += 1
    assert checked >= 3
    two = {ins.operation.name for ins in sched.circuit.data if ins.operation.num_qubits == 2}
    assert two == set(native.values())  # every coupler's gate is used, so each is checked above
    for k, phys in enumerate(sched.physical_qubits):
        if k in sched.measured:
            q = qfig[phys]
            ref = ReadoutError([[1 - q["p1_given_0"], q["p1_given_0"]], [q["p0_given_1"], 1 - q["p0_given_1"]]])
            assert ours._local_readout_errors[(k,)] == ref


# --- regions, drift, rows, drawing, API ----------------------------------------------------------------
def test_regions_rank_by_esp_and_report_best_median_worst(chain_model):
    from toposcout.compiler.study import make_tasks, run_task

    tasks = make_tasks(chain_model(5), None, device="birch-36", strategy="structured", compile_only=True,
                       regions=6, jitter=0.2, jitter_samples=40)
    assert [t["region_rank"] for t in tasks] == [0, 1, 2]
    rows = [run_task(t) for t in tasks]
    assert all(r["error"] is None for r in rows), rows[0]["error"]
    esp = [r["chip_region_esp"] for r in rows]
    assert esp == sorted(esp, reverse=True) and rows[0]["chip_region_esp"] == rows[0]["chip_region_esp_best"]
    r0 = rows[0]
    assert r0["chip_region_esp_best"] >= r0["chip_region_esp_median"] >= r0["chip_region_esp_worst"]
    assert r0["chip_regions"] >= 3 and len(r0["chip_region"]) >= 5 and r0["device"] == "birch-36"
    assert set(r0["layout"].values()) <= set(r0["chip_region"])
    assert r0["esp_jitter_p10"] <= r0["esp_jitter_median"] <= r0["esp_jitter_p90"]
    assert r0["esp_jitter_p10"] < r0["esp_jitter_p90"]


def test_a_device_row_reports_both_placements(chain_model):
    from toposcout.compiler.study import make_tasks, run_task

    (t,) = make_tasks(chain_model(4), None, device="alder-27", strategy="structured", compile_only=True)
    row = run_task(t)
    assert row["placement_objective"] == "errors" and row["connectivity"] == "alder-27"
    assert row["esp_error_placement"] >= row["esp_count_placement"] * 0.99
    assert row["placement_esp_gain"] == pytest.approx(row["esp_error_placement"] / row["esp_count_placement"])


def test_device_drawing_has_units_legend_and_the_placement(chain_model):
    from toposcout.service.web.charts import _scale_colour, device_svg

    dev = load_device("alder-27")
    svg = device_svg(dev, {"layout": {"x0": 10, "x1": 11}, "swap_edges": {"11-12": 1}})
    assert svg.startswith("<svg") and "<title>" in svg and "average gate infidelity" in svg
    assert "log scale" in svg and "holds x0" in svg and "stroke-dasharray" in svg
    # the scale is sequential: lightness (Rec. 709 luma) falls monotonically from 0 to 1
    luma = [sum(w * int(_scale_colour(x / 20)[i:i + 2], 16) for w, i in ((0.2126, 1), (0.7152, 3), (0.0722, 5)))
            for x in range(21)]
    assert all(a > b for a, b in zip(luma, luma[1:]))


def test_api_takes_a_device_file_and_names_bad_fields(tmp_path, chain_model):
    from fastapi.testclient import TestClient

    from toposcout.service.api.app import create_app
    from toposcout.service.settings import Settings

    text = (device_dirs()[0] / "alder-27.toml").read_text()
    with TestClient(create_app(Settings(data_dir=tmp_path, workers=1))) as c:
        r = c.post("/v1/compile", json={"model": chain_model(4), "device": text, "strategy": "structured"})
        assert r.status_code == 200, r.text
        (row,) = r.json()["rows"]
        assert row["device"] == "alder-27" and row["placement_objective"] == "errors"
        bad = text.replace("[[coupler]]\nqubits = [0, 1]", "[[coupler]]\nqubits = [0, 5]", 1)
        r = c.post("/v1/compile", json={"model": chain_model(4), "device": bad})
        assert r.status_code == 422 and "not a coupling edge" in r.text and "device.coupler[0].qubits" in r.text
        r = c.post("/v1/compile", json={"model": chain_model(4), "device": text, "connectivities": ["line"]})
        assert r.status_code == 422 and "connectivities" in r.text
        r = c.post("/v1/compile", json={"model": chain_model(30), "device": text})
        assert r.status_code == 422 and "30 variables" in r.text


def test_dashboard_form_takes_a_device_upload(tmp_path, chain_model):
    import json

    from fastapi.testclient import TestClient

    from toposcout.service.api.app import create_app
    from toposcout.service.settings import Settings

    text = (device_dirs()[0] / "birch-36.toml").read_text()
    with TestClient(create_app(Settings(data_dir=tmp_path, workers=1))) as c:
        files = {"file": ("m.json", json.dumps(chain_model(4)), "application/json"),
                 "device_file": ("birch-36.toml", text, "text/plain")}
        r = c.post("/submit", data={"connectivities": ["line"], "compile_only": "true", "strategy": "structured"},
                   files=files, follow_redirects=False)
        assert r.status_code == 303, r.text
        study = c.get("/v1" + r.headers["location"].replace("/studies", "/studies", 1)).json()
        assert study["request"]["device"]["name"] == "birch-36" and study["request"]["connectivities"] is None
        sid = r.headers["location"].rsplit("/", 1)[-1]
        import time

        for _ in range(600):  # the compile-only row (a worker process); then the chip drawing of the row
            if c.get(f"/v1/studies/{sid}").json()["status"] in ("done", "failed"):
                break
            time.sleep(0.1)
        svg = c.get(f"/studies/{sid}/drawings/0.svg")
        assert svg.status_code == 200 and "Device birch-36" in svg.text and "log scale" in svg.text
        bad = {**files, "device_file": ("bad.toml", 'name = "b"\nqubits = 2\nedges = [[0, 0]]\n', "text/plain")}
        r = c.post("/submit", data={"compile_only": "true"}, files=bad)
        assert r.status_code == 422 and "self edge" in r.text


def test_profile_overrides_on_a_builtin_connectivity_steer_placement_too(chain_model):
    from toposcout.compiler.profiles import load_profile
    from toposcout.compiler.study import make_tasks, run_task

    prof = load_profile("superconducting").to_dict()
    prof["edge"] = [{"qubits": [0, 1], "two_qubit_error": 0.08}, {"qubits": [1, 2], "two_qubit_error": 0.08}]
    (t,) = make_tasks(chain_model(3), ["ring:8"], profile=prof, compile_only=True, strategy="structured")
    row = run_task(t)
    assert row["placement_objective"] == "errors" and row["esp_count_placement"] is not None
    assert not {0, 1} <= set(row["layout"].values()) or not {1, 2} <= set(row["layout"].values())
    (t,) = make_tasks(chain_model(3), ["ring:8"], compile_only=True, strategy="structured")
    plain = run_task(t)
    assert plain["placement_objective"] == "count" and "esp_count_placement" not in plain
