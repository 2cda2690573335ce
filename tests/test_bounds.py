"""Bounded parsing and refusals at the door: every reader checks its
counts against the caps as it reads, every enumeration that can explode counts as it goes, values
the simulation cannot take are refused naming the field, CSV cells are neutralised, and a
non-loopback server without tokens refuses to start."""

from __future__ import annotations

import csv
import io
import itertools
import json
import math
import random
import subprocess
import sys
import time
import tracemalloc

import httpx
import networkx as nx
import pytest
from qiskit import QuantumCircuit
from qiskit.quantum_info import Operator

from toposcout.compiler.ansatz import append_term
from toposcout.compiler.errors import CapacityError, ModelError, ProfileError, TargetError
from toposcout.compiler.model import Limits, maximal_cliques, parse_model
from toposcout.compiler.profiles import MAX_OVERRIDES, load_profile
from toposcout.compiler.targets import MAX_CUSTOM_EDGES, make_connectivity, parse_edge_list
from toposcout.service.output import neutralise_cell, write_csv


@pytest.fixture(autouse=True, scope="module")
def _warm():
    """Load what the readers import lazily (networkx's node-link reader, jsonschema), so the time and
    memory bounds below measure the reading, not the first import."""
    parse_model({"nodes": [{"id": 0}], "links": []}, "nodelink")
    parse_model({"variables": ["a"]})
    parse_model("MARKOV\n1\n2\n1\n1 0\n2 1 1\n", "uai")


def _bounded(fn, *, seconds: float = 1.0, megabytes: float = 20.0):
    """Run ``fn`` (which must raise a ToposcoutError) and return the error; fail when it takes
    longer than ``seconds`` or its Python allocations peak above ``megabytes``."""
    tracemalloc.start()
    t0 = time.perf_counter()
    try:
        with pytest.raises((ModelError, CapacityError, TargetError, ProfileError)) as info:
            fn()
    finally:
        elapsed = time.perf_counter() - t0
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
    assert elapsed < seconds, f"took {elapsed:.2f} s"
    assert peak < megabytes * 2**20, f"peaked at {peak / 2**20:.1f} MiB"
    return info.value


def explosive_graph(n: int) -> dict:
    """Every pair joined except within consecutive groups of three: 3^(n/3) maximal cliques
    (Moon & Moser 1965, the extremal graph for the number of maximal cliques)."""
    g = nx.complete_graph(n)
    for k in range(0, n, 3):
        g.remove_edges_from(itertools.combinations(range(k, min(k + 3, n)), 2))
    return nx.node_link_data(g, edges="links")


# --------------------------------------------------------------------------------------- UAI

def test_uai_declaring_a_billion_variables_is_refused_before_any_allocation():
    text = "MARKOV\n1000000000\n2 2\n1\n1 0\n2 1 1\n"
    err = _bounded(lambda: parse_model(text, "uai"), seconds=0.2, megabytes=1)
    assert isinstance(err, CapacityError) and err.field == "variables" and "128" in str(err)


def test_uai_function_count_and_scope_size_are_capped_as_read():
    err = _bounded(lambda: parse_model("MARKOV\n2\n2 2\n999999999\n", "uai"), megabytes=1)
    assert err.field == "factors" and "4096" in str(err)
    text = "MARKOV\n20\n" + " ".join(["2"] * 20) + "\n1\n17 " + " ".join(map(str, range(17))) + "\n"
    err = _bounded(lambda: parse_model(text, "uai"), megabytes=1)
    assert err.field == "factors" and "2**17" in str(err)
    # a table size that is not a plain integer is refused without building the number
    err = _bounded(lambda: parse_model("MARKOV\n1\n2\n1\n1 0\n" + "9" * 5000 + "\n", "uai"))
    assert err.field == "line 6"


def test_uai_many_functions_deduplicate_fast():
    # 4000 functions (all pairs of 90 variables and their singletons): the scopes -> cliques step
    # is not quadratic; the cliques are the 4005 pairs (every singleton lies inside a pair)
    pairs = list(itertools.combinations(range(90), 2))[:3900]
    singles = list(range(90))
    lines = ["MARKOV", "90", " ".join(["2"] * 90), str(len(pairs) + len(singles))]
    lines += [f"2 {a} {b}" for a, b in pairs] + [f"1 {v}" for v in singles]
    lines += ["4 1 2 3 4"] * len(pairs) + ["2 1 1"] * len(singles)
    t0 = time.perf_counter()
    m = parse_model("\n".join(lines), "uai", limits=Limits(max_variables=128, max_terms=10**6))
    assert time.perf_counter() - t0 < 5
    used = {v for p in pairs for v in p}
    assert len(m.cliques) == len(pairs) + len(set(singles) - used)


# --------------------------------------------------------------------------------- node-link

@pytest.mark.parametrize("n", [39, 45])
def test_node_link_graph_with_exponentially_many_cliques_stops_at_the_cap(n):
    graph = explosive_graph(n)
    err = _bounded(lambda: parse_model(graph, "nodelink"), seconds=1.0, megabytes=30)
    assert isinstance(err, CapacityError) and err.field == "links" and "max_cliques" in str(err)


def test_counted_clique_enumeration_matches_networkx():
    # reference: networkx.find_cliques (Bron-Kerbosch with Tomita's pivot) on random graphs
    rng = random.Random(16)
    for trial in range(120):
        n = rng.randint(0, 13)
        g = nx.gnp_random_graph(n, rng.random(), seed=trial)
        adjacency = [0] * n
        for a, b in g.edges:
            adjacency[a] |= 1 << b
            adjacency[b] |= 1 << a
        ours = maximal_cliques(adjacency, max_cliques=10**6, max_steps=10**7)
        assert ours == sorted(sorted(c) for c in nx.find_cliques(g))


def test_clique_step_budget_names_its_cap():
    assert maximal_cliques([], max_cliques=1, max_steps=1) == []
    g = explosive_graph(30)  # 3^10 cliques
    adj = [0] * 30
    for link in g["links"]:
        adj[link["source"]] |= 1 << link["target"]
        adj[link["target"]] |= 1 << link["source"]
    with pytest.raises(CapacityError, match="max_clique_steps"):
        maximal_cliques(adj, max_cliques=10**9, max_steps=500)


def test_node_link_node_and_link_counts_are_capped_before_the_graph_is_built():
    nodes = [{"id": i} for i in range(200)]
    err = _bounded(lambda: parse_model({"nodes": nodes, "links": []}, "nodelink"), megabytes=2)
    assert err.field == "nodes"
    links = [{"source": 0, "target": 1}] * 20001
    err = _bounded(lambda: parse_model({"nodes": [{"id": 0}, {"id": 1}], "links": links}, "nodelink"), megabytes=2)
    assert err.field == "links"
    # links that name nodes nobody listed are refused at the first one, before any graph is built
    links = [{"source": i, "target": i + 1} for i in range(300)]
    err = _bounded(lambda: parse_model({"nodes": [{"id": 0}], "links": links}, "nodelink"))
    assert err.field == "links[0].target" and "not declared" in str(err)


# ------------------------------------------------------------------------------------- JSON model

def test_json_model_counts_are_capped_before_the_schema_check():
    names = [f"v{i}" for i in range(10)]
    big = {"variables": names, "cliques": [["v0"]] * 5000}
    assert _bounded(lambda: parse_model(big)).field == "cliques"
    big = {"variables": names, "cliques": [names], "factors": [{"scope": ["v0"], "values": [1, 1]}] * 5000}
    assert _bounded(lambda: parse_model(big)).field == "factors"
    wide = [f"w{i}" for i in range(17)]
    big = {"variables": wide, "cliques": [wide], "max_order": 2,
           "factors": [{"scope": wide, "values": [1.0] * 4}]}
    assert _bounded(lambda: parse_model(big)).field == "factors[0].scope"


def test_a_models_own_max_order_obeys_the_request_cap():
    m = {"variables": ["a", "b"], "cliques": [["a", "b"]], "max_order": 10**9}
    err = _bounded(lambda: parse_model(m))
    assert err.field == "max_order" and "16" in str(err)
    assert parse_model({**m, "max_order": 16}).max_order == 16


def test_factor_scope_check_against_many_cliques_is_not_quadratic():
    names = [f"v{i}" for i in range(120)]
    cliques = [[names[i], names[j]] for i, j in itertools.combinations(range(120), 2)][:4000]
    factors = [{"scope": c, "values": [1, 2, 3, 4]} for c in cliques]
    t0 = time.perf_counter()
    parse_model({"variables": names, "cliques": cliques, "factors": factors}, limits=Limits(max_terms=10**5))
    assert time.perf_counter() - t0 < 5


def test_angles_above_the_bound_are_refused_naming_the_term():
    base = {"variables": ["a", "b"], "cliques": [["a", "b"]]}
    err = _bounded(lambda: parse_model({**base, "parameters": {"terms": {"a,b": 1e308}}}))
    assert isinstance(err, ModelError) and err.field == "parameters.terms.a,b" and "2π" in str(err)
    err = _bounded(lambda: parse_model({**base, "parameters": {"rotations": {"a": [0.1, -2e6, 0.3]}}}))
    assert err.field == "parameters.rotations.a"
    assert parse_model({**base, "parameters": {"terms": {"a,b": 1e6}}}).parameters["terms"]["a,b"] == 1e6


def test_term_angle_period_is_two_pi_exactly_and_pi_up_to_a_global_phase():
    # the bound's message tells the user to reduce modulo 2π: checked with qiskit.quantum_info.Operator
    def term(theta: float) -> Operator:
        qc = QuantumCircuit(3)
        append_term(qc, (0, 1, 2), theta)
        return Operator(qc)

    theta = 0.37
    assert term(theta + 2 * math.pi).equiv(term(theta)) and term(theta + 2 * math.pi) == term(theta)
    assert term(theta + math.pi).equiv(term(theta)) and not term(theta + math.pi) == term(theta)
    big = 1e6
    assert term(big).equiv(term(math.remainder(big, 2 * math.pi)), atol=1e-8)
    u = QuantumCircuit(1)
    u.u(0.3 + 2 * math.pi, 0.2 - 2 * math.pi, 0.1 + 4 * math.pi, 0)
    ref = QuantumCircuit(1)
    ref.u(0.3, 0.2, 0.1, 0)
    assert Operator(u).equiv(Operator(ref))


# ------------------------------------------------------------------------- custom connectivities

def test_custom_coupling_graph_self_loops_and_duplicate_edges_are_named():
    with pytest.raises(TargetError, match=r"edges\[1\].*itself"):
        make_connectivity("custom", 2, edges=[[0, 1], [1, 1]])
    with pytest.raises(TargetError, match=r"edges\[2\].*repeats edges\[0\]"):
        make_connectivity("custom", 2, edges=[[0, 1], [1, 2], [1, 0]])
    with pytest.raises(TargetError, match="line 3.*repeats line 1"):
        parse_edge_list("0 1\n1 2\n1 0\n")
    err = _bounded(lambda: make_connectivity("custom", 2, edges=[[0, 10**9]]), megabytes=1)
    assert err.field == "edges[0]"
    err = _bounded(lambda: make_connectivity("custom", 2, edges=[[0, 1]] * (MAX_CUSTOM_EDGES + 1)), megabytes=1)
    assert err.field == "edges"
    assert make_connectivity("custom", 3, edges=[[0, 1], [2, 1]]).edges == ((0, 1), (1, 2))


def test_profile_override_tables_are_capped():
    from toposcout.compiler.profiles import PROFILE_NAMES

    d = load_profile(PROFILE_NAMES[0]).to_dict()
    d["qubit"] = [{"index": 0, "t1_us": 50.0}] * (MAX_OVERRIDES + 1)
    assert _bounded(lambda: load_profile(d)).field == "qubit"
    d["qubit"] = [{"index": 10**12, "t1_us": 50.0}]
    assert _bounded(lambda: load_profile(d)).field == "qubit[0].index"


# ---------------------------------------------------------------------------------------- CSV

def test_csv_cells_that_start_a_formula_are_neutralised_numbers_stay_numbers():
    # OWASP "CSV Injection": prefix cells beginning with = + - @ (and tab, CR) with a single quote
    rows = [{"connectivity": "=HYPERLINK(\"http://x.invalid\")", "model": "+1+1", "error": "@SUM(A1)",
             "gate_set": "-2+3", "noise_scale": -0.5, "depth": 7, "note": "\tx", "strategy": "line-4"}]
    buf = io.StringIO()
    write_csv(rows, buf)
    back = next(csv.DictReader(io.StringIO(buf.getvalue())))
    assert back["connectivity"] == "'=HYPERLINK(\"http://x.invalid\")"
    assert back["model"] == "'+1+1" and back["error"] == "'@SUM(A1)" and back["gate_set"] == "'-2+3"
    assert back["note"] == "'\tx" and back["strategy"] == "line-4"
    assert float(back["noise_scale"]) == -0.5 and back["noise_scale"] == "-0.5" and back["depth"] == "7"
    assert neutralise_cell(-1) == -1 and neutralise_cell(None) is None


# --------------------------------------------------------------------------------------- serve

def _serve(args: list[str], env: dict, timeout: float = 60) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "toposcout.service.cli", "serve", *args], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)


@pytest.fixture
def clean_env(tmp_path):
    import os

    env = {k: v for k, v in os.environ.items() if not k.startswith("TOPOSCOUT_")}
    env.update(TOPOSCOUT_DATA_DIR=str(tmp_path), TOPOSCOUT_WORKERS="1")
    return env


@pytest.mark.parametrize("host", ["0.0.0.0", "::", "192.0.2.10", "example.invalid"])
def test_serve_on_a_non_loopback_address_without_tokens_refuses_to_start(host, clean_env, free_port):
    proc = _serve(["--host", host, "--port", str(free_port())], clean_env)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 2, err
    assert "error [host]" in err and "--allow-remote" in err and "Traceback" not in err


def test_serve_on_a_non_loopback_address_starts_with_allow_remote_or_tokens(clean_env, free_port):
    for extra, env in ((["--allow-remote"], clean_env), ([], {**clean_env, "TOPOSCOUT_TOKENS": "alice:s3cret-token"})):
        port = free_port()
        proc = _serve(["--host", "0.0.0.0", "--port", str(port), *extra], env)
        try:
            end = time.monotonic() + 60
            ok = False
            while time.monotonic() < end and proc.poll() is None and not ok:
                try:
                    ok = httpx.get(f"http://127.0.0.1:{port}/healthz", timeout=2).status_code == 200
                except httpx.HTTPError:
                    time.sleep(0.2)
            assert ok, proc.stderr.read() if proc.poll() is not None else "no answer"
        finally:
            import os
            import signal

            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGINT)
                try:
                    proc.wait(20)
                except subprocess.TimeoutExpired:
                    os.killpg(proc.pid, signal.SIGKILL)
                    proc.wait(10)


def test_json_texts_are_counted_before_they_are_decoded():
    from toposcout.service.api.bodies import MAX_JSON_CONTAINERS, parse_json
    from toposcout.compiler.errors import ToposcoutError

    text = "[" + ",".join(["{}"] * (MAX_JSON_CONTAINERS + 1)) + "]"
    err = _bounded(lambda: parse_model(text), seconds=0.5, megabytes=1)
    assert err.field == "body" and str(MAX_JSON_CONTAINERS) in str(err)
    tracemalloc.start()
    try:
        with pytest.raises(ToposcoutError, match="objects and arrays") as info:
            parse_json(b'{"model": "x", "x": ' + text.encode() + b"}")
        assert info.value.field == "body" and tracemalloc.get_traced_memory()[1] < 2**20
    finally:
        tracemalloc.stop()
    assert parse_json(b'{"model": {"variables": ["a"]}}') == {"model": {"variables": ["a"]}}


def test_entries_of_cliques_factors_and_parameters_are_capped_and_values_checked_one_by_one():
    from toposcout.compiler.model import MAX_ENTRIES

    assert _bounded(lambda: parse_model({"variables": ["a"], "cliques": [["a"] * (MAX_ENTRIES + 1)]})).field == "cliques"
    m = {"variables": ["a", "b"], "cliques": [["a", "b"]]}
    many = [{"scope": ["a", "b"], "values": [1, 2, 3, 4]}] * (MAX_ENTRIES // 4 + 1)
    assert _bounded(lambda: parse_model({**m, "factors": many})).field == "factors"
    assert parse_model({**m, "parameters": {"terms": {"a,b": 0.1}}}).parameters == {"terms": {"a,b": 0.1}}
    with pytest.raises(CapacityError):
        parse_model({**m, "parameters": {"terms": {"a,b": [0.1] * 65}}})
    # the schema sees only the first two entries of a table; the rest are checked entry by entry
    names = [f"v{i}" for i in range(12)]
    values = [1.5] * 4096
    values[4000] = "x"
    with pytest.raises(ModelError) as info:
        parse_model({"variables": names, "cliques": [names], "factors": [{"scope": names, "values": values}]})
    assert info.value.field == "factors[0].values[4000]"
    values[4000] = 2.0
    t0 = time.perf_counter()
    parse_model({"variables": names, "cliques": [names], "factors": [{"scope": names, "values": values}] * 16})
    assert time.perf_counter() - t0 < 3


@pytest.mark.parametrize("name, text, needle", [
    ("huge.uai", "MARKOV\n1000000000\n2 2\n1\n1 0\n2 1 1\n", "1000000000 variables"),
    ("cliques.json", json.dumps(explosive_graph(45)), "max_cliques"),
    ("angle.json", json.dumps({"variables": ["a", "b"], "cliques": [["a", "b"]],
                               "parameters": {"terms": {"a,b": 1e308}}}), "parameters.terms"),
])
def test_cli_refuses_the_explosive_files_at_once_with_exit_code_2(tmp_path, name, text, needle):
    from toposcout.service.cli import main

    path = tmp_path / name
    path.write_text(text)
    out, err = io.StringIO(), io.StringIO()
    t0 = time.perf_counter()
    code = main(["compare", str(path), "-c", "line"], out=out, err=err)
    assert code == 2 and needle in err.getvalue() and "Traceback" not in err.getvalue()
    assert time.perf_counter() - t0 < 2
