"""One row split across workers (``toposcout.compiler.parts``): same figures within standard error.

Reference: a trajectory average and a binomial return count are means of independent samples,
so the same row computed from two disjoint sets of samples (other seeds) must agree within
about 3 standard errors of the difference (the normal approximation; Dalibard, Castin &
Molmer, PRL 68, 580 (1992) for the trajectories). The seed-range rule of DEVELOPERS.md
("Simulation methods") is checked directly: a part with a seed offset repeats exactly the
trajectories of the unsplit run at those positions, and parts never overlap.
"""

from __future__ import annotations

import math

import pytest

from toposcout.compiler import build_ansatz, compile_ansatz, get_gate_set, make_connectivity, parse_model
from toposcout.compiler import trajectories as T
from toposcout.compiler.clifford import Tally, ToposcoutError
from toposcout.compiler.metrics import clique_indices
from toposcout.compiler.noise import schedule
from toposcout.compiler.parts import plan_row, run_split
from toposcout.compiler.profiles import load_profile
from toposcout.compiler.simulate import simulate_ideal
from toposcout.compiler.study import make_tasks, run_task


def _close(a: dict, b: dict, key: str, k: float = 3.0) -> None:
    se = math.hypot(a[f"{key}_se"] or 0.0, b[f"{key}_se"] or 0.0)
    assert se > 0 and abs(a[key] - b[key]) <= k * se, (key, a[key], b[key], se)


def test_a_seed_offset_takes_the_seeds_of_those_positions_of_the_unsplit_run(chain_model):
    m = parse_model(chain_model(4))
    ansatz = build_ansatz(m, seed=0)
    compiled = compile_ansatz(ansatz, make_connectivity("line", 4), get_gate_set("cx"), strategy="structured", seeds=1)
    profile = load_profile("superconducting", noise_scale=4.0)
    sched = schedule(compiled, profile)
    amps = simulate_ideal(sched).amplitudes
    kw = dict(ideal_amplitudes=amps, seed=3, method="statevector")
    whole = T.run_trajectories(sched, profile, clique_indices(m), n_trajectories=30, **kw)
    tail = T.run_trajectories(sched, profile, clique_indices(m), n_trajectories=12, seed_offset=18, **kw)
    assert tail.fidelities == pytest.approx(whole.fidelities[18:], abs=1e-12)
    assert len(set(round(f, 12) for f in whole.fidelities)) > 3   # trajectories differ from each other


_CLIFFORD_KEYS = ["clifford_state_fidelity", "clifford_read_fidelity", "clifford_budget_state_two_qubit"]


# clifford rows of 22 variables: a span of rank 22 is above the exact limit (20), so the parts
# really sample: counted returns at noise scale 2, the weighted stabilizer average at 15
@pytest.mark.parametrize("opts,keys,n,scale", [
    (dict(method="trajectories", trajectories=240), ["state_fidelity", "clique_hellinger_mean",
                                                     "budget_state_two_qubit"], 6, 2.0),
    (dict(method="trajectories", precision=0.03, error_budget=False), ["state_fidelity", "hellinger_fidelity"],
     6, 2.0),
    (dict(method="clifford"), _CLIFFORD_KEYS, 22, 2.0),
    (dict(method="clifford"), _CLIFFORD_KEYS, 22, 15.0),
], ids=["trajectories", "precision", "clifford-returns", "clifford-weighted"])
def test_a_row_in_two_parts_has_the_fields_and_figures_of_the_row_in_one(chain_model, opts, keys, n, scale):
    task = make_tasks(chain_model(n), ["line"], seeds=1, strategy="structured", noise_scale=scale, **opts)[0]
    one = run_task(task)
    two = run_split(task, 2)
    assert one["noise_error"] is None and two["noise_error"] is None
    assert set(two) - set(one) == {"row_parts"} and set(one) <= set(two)
    assert two["row_parts"] == 2 and two["method"] == one["method"]
    for k in ("two_qubit_gates", "depth", "esp", "duration_us"):
        assert two[k] == one[k]
    for k in keys:
        _close(one, two, k)
    if "trajectories" in opts:
        assert two["trajectories"] == one["trajectories"] == 240
    if opts.get("precision"):
        # pooled over the parts: about the requested standard error
        assert two["state_fidelity_se"] < 0.03 * 1.25 and "2 of 2 parts" in two["trajectories_stop"]
    if opts["method"] == "clifford":
        assert two["clifford_estimator"] == one["clifford_estimator"] == (
            "counted returns" if scale == 2.0 else "weighted stabilizer average")
        drawn = two["clifford_shots"] if scale == 2.0 else two["clifford_samples"]
        assert drawn >= 2 * 2048 and two["clifford_state_fidelity_se"] <= 0.05 * 1.25 * two["clifford_state_fidelity"]


def test_rows_that_cannot_be_split_come_back_whole(chain_model):
    dm = make_tasks(chain_model(4), ["line"], seeds=1, strategy="structured", error_budget=False)[0]
    plan = plan_row(dm, 2)
    assert plan["parts"] == [] and plan["row"]["method"] == "density-matrix"
    whole = run_task(dm)
    assert plan["row"]["state_fidelity"] == pytest.approx(whole["state_fidelity"], abs=1e-12)
    # the row says what run_task says: its compilation was not reused from an earlier row
    assert plan_row(dict(dm, seed=7), 2)["row"]["compile_reused"] is False
    bad = dict(dm, connectivity={"family": "line", "size": "2", "edges": None})   # too small for 4 variables
    assert plan_row(bad, 2)["row"]["error_field"] == "connectivity"
    with pytest.raises(ToposcoutError):
        plan_row(dm, 0)


def test_tallies_add_up_and_refuse_another_twin():
    a = Tally(100, 40, 30, 6, 6, 10, 0.5)
    b = Tally(50, 10, 9, 6, 6, 10, 0.25)
    s = a + b
    assert (s.shots, s.returns, s.read_returns, s.parts) == (150, 50, 39, 2)
    assert Tally.from_dict(s.to_dict()) == s
    with pytest.raises(ToposcoutError):
        a + Tally(10, 1, 1, 5, 6, 10)


def test_the_cli_pool_splits_one_row_across_two_workers(chain_model):
    from toposcout.service.execution.runner import parts_per_row, run_tasks

    task = make_tasks(chain_model(6), ["line"], seeds=1, strategy="structured", noise_scale=2.0,
                      method="trajectories", trajectories=200, error_budget=False)[0]
    assert parts_per_row([task], 2) == 2 and parts_per_row([task, task], 2) == 1
    assert parts_per_row([dict(task, compile_only=True)], 2) == 1
    (split,) = run_tasks([task], workers=2)
    one = run_task(task)
    assert split["row_parts"] == 2 and split["trajectories"] == 200
    _close(one, split, "state_fidelity")


def test_the_dask_executor_splits_one_row_across_two_workers(chain_model, memory_store_class):
    distributed = pytest.importorskip("distributed")
    from toposcout.service.execution.dask import WORKER_PRELOAD, DaskExecutor

    task = make_tasks(chain_model(22), ["line"], seeds=1, strategy="structured", noise_scale=2.0,
                      method="clifford")[0]
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, memory_limit=2 * 2**30,
                                  host="127.0.0.1", dashboard_address=None, preload=list(WORKER_PRELOAD)) as c:
        store = memory_store_class()
        ex = DaskExecutor(store=store, address=c.scheduler_address)
        ex.start()
        try:
            assert ex.wait_connected(60)
            ex.submit("split", [(0, task)])
            assert ex.wait_idle(120)
        finally:
            ex.shutdown()
    row = store.study_rows("split")[0]
    assert ex.stats["split"] == 1 and row["row_parts"] == 2 and row["error"] is None
    _close(run_task(task), row, "clifford_state_fidelity")
