"""Method choice, rows that keep what was computed, bad method options (library, CLI, API).

Outside references: the exact density matrix (qiskit-aer) for the forced methods' figures;
the Clifford estimate is checked by tests/test_clifford.py (its own module).
"""

from __future__ import annotations

import time

import pytest
from fastapi.testclient import TestClient

from toposcout.compiler.errors import CapacityError, ModelError
from toposcout.compiler.methods import check_method_options, plan_method, trajectories_needed
from toposcout.compiler.model import parse_model
from toposcout.compiler.noise import schedule
from toposcout.compiler.profiles import load_profile
from toposcout.compiler.simulate import estimate_memory_bytes
from toposcout.compiler.study import make_tasks, run_task
from toposcout.compiler import build_ansatz, compile_ansatz, get_gate_set, make_connectivity

CHAIN6 = {"name": "chain6", "variables": [f"x{i}" for i in range(6)],
          "cliques": [[f"x{i}", f"x{i + 1}"] for i in range(5)]}


def _sched(n_vars: int = 6):
    m = parse_model({"name": "c", "variables": [f"x{i}" for i in range(n_vars)],
                     "cliques": [[f"x{i}", f"x{i + 1}"] for i in range(n_vars - 1)]})
    a = build_ansatz(m, seed=0)
    c = compile_ansatz(a, make_connectivity("line", n_vars), get_gate_set("cx"), strategy="structured", seeds=1)
    p = load_profile("superconducting")
    return schedule(c, p), p


def test_auto_picks_density_matrix_then_trajectories_then_clifford():
    sched, p = _sched()
    assert plan_method(sched, p, memory_budget_bytes=2**34).method == "density-matrix"
    tight = estimate_memory_bytes(4)
    plan = plan_method(sched, p, memory_budget_bytes=tight, time_budget_seconds=300)
    assert plan.method == "trajectories" and plan.trajectory_method == "statevector"
    assert "over the memory budget" in plan.reason and plan.estimate_seconds <= 300
    plan = plan_method(sched, p, memory_budget_bytes=tight, time_budget_seconds=1e-6)
    assert plan.method == "clifford" and "time budget" in plan.reason


def test_forced_methods_that_cannot_do_the_row_say_which_would():
    sched, p = _sched()
    dm = plan_method(sched, p, method="density-matrix", memory_budget_bytes=estimate_memory_bytes(4))
    assert dm.method is None and dm.error_field == "method"
    assert "--method trajectories" in dm.error and "--method clifford" in dm.error and "GiB" in dm.error
    tr = plan_method(sched, p, method="trajectories", memory_budget_bytes=2**34, time_budget_seconds=1e-6)
    assert tr.method is None and tr.error_field == "time_budget_seconds" and "--time-budget" in tr.error


def test_trajectories_needed_is_the_binomial_count():
    # a trajectory's fidelity is ~0 or ~1: variance F(1-F), so N = F(1-F)/SE^2 (binomial)
    assert trajectories_needed(0.5, 0.01) == 2500
    assert trajectories_needed(1.0, 0.01) == 32  # the floor


@pytest.mark.parametrize("kw,field", [
    ({"method": "magic"}, "method"),
    ({"precision": 0.0}, "precision"),
    ({"precision": 1.0}, "precision"),
    ({"trajectories": 0}, "trajectories"),
    ({"trajectories": 10, "precision": 0.1}, "precision"),
    ({"time_budget_seconds": -1}, "time_budget_seconds"),
])
def test_bad_method_options_name_the_option_before_work(kw, field):
    with pytest.raises(ModelError) as e:
        make_tasks(CHAIN6, ["line"], **kw)
    assert e.value.field == field
    opts = dict(method="auto", precision=None, trajectories=None, time_budget_seconds=None)
    opts.update(kw)
    with pytest.raises(ModelError):
        check_method_options(opts.pop("method"), **opts)


def test_forced_density_matrix_past_memory_is_refused_before_work():
    with pytest.raises(CapacityError) as e:
        make_tasks(CHAIN6, ["line"], method="density-matrix", memory_budget_bytes=estimate_memory_bytes(4))
    assert e.value.field == "method" and "trajectories" in str(e.value)


def test_a_row_that_cannot_get_noise_figures_keeps_its_compile_figures_and_others_complete():
    tasks = make_tasks(CHAIN6, ["line", "ring"], seeds=1, strategy="structured", error_budget=False, precision=0.1)
    rows = [run_task(dict(tasks[0], method="trajectories", time_budget_seconds=1e-6)), run_task(tasks[1])]
    bad, good = rows
    assert bad["error"] is None and bad["noise_error_field"] == "time_budget_seconds"
    assert "--time-budget" in bad["noise_error"] and bad["two_qubit_gates"] > 0 and bad["depth"] > 0
    assert bad.get("state_fidelity") is None and bad["esp"] > 0  # cheap figures still there
    assert good["noise_error"] is None and good["method"] == "density-matrix" and 0 < good["state_fidelity"] < 1


def test_every_method_fills_its_row_and_names_itself():
    t = make_tasks(CHAIN6, ["line"], seeds=1, strategy="structured", error_budget=False)[0]
    exact = run_task(t)
    traj = run_task(dict(t, method="trajectories", precision=0.03))
    cliff = run_task(dict(t, method="clifford"))
    assert exact["method"] == "density-matrix" and exact.get("state_fidelity_se") is None
    assert traj["method"] == "trajectories" and traj["trajectory_method"] == "statevector"
    assert traj["state_fidelity_se"] < 0.03 and traj["trajectories"] >= 32
    assert abs(traj["state_fidelity"] - exact["state_fidelity"]) <= 3 * traj["state_fidelity_se"]
    assert cliff["method"] == "clifford" and cliff["clifford_state_fidelity"] > 0 and "estimate" in cliff["clifford_label"]
    for r in (exact, traj, cliff):
        assert r["method_reason"].startswith(("auto", "forced")) and r["two_qubit_gates"] == exact["two_qubit_gates"]


def test_error_budget_and_requirement_past_the_density_matrix():
    # memory budget below the density matrix: auto runs trajectories with their error budget,
    # and the fidelity-target requirement bisects on the clifford estimate
    t = make_tasks(CHAIN6, ["line"], seeds=1, strategy="structured", memory_budget_bytes=estimate_memory_bytes(4),
                   trajectories=64, fidelity_target=0.5)[0]
    r = run_task(t)
    assert r["method"] == "trajectories" and r["noise_error"] is None
    for s in ("two_qubit", "one_qubit", "idle"):
        assert r[f"budget_state_{s}"] is not None and r[f"budget_state_{s}_se"] > 0
    assert r["budget_readout"] is not None
    assert r["threshold_method"] == "clifford" and r["threshold_two_qubit_error"] > 0


@pytest.fixture(scope="module")
def api(tmp_path_factory):
    from toposcout.service.api.app import create_app
    from toposcout.service.settings import Settings

    settings = Settings(data_dir=tmp_path_factory.mktemp("methods"), workers=1, tokens="dora:dora-secret-1")
    with TestClient(create_app(settings)) as c:
        c.headers["Authorization"] = "Bearer dora-secret-1"
        yield c


def test_api_method_field_and_row_fields(api):
    bad = api.post("/v1/studies", json={"model": CHAIN6, "method": "magic"})
    assert bad.status_code == 422 and bad.json()["field"] == "method"
    bad = api.post("/v1/studies", json={"model": CHAIN6, "precision": 0})
    assert bad.status_code == 422 and bad.json()["field"] == "precision"
    # 20 variables: over the server's density-matrix cap, accepted with method auto
    v20 = {"name": "v20", "variables": [f"x{i}" for i in range(20)],
           "cliques": [[f"x{i}", f"x{i + 1}"] for i in range(19)]}
    bad = api.post("/v1/studies", json={"model": v20, "method": "density-matrix"})
    assert bad.status_code == 422 and bad.json()["field"] == "method"
    ok = api.post("/v1/studies", json={"model": CHAIN6, "connectivities": ["line"], "method": "trajectories",
                                       "precision": 0.05, "seeds": 1, "strategy": "structured"})
    assert ok.status_code in (201, 202), ok.text
    sid = ok.json()["id"]
    end = time.monotonic() + 120
    while time.monotonic() < end:
        body = api.get(f"/v1/studies/{sid}").json()
        if body["status"] in ("done", "failed", "cancelled"):
            break
        time.sleep(0.2)
    (row,) = body["rows"]
    assert row["method"] == "trajectories" and row["state_fidelity_se"] < 0.05 and row["noise_error"] is None
    assert row["clique_hellinger_worst"] and len(row["clique_hellinger"]) == 5
    api.cookies.set("toposcout_token", "dora-secret-1")  # the dashboard reads its token from a cookie
    page = api.get(f"/studies/{sid}")
    assert page.status_code == 200 and "Clique marginals" in page.text and "trajectories" in page.text
    assert row["clique_hellinger_worst"].split(",")[0] in page.text


def test_a_weakly_entangled_row_runs_as_matrix_product_states_an_entangled_one_as_a_statevector():
    # from 16 active qubits a 2-trajectory MPS pilot (bond cap 16) decides. The decision: MPS when
    # its trajectories plus the full-distribution saves of the first 128 are estimated cheaper
    sched, profile = _sched(16)
    cheap = plan_method(sched, profile, method="trajectories", memory_budget_bytes=8 * 2**30, trajectories=2000,
                        time_budget_seconds=1e6, mps_pilot_seconds=lambda: 0.005)
    costly = plan_method(sched, profile, method="trajectories", memory_budget_bytes=8 * 2**30, trajectories=2000,
                         time_budget_seconds=1e6, mps_pilot_seconds=lambda: 10.0)
    few = plan_method(sched, profile, method="trajectories", memory_budget_bytes=8 * 2**30, trajectories=8,
                      time_budget_seconds=1e6, mps_pilot_seconds=lambda: 0.005)
    assert cheap.trajectory_method == "matrix_product_state" and "matrix_product_state" in cheap.reason
    assert costly.trajectory_method == "statevector"
    assert few.trajectory_method == "statevector"  # 8 trajectories all save the distribution: no gain
    small, p6 = _sched(6)
    assert plan_method(small, p6, method="trajectories", memory_budget_bytes=8 * 2**30, trajectories=2000,
                       time_budget_seconds=1e6, mps_pilot_seconds=lambda: 1e-6).trajectory_method == "statevector"
    # what the pilot measures: a chain keeps bond 2, every pair of 16 variables joined (all-to-all)
    # reaches the pilot's cap of 16 (then the estimate is scaled by (256/16)^3 and the statevector stays)
    from toposcout.compiler import trajectories as T
    from toposcout.compiler.metrics import clique_indices

    dense = parse_model({"name": "k16", "variables": [f"x{i}" for i in range(16)],
                         "cliques": [[f"x{i}", f"x{j}"] for i in range(16) for j in range(i + 1, 16)]})
    c = compile_ansatz(build_ansatz(dense, seed=0), make_connectivity("all-to-all", 16), get_gate_set("cx"),
                       strategy="structured", seeds=1)
    ds = schedule(c, profile)
    for s_, model_cliques, below in ((sched, [(i, i + 1) for i in range(15)], True), (ds, clique_indices(dense), False)):
        run = T.run_trajectories(s_, profile, model_cliques, n_trajectories=2, method="matrix_product_state",
                                 max_bond=16, distribution_trajectories=0)
        assert (run.bond_reached < 16) is below, run.bond_reached


def test_the_time_budget_is_held_against_the_estimate_on_the_workers_of_a_split_row():
    from toposcout.compiler.methods import trajectory_cost

    sched, profile = _sched(16)
    est = trajectory_cost(sched.num_qubits, len(sched.circuit.data)) * 1000
    kw = dict(method="auto", memory_budget_bytes=2**30, trajectories=1000, time_budget_seconds=0.7 * est)
    whole = plan_method(sched, profile, **kw)
    split = plan_method(sched, profile, parts=2, **kw)
    assert whole.method == "clifford" and split.method == "trajectories"
    assert "on 2 workers" in split.reason and split.estimate_seconds == pytest.approx(est)
