"""The real server on a Dask cluster: killed while the cluster computes, restarted, nothing lost."""

from __future__ import annotations

import time

import httpx
import pytest

distributed = pytest.importorskip("distributed")

from toposcout.service.execution.dask import WORKER_PRELOAD  # noqa: E402


def _on_dask(server):
    health = httpx.get(server.url + "/healthz", timeout=5)
    assert health.json().get("executor") == "DaskExecutor", health.text
    return server


def test_server_killed_mid_study_and_restarted_completes(tmp_path, start_server, chain_model):
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, memory_limit="2GiB",
                                       host="127.0.0.1", dashboard_address=None, preload=list(WORKER_PRELOAD))
    first = second = None
    try:
        first = _on_dask(start_server(tmp_path, env={"TOPOSCOUT_DASK_ADDRESS": cluster.scheduler_address}))
        body = {"model": chain_model(8), "connectivities": ["line", "ring", "grid", "all-to-all"],
                "noise_scales": [0.5, 2.0], "seeds": 1, "strategy": "generic"}
        r = httpx.post(first.url + "/v1/studies", json=body, timeout=30)
        assert r.status_code == 202, r.text
        sid, total = r.json()["id"], r.json()["progress"]["total"]
        assert total == 8

        def progress(server):
            return httpx.get(f"{server.url}/v1/studies/{sid}", timeout=10).json()

        deadline = time.monotonic() + 90
        while progress(first)["progress"]["done"] < 2 and time.monotonic() < deadline:
            time.sleep(0.1)
        client = distributed.Client(cluster.scheduler_address, set_as_default=False)
        try:
            on_cluster = [k for ks in client.processing().values() for k in ks if str(k).startswith("toposcout-")]
        finally:
            client.close()
        first.proc.kill()  # no shutdown at all: the server dies while the cluster computes
        first.proc.wait(10)
        assert on_cluster, "the kill must land while tasks run on the cluster"
        second = _on_dask(first.restarted())
        deadline = time.monotonic() + 150
        st = progress(second)
        while st["status"] not in ("done", "failed") and time.monotonic() < deadline:
            time.sleep(0.2)
            st = progress(second)
        assert st["status"] == "done", (st["status"], st["progress"], second.log()[-3000:])
        indices = [row["task_index"] for row in st["rows"]]
        assert sorted(indices) == list(range(total))
        assert all(row["status"] == "done" and row["simulated_qubits"] == 8 for row in st["rows"])
        assert st["progress"] == {"done": total, "total": total}
    finally:
        for server in (first, second):
            if server is not None:
                server.stop()
        cluster.close()
