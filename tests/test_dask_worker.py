"""`toposcout worker`: real worker processes joining a scheduler on loopback."""

from __future__ import annotations

import io
import os
import signal
import subprocess
import sys
import time

import pytest

distributed = pytest.importorskip("distributed")

from toposcout.compiler.study import make_tasks  # noqa: E402
from toposcout.service.cli import main  # noqa: E402
from toposcout.service.execution.dask import DaskExecutor  # noqa: E402


def test_worker_command_joins_with_its_memory_limit_and_threads(tmp_path, chain_model, wait_until, memory_store_class):
    cluster = distributed.LocalCluster(n_workers=0, processes=True, host="127.0.0.1", dashboard_address=None)
    proc = None
    try:
        log = open(tmp_path / "worker.log", "w")
        proc = subprocess.Popen([sys.executable, "-m", "toposcout.service.cli", "worker", cluster.scheduler_address,
                                 "--nworkers", "2", "--memory-limit", "1GiB", "--threads", "1",
                                 "--host", "127.0.0.1", "--name", "probe"],
                                stdout=log, stderr=subprocess.STDOUT, cwd=os.getcwd())
        client = distributed.Client(cluster.scheduler_address, set_as_default=False)
        assert wait_until(lambda: len(client.scheduler_info()["workers"]) == 2, timeout=90), \
            (tmp_path / "worker.log").read_text()[-2000:]
        workers = client.scheduler_info()["workers"].values()
        assert sorted(w["name"] for w in workers) == ["probe-0", "probe-1"]
        assert all(w["memory_limit"] == 2**30 and w["nthreads"] == 1 for w in workers)
        env = client.run(lambda: (os.environ.get("OMP_NUM_THREADS"), "toposcout.compiler.metrics" in sys.modules))
        assert set(env.values()) == {("1", True)}, env
        client.close()
        store = memory_store_class()
        ex = DaskExecutor(store=store, address=cluster.scheduler_address)
        ex.start()
        assert ex.wait_connected(60)
        try:
            # a simulating task carries half the 1 GiB limit as its budget
            t = make_tasks(chain_model(3), ["line", "ring"], seeds=1, strategy="generic", error_budget=False)
            ex.submit("w", list(enumerate(t)))
            assert ex.wait_idle(90)
        finally:
            ex.shutdown()
        rows = store.study_rows("w")
        assert sorted(rows) == [0, 1] and all(r["error"] is None for r in rows.values())
        assert all(r["memory_estimate_bytes"] < 2**29 for r in rows.values())
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=60) == 0
    finally:
        if proc is not None and proc.poll() is None:
            proc.kill()
            proc.wait()
        cluster.close()


@pytest.mark.parametrize("argv, message", [
    (["worker"], "the following arguments are required: scheduler"),
    (["worker", "localhost:8786"], "scheduler address must look like tcp://host:8786"),
    (["worker", "tcp://127.0.0.1:8786", "--memory-limit", "plenty"], "memory limit must be a size like 4GiB"),
    (["worker", "tcp://127.0.0.1:8786", "--nworkers", "0"], "--nworkers must be at least 1"),
])
def test_worker_bad_input_is_a_clear_message(argv, message):
    out, err = io.StringIO(), io.StringIO()
    assert main(argv, out=out, err=err) == 2
    assert message in err.getvalue()
    assert "Traceback" not in err.getvalue()


def test_worker_unreachable_scheduler_is_a_clear_error():
    from toposcout.compiler.errors import ToposcoutError
    from toposcout.service.execution.dask import run_worker

    t0 = time.monotonic()
    with pytest.raises(ToposcoutError, match="cannot start a worker for the scheduler at tcp://127.0.0.1:9"):
        run_worker("tcp://127.0.0.1:9", memory_limit="256MiB", death_timeout=2)
    assert time.monotonic() - t0 < 40


def test_executor_started_before_its_scheduler_catches_up(chain_model, free_port, wait_until, memory_store_class):
    """As in the compose file: the API may come up before the scheduler listens."""
    port = free_port()
    store = memory_store_class()
    ex = DaskExecutor(store=store, address=f"tcp://127.0.0.1:{port}", connect_timeout=1, retry_seconds=0.3)
    ex.start()
    cluster = None
    try:
        tasks = make_tasks(chain_model(3), ["line", "ring"], compile_only=True, seeds=1, strategy="generic")
        ex.submit("late", list(enumerate(tasks)))
        assert wait_until(lambda: ex.last_error is not None, timeout=30)
        assert ex.pending() == 2 and not store.rows
        cluster = distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                                           scheduler_port=port, dashboard_address=None)
        assert ex.wait_idle(90)
        assert sorted(store.study_rows("late")) == [0, 1] and ex.last_error is None
    finally:
        ex.shutdown()
        if cluster is not None:
            cluster.close()


def test_scheduler_lost_mid_study_and_back_loses_nothing(chain_model, free_port, wait_until, memory_store_class):
    port = free_port()

    def new_cluster():
        return distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                        scheduler_port=port, dashboard_address=None)

    cluster = new_cluster()
    store = memory_store_class()
    ex = DaskExecutor(store=store, address=f"tcp://127.0.0.1:{port}", connect_timeout=2, retry_seconds=0.5)
    ex.start()
    try:
        assert ex.wait_connected(60)
        tasks = make_tasks(chain_model(8), ["line", "ring", "grid", "all-to-all"], noise_scales=[1.0, 2.0], seeds=1,
                           strategy="generic")
        ex.submit("lost", list(enumerate(tasks)))
        assert wait_until(lambda: len(store.rows) >= 1, timeout=90)
        cluster.close()
        cluster = None
        left = len(tasks) - len(store.rows)
        assert left > 0, "the scheduler must go while tasks remain"
        time.sleep(3)  # the client gives up on the old scheduler
        cluster = new_cluster()
        assert ex.wait_idle(120)
        assert sorted(store.study_rows("lost")) == list(range(len(tasks)))
        assert set(store.calls.values()) == {1}
        assert all(r["error"] is None for r in store.rows.values())
    finally:
        ex.shutdown()
        if cluster is not None:
            cluster.close()
