"""The real server on a Dask cluster: the server killed while the cluster computes and restarted, the
scheduler killed and brought back, and a small load test: nothing lost, nothing twice."""

from __future__ import annotations

import threading
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


def _wait_finished(server, sid, headers=None, timeout=150.0):
    deadline = time.monotonic() + timeout
    while True:
        st = httpx.get(f"{server.url}/v1/studies/{sid}", headers=headers, timeout=10).json()
        if st["status"] in ("done", "failed", "cancelled") or time.monotonic() > deadline:
            return st
        time.sleep(0.2)


def test_scheduler_killed_mid_study_the_server_completes_it(tmp_path, start_server, chain_model, dask_processes):
    """SIGKILL of the Dask scheduler while the server's rows compute on it; a new scheduler (and
    workers) on the same address: the study finishes, every row once."""
    procs = dask_processes.start_scheduler().start_workers(2)
    srv = _on_dask(start_server(tmp_path / "srv", env={"TOPOSCOUT_DASK_ADDRESS": procs.address}))
    body = {"model": chain_model(8), "connectivities": ["line", "ring", "grid", "all-to-all"],
            "noise_scales": [0.5, 2.0], "seeds": 1, "strategy": "generic"}
    r = httpx.post(srv.url + "/v1/studies", json=body, timeout=30)
    assert r.status_code == 202, r.text
    sid, total = r.json()["id"], r.json()["progress"]["total"]
    client = distributed.Client(procs.address, set_as_default=False)
    try:
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline:
            on_cluster = [k for ks in client.processing().values() for k in ks if str(k).startswith(f"toposcout-{sid}")]
            if on_cluster:
                break
            time.sleep(0.05)
    finally:
        client.close()
    assert on_cluster, "the kill must land while tasks run on the cluster\n" + procs.logs()
    procs.kill_scheduler()
    assert httpx.get(srv.url + "/healthz", timeout=5).status_code == 200  # the API does not depend on it
    time.sleep(1.0)
    procs.start_scheduler().start_workers(2)
    st = _wait_finished(srv, sid)
    assert st["status"] == "done", (st["status"], st["progress"], srv.log()[-3000:], procs.logs())
    assert sorted(row["task_index"] for row in st["rows"]) == list(range(total))
    assert all(row["status"] == "done" and row["simulated_qubits"] == 8 for row in st["rows"])
    # the store counts a row only when its write turned it from pending (record_row's conditional update):
    # done == total with every index present is every row written once
    assert st["progress"] == {"done": total, "total": total}


def test_forty_submissions_from_eight_clients_on_dask(tmp_path, start_server, dask_processes, chain_model):
    """A small load test on a Dask cluster: the per-owner cap exactly enforced under a
    burst, then 40 studies from 8 clients (each retried after a 429 with its Idempotency-Key): 0 lost,
    0 duplicated, 0 5xx."""
    cap = 3
    tokens = {f"client{i}": f"tok-load-{i}-0123456789" for i in range(8)} | {"burst": "tok-burst-0123456789"}
    procs = dask_processes.start_scheduler()  # no workers yet: what is accepted stays queued
    srv = _on_dask(start_server(tmp_path / "srv", tokens=",".join(f"{o}:{t}" for o, t in tokens.items()),
                                env={"TOPOSCOUT_DASK_ADDRESS": procs.address,
                                     "TOPOSCOUT_MAX_ACTIVE_STUDIES_PER_OWNER": str(cap)}))

    def auth(owner):
        return {"Authorization": f"Bearer {tokens[owner]}"}

    def body(seed):
        return {"model": chain_model(3), "connectivities": ["line", "ring"], "compile_only": True, "seeds": 1,
                "seed": seed}

    # 1. the cap under a burst: 12 concurrent submissions of one owner while nothing can finish
    barrier, lock, burst = threading.Barrier(12), threading.Lock(), []

    def one(i):
        with httpx.Client(base_url=srv.url, headers=auth("burst"), timeout=60) as c:
            barrier.wait()
            r = c.post("/v1/studies", json=body(5000 + i))
        with lock:
            burst.append(r)

    threads = [threading.Thread(target=one, args=(i,)) for i in range(12)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(90)
    codes = sorted(r.status_code for r in burst)
    assert codes == [202] * cap + [429] * (12 - cap), codes
    assert all(r.headers.get("retry-after") and "max_active_studies_per_owner=3" in r.json()["detail"]
               for r in burst if r.status_code == 429)

    # 2. the workers join; 8 clients x 5 studies, each client one after the other, retried after a 429
    procs.start_workers(2)
    statuses, errors, ids = [], [], {o: [] for o in tokens if o != "burst"}

    def client(owner):
        k = int(owner[-1])
        with httpx.Client(base_url=srv.url, headers=auth(owner), timeout=60) as c:
            for j in range(5):
                while True:
                    try:
                        r = c.post("/v1/studies", json=body(100 * k + j), headers={"Idempotency-Key": f"{owner}-{j}"})
                    except httpx.TransportError as exc:
                        with lock:
                            errors.append(repr(exc))
                        break
                    with lock:
                        statuses.append(r.status_code)
                    if r.status_code != 429:
                        break
                    time.sleep(0.3)
                if r.status_code == 202:
                    ids[owner].append(r.json()["id"])

    threads = [threading.Thread(target=client, args=(o,)) for o in ids]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert not errors and not [s for s in statuses if s >= 500], (errors, statuses)
    assert set(statuses) <= {202, 429}, statuses
    assert all(len(v) == 5 for v in ids.values()), ids
    everything = [sid for v in ids.values() for sid in v] + [r.json()["id"] for r in burst if r.status_code == 202]
    assert len(set(everything)) == 40 + cap, "no study accepted twice"
    for sid in everything:
        st = _wait_finished(srv, sid, headers=auth("client0"), timeout=120)
        assert st["status"] == "done", (sid, st["status"], st["progress"], srv.log()[-2000:])
        assert sorted(row["task_index"] for row in st["rows"]) == [0, 1] and st["progress"] == {"done": 2, "total": 2}
        assert all(row["status"] == "done" for row in st["rows"])
    # each owner holds exactly its studies: the retries with one Idempotency-Key made none twice
    with httpx.Client(base_url=srv.url, headers=auth("client0"), timeout=30) as c:
        totals = {o: c.get("/v1/studies", params={"owner": o, "limit": 1}).json()["total"] for o in tokens}
    assert totals == {**{o: 5 for o in ids}, "burst": cap}, totals
    print(f"\n{len(statuses)} submissions answered ({statuses.count(429)} x 429), {len(everything)} studies done")
