"""The Dask executor on a real LocalCluster of two worker processes (loopback only)."""

from __future__ import annotations

import os
import signal
import threading
import time
from collections import Counter

import pytest

distributed = pytest.importorskip("distributed")

from toposcout.compiler.errors import ToposcoutError  # noqa: E402
from toposcout.compiler.study import make_tasks, run_task  # noqa: E402
from toposcout.service.execution.dask import (  # noqa: E402
    WORKER_PRELOAD,
    DaskExecutor,
    parse_memory,
    precheck_memory,
    task_key_for,
    worker_memory_budget,
)

WORKER_LIMIT = 2 * 2**30


@pytest.fixture(scope="module")
def cluster():
    c = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, memory_limit=WORKER_LIMIT,
                                 host="127.0.0.1", dashboard_address=None, preload=list(WORKER_PRELOAD))
    try:
        yield c
    finally:
        c.close()


@pytest.fixture()
def make_executor(cluster):
    made = []

    def make(store, **kw):
        ex = DaskExecutor(store=store, address=cluster.scheduler_address, **kw)
        ex.start()
        assert ex.wait_connected(60)
        made.append(ex)
        return ex

    yield make
    for ex in made:
        ex.shutdown()


def test_twelve_tasks_equal_the_local_rows(make_executor, chain_model, comparable, memory_store_class):
    tasks = make_tasks(chain_model(4), ["line", "ring", "grid", "all-to-all"], compile_only=True, seeds=2,
                       strategy="auto")
    tasks += make_tasks(chain_model(4), ["line", "ring", "grid", "all-to-all"], compile_only=True, seeds=2,
                        strategy="generic", gate_set="cz")
    tasks += make_tasks(chain_model(3), ["line", "ring", "grid", "all-to-all"], compile_only=False, seeds=1,
                        strategy="generic", error_budget=False)
    assert len(tasks) == 12
    store = memory_store_class()
    ex = make_executor(store)
    ex.submit("s12", list(enumerate(tasks)))
    assert ex.wait_idle(120)
    got = store.study_rows("s12")
    assert sorted(got) == list(range(12))
    assert all(n == 1 for n in store.calls.values())
    for i, task in enumerate(tasks):
        local = comparable(run_task(task))
        remote = comparable(got[i])
        assert remote.get("error") is None, remote.get("error")
        assert remote.keys() == local.keys()
        for k, v in local.items():
            if isinstance(v, float):
                assert remote[k] == pytest.approx(v, rel=1e-9, abs=1e-12), (i, k)
            else:
                assert remote[k] == v, (i, k)
    # the budget travelled with the simulating tasks only
    assert ex.stats["submitted"] == 12 and ex.stats["refused"] == 0


def _worker_running(client, prefix):
    """(worker address, key) of a running task whose key starts with prefix, or None."""
    for addr, keys in client.processing().items():
        for k in keys:
            if str(k).startswith(prefix):
                return addr, k
    return None


def test_sigkill_a_worker_mid_task_loses_nothing(make_executor, cluster, chain_model, wait_until, memory_store_class):
    tasks = make_tasks(chain_model(8), ["line", "ring", "grid", "all-to-all"], noise_scales=[1.0, 2.0], seeds=1,
                       strategy="generic")
    store = memory_store_class()
    ex = make_executor(store)
    client = ex.client
    before = {addr: pid for addr, pid in client.run(os.getpid).items()}
    ex.submit("kill", list(enumerate(tasks)))
    # a task counts as running once the worker started executing it
    hit = None

    def executing():
        nonlocal hit
        found = _worker_running(client, "toposcout-kill-")
        if found is None:
            return False
        states = client.run(lambda dask_worker: {str(k): ts.state for k, ts in dask_worker.state.tasks.items()},
                            workers=[found[0]])
        if states.get(found[0], {}).get(str(found[1])) == "executing":
            hit = found
            return True
        return False

    assert wait_until(executing, timeout=60, step=0.1)
    victim_addr, victim_key = hit
    victim_index = int(str(victim_key).split("-")[2])
    assert ("kill", victim_index) not in store.rows, "the kill must land while the task runs"
    os.kill(before[victim_addr], signal.SIGKILL)
    assert ex.wait_idle(180)
    rows = store.study_rows("kill")
    assert sorted(rows) == list(range(len(tasks)))
    assert set(store.calls.values()) == {1}, "every row exactly once"
    assert all(r["error"] is None and r["simulated_qubits"] == 8 for r in rows.values())
    # the nanny brought a new process up in place of the killed one
    assert wait_until(lambda: len(client.scheduler_info()["workers"]) == 2, timeout=150)
    assert before[victim_addr] not in client.run(os.getpid).values()


def test_restart_while_the_cluster_computes(make_executor, chain_model, wait_until, memory_store_class):
    """The executor (server side) goes away mid-study; a new one resubmits what the store lacks."""
    tasks = make_tasks(chain_model(8), ["line", "ring", "grid"], noise_scales=[1.0, 2.0], seeds=1, strategy="generic")
    store = memory_store_class()
    first = make_executor(store)
    first.submit("rs", list(enumerate(tasks)))
    assert wait_until(lambda: len(store.rows) >= 2, timeout=90)
    first.shutdown()
    done_at_restart = set(store.study_rows("rs"))
    assert len(done_at_restart) < len(tasks), "the restart must happen while tasks remain"
    second = make_executor(store)
    missing = [(i, t) for i, t in enumerate(tasks) if i not in done_at_restart]
    second.submit("rs", missing)
    assert second.wait_idle(120)
    rows = store.study_rows("rs")
    assert sorted(rows) == list(range(len(tasks)))
    assert all(r["error"] is None for r in rows.values())
    # rows recorded before the restart were not run again by the second executor
    assert second.stats["recorded"] == len(missing)


def test_task_over_the_worker_memory_limit_is_refused_before_submission(make_executor, chain_model, memory_store_class):
    budget = worker_memory_budget([WORKER_LIMIT])
    # forced density-matrix: the one method that needs the whole state in memory
    big = dict(make_tasks(chain_model(13, "big"), ["all-to-all"], seeds=1, strategy="generic")[0],
               method="density-matrix")
    small = make_tasks(chain_model(3), ["all-to-all"], seeds=1, strategy="generic", error_budget=False)[0]
    store = memory_store_class()
    ex = make_executor(store)
    ex.submit("mem", [(0, big), (1, small)])
    assert ex.wait_idle(60)
    rows = store.study_rows("mem")
    assert ex.stats["refused"] == 1 and ex.stats["submitted"] == 1
    # the local path with the same budget states the same fact; it keeps the compile figures
    # it computed (noise_error), the refused task computed nothing (error)
    local = run_task(dict(big, memory_budget_bytes=budget))
    assert local["error"] is None and "13 active qubits" in local["noise_error"] and local["two_qubit_gates"] > 0
    assert "13 active qubits" in rows[0]["error"] and "trajectories" in rows[0]["error"]
    assert rows[0]["error_field"] == "memory_budget_bytes"
    assert rows[1]["error"] is None and rows[1]["memory_estimate_bytes"] <= budget


def test_cancel_drops_pending_tasks(make_executor, chain_model, wait_until, memory_store_class):
    tasks = make_tasks(chain_model(6), ["line", "ring", "grid", "all-to-all"], noise_scales=[1.0, 2.0, 3.0], seeds=1,
                       strategy="generic", error_budget=False)
    store = memory_store_class()
    ex = make_executor(store, max_in_flight=2)
    ex.submit("cx", list(enumerate(tasks)))
    assert wait_until(lambda: ex.stats["submitted"] >= 2, timeout=30)
    ex.cancel("cx")
    assert ex.wait_idle(60)
    assert len(store.study_rows("cx")) < len(tasks)
    assert ex.stats["submitted"] <= 4, "bounded: at most max_in_flight on the scheduler"


def test_bounded_in_flight(make_executor, chain_model, memory_store_class):
    tasks = make_tasks(chain_model(3), ["line", "ring", "grid", "all-to-all"], compile_only=True, seeds=1,
                       strategy="generic") * 5
    store = memory_store_class()
    ex = make_executor(store, max_in_flight=3)
    peak = 0
    stop = threading.Event()

    def watch():
        nonlocal peak
        while not stop.is_set():
            with ex._lock:
                peak = max(peak, len(ex._running))
            time.sleep(0.002)

    th = threading.Thread(target=watch)
    th.start()
    ex.submit("b", list(enumerate(tasks)))
    assert ex.wait_idle(60)
    stop.set()
    th.join()
    assert len(store.study_rows("b")) == 20
    assert 1 <= peak <= 3


# --- pure helpers ----------------------------------------------------------------------
def test_precheck_keeps_the_smaller_budget_and_skips_compile_only(chain_model):
    t = make_tasks(chain_model(3), ["line"], seeds=1)[0]
    sent, refused = precheck_memory(t, 10**9)
    assert refused is None and sent["memory_budget_bytes"] == 10**9
    sent, _ = precheck_memory(dict(t, memory_budget_bytes=5 * 10**8), 10**9)
    assert sent["memory_budget_bytes"] == 5 * 10**8
    sent, refused = precheck_memory(dict(t, compile_only=True), 1)
    assert refused is None and sent.get("memory_budget_bytes") is None
    sent, refused = precheck_memory(t, 2**20)  # method auto: the row picks a method that fits
    assert refused is None and sent["memory_budget_bytes"] == 2**20
    _, refused = precheck_memory(dict(t, method="density-matrix"), 2**20)
    assert refused["error_field"] == "memory_budget_bytes" and "3 active qubits" in refused["error"]
    assert refused["connectivity"] == "line" and refused["model"] == "chain3"


def test_helpers():
    assert task_key_for("abc", 3, 1) == "toposcout-abc-3-1"
    assert worker_memory_budget([0, 0]) is None
    assert worker_memory_budget([4 * 2**30, 2 * 2**30]) == 2**30
    assert parse_memory("4GiB") == 4 * 2**30 and parse_memory("2.5GB") == 2_500_000_000
    assert parse_memory("1024") == 1024
    for bad in ("lots", "-1GiB", "4 parsecs", ""):
        with pytest.raises(ToposcoutError, match="memory limit must be a size"):
            parse_memory(bad)


def test_no_address_is_a_clear_error(memory_store_class):
    with pytest.raises(ToposcoutError, match="TOPOSCOUT_DASK_ADDRESS"):
        DaskExecutor(store=memory_store_class())


def test_unreachable_scheduler_tasks_wait_and_the_reason_is_told(chain_model, wait_until, memory_store_class):
    ex = DaskExecutor(store=memory_store_class(), address="tcp://127.0.0.1:9", connect_timeout=1, retry_seconds=0.2)
    ex.start()
    try:
        ex.submit("u", [(0, make_tasks(chain_model(3), ["line"], compile_only=True, seeds=1)[0])])
        assert wait_until(lambda: ex.last_error is not None, timeout=30)
        assert ex.last_error.startswith("cannot reach the Dask scheduler at tcp://127.0.0.1:9: ")
        assert "retrying" in ex.last_error and ex.pending() == 1 and ex.client is None
    finally:
        t0 = time.monotonic()
        ex.shutdown()
    assert time.monotonic() - t0 < 15


def test_a_store_hiccup_loses_no_task(make_executor, chain_model, memory_store):
    class FlakyStore(type(memory_store)):
        """The database is unreachable for the first cache look-up and the first row write."""

        def __init__(self):
            super().__init__()
            self.failures = Counter()

        def task_keys(self, study_id):
            return {0: "k0", 1: "k1"}

        def cached_row(self, key):
            if self.failures["cached_row"] == 0:
                self.failures["cached_row"] += 1
                raise OSError("database unreachable")
            return None

        def record_row(self, study_id, task_index, row, seconds, cached=False):
            if self.failures["record_row"] == 0:
                self.failures["record_row"] += 1
                raise OSError("database unreachable")
            super().record_row(study_id, task_index, row, seconds, cached)

    tasks = make_tasks(chain_model(3), ["line", "ring"], compile_only=True, seeds=1, strategy="generic")
    store = FlakyStore()
    ex = make_executor(store)
    ex.submit("flaky", list(enumerate(tasks)))
    assert ex.wait_idle(60)
    assert sorted(store.study_rows("flaky")) == [0, 1]
    assert store.failures == Counter({"cached_row": 1, "record_row": 1})


@pytest.mark.parametrize("down_seconds", [1.0, 5.0], ids=["client-reconnects", "executor-reconnects"])
def test_sigkill_the_scheduler_mid_study_loses_nothing(dask_processes, chain_model, wait_until, memory_store_class,
                                                       down_seconds):
    """The scheduler dies with the tasks it held; a new one comes up on the same address (with new
    workers: Dask workers stop when their scheduler is gone, their supervisor starts them again).
    Down for less than the client's connect timeout (2 s here), the Dask client reconnects by itself;
    for longer, it gives up and the executor connects anew. Either way every row once, none lost."""
    procs = dask_processes.start_scheduler().start_workers(2)
    tasks = make_tasks(chain_model(8), ["line", "ring", "grid", "all-to-all"], noise_scales=[1.0, 2.0], seeds=1,
                       strategy="generic")
    store = memory_store_class()
    ex = DaskExecutor(store=store, address=procs.address, connect_timeout=2, retry_seconds=0.5, split_rows=False)
    ex.start()
    try:
        assert ex.wait_connected(60)
        ex.client.wait_for_workers(2, timeout=60)
        ex.submit("sk", list(enumerate(tasks)))
        assert wait_until(lambda: len(store.rows) >= 1 and _worker_running(ex.client, "toposcout-sk-") is not None,
                          timeout=90, step=0.05), procs.logs()
        procs.kill_scheduler()
        recorded_at_kill = len(store.rows)
        assert recorded_at_kill < len(tasks), "the kill must land while tasks remain"
        time.sleep(down_seconds)
        procs.start_scheduler().start_workers(2)
        assert ex.wait_idle(120), (ex.pending(), dict(ex.stats), procs.logs())
    finally:
        ex.shutdown()
    rows = store.study_rows("sk")
    assert sorted(rows) == list(range(len(tasks)))
    assert set(store.calls.values()) == {1}, "every row exactly once"
    assert all(r["error"] is None and r["simulated_qubits"] == 8 for r in rows.values())
    # the tasks that were on the dead scheduler were sent again, and that loss cost no failed attempt
    assert ex.stats["scheduler_lost"] >= 1 and ex.stats["resubmitted"] == 0, dict(ex.stats)
