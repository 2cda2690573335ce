"""The local executor: worker processes, rows equal to run_task, cache sharing, time limit, cancel."""

from __future__ import annotations

import os
import time

import pytest

from toposcout.compiler.study import make_tasks, run_task, task_key
from toposcout.service.execution.local import LocalExecutor
from toposcout.service.settings import Settings
from toposcout.service.store import Store


@pytest.fixture(scope="module")
def env(tmp_path_factory):
    store = Store(f"sqlite:///{tmp_path_factory.mktemp('ex') / 'ex.db'}")
    ex = LocalExecutor(Settings(workers=1, task_time_limit_seconds=120), store)
    ex.start()
    yield store, ex
    ex.shutdown()
    store.close()


def _study(store: Store, tasks: list[dict], tag: str) -> str:
    s, _, pending = store.create_study(owner="t", request={"tag": tag}, model_name=tag, tasks=tasks,
                                       keys=[task_key(t) for t in tasks])
    return s["id"], pending


def test_rows_equal_run_task_and_identical_work_is_shared(env, small_model, comparable, wait_study):
    store, ex = env
    tasks = make_tasks(small_model, ["line", "ring"], compile_only=True, seeds=2, keep_circuit=True)
    a, pa = _study(store, tasks, "a")
    b, pb = _study(store, tasks, "b")  # same tasks, submitted while a runs
    ex.submit(a, pa)
    ex.submit(b, pb)
    ra, rb = wait_study(store, a)["rows"], wait_study(store, b)["rows"]
    expected = [comparable(run_task(t)) for t in tasks]
    assert [comparable(r) for r in ra] == expected
    assert [comparable(r) for r in rb] == expected
    assert not any(r["cached"] for r in ra) and all(r["cached"] for r in rb)  # computed once
    assert all(store.circuit(a, i) for i in range(len(tasks)))


def test_time_limit_fails_the_row_with_the_reason_and_the_worker_is_replaced(env, k6_model, small_model, wait_study):
    store, ex = env
    slow = make_tasks(k6_model, ["line"], compile_only=False, seeds=1, fidelity_target=0.5)[0]  # several seconds
    quick = make_tasks(small_model, ["grid"], compile_only=True, seeds=1)[0]
    ex.time_limit = 1.0
    try:
        sid, pending = _study(store, [slow, quick], "limit")
        t0 = time.monotonic()
        ex.submit(sid, pending)
        got = wait_study(store, sid)
    finally:
        ex.time_limit = 120.0
    slow_row, quick_row = got["rows"]
    assert slow_row["status"] == "failed" and slow_row["error_field"] == "task_time_limit"
    assert "time limit of 1 s" in slow_row["error"]
    assert quick_row["status"] == "done" and quick_row["error"] is None  # the other row still completes
    assert got["status"] == "done"
    assert store.cached_row(task_key(slow)) is None  # a time-out is not cached: a retry may succeed
    assert time.monotonic() - t0 < 60


def test_cancel_stops_the_running_task_and_drops_queued_ones(env, k6_model):
    store, ex = env
    slow = make_tasks(k6_model, ["ring", "grid"], compile_only=False, seeds=1, fidelity_target=0.5, seed=7)
    sid, pending = _study(store, slow, "cancel")
    before = ex.stats["stopped"]
    ex.submit(sid, pending)
    end = time.monotonic() + 30
    while store.get_study(sid, rows=False)["status"] != "running":
        assert time.monotonic() < end
        time.sleep(0.05)
    store.cancel(sid)
    ex.cancel(sid)
    end = time.monotonic() + 10
    while ex.pending(sid):
        assert time.monotonic() < end, "cancel did not stop the running task"
        time.sleep(0.05)
    assert ex.stats["stopped"] == before + 1
    got = store.get_study(sid)
    assert got["status"] == "cancelled" and {r["status"] for r in got["rows"]} == {"cancelled"}


def test_a_dead_worker_fails_only_its_row(env, k6_model, small_model, wait_study):
    store, ex = env
    slow = make_tasks(k6_model, ["all-to-all"], compile_only=False, seeds=1, fidelity_target=0.5, seed=3)[0]
    quick = make_tasks(small_model, ["line"], compile_only=True, seeds=1, seed=5)[0]
    sid, pending = _study(store, [slow, quick], "dead")
    ex.submit(sid, pending)
    end = time.monotonic() + 30
    while store.get_study(sid, rows=False)["status"] != "running":
        assert time.monotonic() < end
        time.sleep(0.05)
    time.sleep(0.3)
    worker = ex._slots[0].proc
    assert worker is not None and worker.pid != os.getpid()  # tasks run in another process
    os.kill(worker.pid, 9)
    got = wait_study(store, sid)
    assert got["rows"][0]["status"] == "failed" and got["rows"][0]["error_field"] == "worker"
    assert "exited" in got["rows"][0]["error"]
    assert got["rows"][1]["status"] == "done"


def test_one_row_is_split_across_the_idle_worker_processes(tmp_path, chain_model, wait_study):
    # a clifford row of 22 variables (above the exact-span limit: its parts really sample) on a
    # 2-process executor: planned, run as 2 parts on both processes and merged, with the figures
    # of the unsplit row within their standard errors; a compile-only row is never split
    import math

    store = Store(f"sqlite:///{tmp_path / 'split.db'}")
    ex = LocalExecutor(Settings(workers=2, task_time_limit_seconds=300), store)
    ex.start()
    try:
        row_task = make_tasks(chain_model(22), ["line"], seeds=1, strategy="structured", noise_scale=2.0,
                              method="clifford")[0]
        sid, pending = _study(store, [row_task], "split")
        ex.submit(sid, pending)
        (row,) = wait_study(store, sid, timeout=300)["rows"]
        assert row["error"] is None and row["row_parts"] == 2 and ex.stats["split"] == 1
        whole = run_task(row_task)
        se = math.hypot(row["clifford_state_fidelity_se"], whole["clifford_state_fidelity_se"])
        assert se > 0 and abs(row["clifford_state_fidelity"] - whole["clifford_state_fidelity"]) <= 3 * se
        assert row["two_qubit_gates"] == whole["two_qubit_gates"]
        compile_only = make_tasks(chain_model(4), ["line"], seeds=1, compile_only=True)
        sid2, pending2 = _study(store, compile_only, "whole")
        ex.submit(sid2, pending2)
        (row2,) = wait_study(store, sid2)["rows"]
        assert row2["error"] is None and not row2.get("row_parts") and ex.stats["split"] == 1
    finally:
        ex.shutdown()
        store.close()
