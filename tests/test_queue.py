"""The work queue in the store: leases, round-robin claims, atomic caps (both stores), queue workers."""

from __future__ import annotations

import io
import os
import signal
import subprocess
import sys
import threading
import time

import httpx
import pytest

from toposcout.service.store import QueueFull, Store, TooManyActive


def _tasks(n: int, tag: str) -> tuple[list[dict], list[str]]:
    tasks = [{"connectivity": {"family": "line", "size": None, "edges": None}, "model": {"name": tag}, "i": i}
             for i in range(n)]
    return tasks, [f"{tag}-key-{i}" for i in range(n)]


def _new(store: Store, n: int, tag: str, owner: str = "alice", **kw) -> str:
    tasks, keys = _tasks(n, tag)
    summary, created, _ = store.create_study(owner=owner, request={"tag": tag}, model_name=tag, tasks=tasks,
                                             keys=keys, **kw)
    assert created
    return summary["id"]


def _row(i: int) -> dict:
    return {"connectivity": "line", "two_qubit_gates": i, "depth": 1}


def test_claims_go_round_robin_across_studies_and_owners(store):
    long = _new(store, 6, "long")
    first = [store.claim_task("w1", 30) for _ in range(2)]
    assert [(c["study_id"], c["task_index"]) for c in first] == [(long, 0), (long, 1)]
    short = _new(store, 1, "short")  # submitted after the long one: served next
    assert store.claim_task("w1", 30)["study_id"] == short
    assert store.claim_task("w1", 30)["study_id"] == long
    # a second owner with one study, the first with two: claims alternate owners, then studies
    a2 = _new(store, 3, "a2")
    bob = _new(store, 3, "bob", owner="bob")
    order = [store.claim_task("w1", 30)["study_id"] for _ in range(4)]
    assert order[0] == bob and order[2] == bob  # bob was never served: first; then every other claim
    assert set(order[1::2]) <= {long, a2} and a2 in order[1::2]
    assert store.get_study(long)["status"] == "running"


def test_a_lapsed_lease_is_taken_again_and_only_the_holder_writes(store):
    sid = _new(store, 1, "lease")
    a = store.claim_task("worker-a", 1.0)
    assert a["attempts"] == 1 and store.claim_task("worker-b", 1.0) is None  # held
    time.sleep(1.2)
    b = store.claim_task("worker-b", 30.0)
    assert (b["study_id"], b["task_index"], b["attempts"]) == (sid, 0, 2)
    assert store.renew_leases("worker-a", 30.0) == set()  # a no longer holds it
    assert store.record_row(sid, 0, _row(1), 0.1, lease_owner="worker-a") is False
    assert store.record_row(sid, 0, _row(2), 0.1, lease_owner="worker-b") is True
    assert store.record_row(sid, 0, _row(3), 0.1, lease_owner="worker-b") is False  # written once
    st = store.get_study(sid)
    assert st["status"] == "done" and st["progress"] == {"done": 1, "total": 1}
    assert st["rows"][0]["two_qubit_gates"] == 2


def test_renew_keeps_a_lease_and_release_gives_it_back(store):
    sid = _new(store, 2, "renew")
    store.claim_task("w", 1.0)
    for _ in range(3):
        time.sleep(0.5)
        assert store.renew_leases("w", 1.0) == {(sid, 0)}
    assert store.claim_task("other", 1.0)["task_index"] == 1  # row 0 is still held
    assert store.release_leases("w") == 1
    again = store.claim_task("other", 1.0)
    assert again["task_index"] == 0 and again["attempts"] == 1  # a clean release does not count
    assert store.queue_counts() == {"pending": 2, "leased": 2}
    store.cancel(sid)
    assert store.renew_leases("other", 1.0) == set() and store.statuses([sid]) == {sid: "cancelled"}


def test_a_dead_local_workers_leases_are_taken_back_at_once(store):
    import socket

    from toposcout.service.execution.local import LocalExecutor
    from toposcout.service.execution.queue import QueueWorker
    from toposcout.service.settings import Settings

    sid = _new(store, 2, "dead")
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    host = socket.gethostname()[:40]
    store.claim_task(f"{host}-{int(dead.stdout)}-deadbeef", 600)  # that process has exited
    store.claim_task(f"elsewhere-{os.getpid()}-cafe0000", 600)    # another host: left to its lease
    qw = QueueWorker(store, lambda leased: LocalExecutor(Settings(), leased, workers=1))
    qw._reclaim_dead()
    again = store.claim_task("next", 30)
    assert (again["study_id"], again["task_index"], again["attempts"]) == (sid, 0, 2)  # the death counts
    assert store.claim_task("next", 30) is None  # row 1 is still leased to the other host's worker


def _fire(url: str, n: int, submit) -> list[str]:
    """``n`` threads, each with its own Store (own engine and connections, as separate API
    processes have), released together; returns each one's outcome."""
    stores = [Store(url, run_migrations=False) for _ in range(n)]
    barrier = threading.Barrier(n)
    out: list[str] = [""] * n

    def go(i):
        barrier.wait()
        try:
            submit(stores[i], i)
            out[i] = "accepted"
        except TooManyActive:
            out[i] = "too-many"
        except QueueFull:
            out[i] = "queue-full"

    threads = [threading.Thread(target=go, args=(i,)) for i in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    for s in stores:
        s.close()
    return out


def test_20_concurrent_submissions_accept_exactly_the_owner_cap(store, database_url):
    # the reported measurement: 20 concurrent submissions against a cap of 8 (PostgreSQL accepted 20)
    out = _fire(database_url, 20, lambda s, i: _new(s, 2, f"c{i}", owner="carol", max_active=8))
    assert out.count("accepted") == 8 and out.count("too-many") == 12, out
    assert store.active_count("carol") == 8


def test_20_concurrent_submissions_respect_the_global_queue_cap(store, database_url):
    out = _fire(database_url, 20, lambda s, i: _new(s, 3, f"q{i}", owner=f"owner{i}", max_queued=10))
    assert out.count("accepted") == 3 and out.count("queue-full") == 17, out  # 3 x 3 tasks <= 10 < 4 x 3
    assert store.queue_counts()["pending"] == 9


# ------------------------------------------------------------------------------- queue workers

def _study_tasks(model: dict, connectivities: list[str], **options) -> tuple[list[dict], list[str]]:
    from toposcout.compiler.model import Model
    from toposcout.compiler.study import make_tasks, task_key

    tasks = make_tasks(Model.from_dict(model), connectivities, **options)
    return tasks, [task_key(t) for t in tasks]


def test_a_short_study_submitted_after_a_long_one_finishes_first(tmp_path, chain_model, small_model, wait_study):
    from toposcout.service.execution.local import LocalExecutor
    from toposcout.service.execution.queue import QueueWorker
    from toposcout.service.settings import Settings

    store = Store(f"sqlite:///{tmp_path / 'q.db'}")
    qw = QueueWorker(store, lambda leased: LocalExecutor(Settings(), leased, workers=1), lease_seconds=10,
                     poll_seconds=0.05)
    thread = threading.Thread(target=qw.run, daemon=True)
    thread.start()
    try:
        tasks, keys = _study_tasks(chain_model(7), ["line", "ring", "grid", "all-to-all", "heavy-hex"],
                                   noise_scales=[0.5, 1.0], seeds=1)
        long, _, _ = store.create_study(owner="a", request={"t": "long"}, model_name="long", tasks=tasks, keys=keys)
        wait_study(store, long["id"], timeout=120, states=("running",))
        tasks, keys = _study_tasks(small_model, ["line"], compile_only=True, seeds=1)
        short, _, _ = store.create_study(owner="a", request={"t": "short"}, model_name="short", tasks=tasks,
                                         keys=keys)
        done_short = wait_study(store, short["id"], timeout=120)
        long_then = store.get_study(long["id"], rows=False)
        assert done_short["status"] == "done"
        assert long_then["status"] == "running" and long_then["progress"]["done"] < long["progress"]["total"], \
            long_then
        assert wait_study(store, long["id"], timeout=300)["status"] == "done"
    finally:
        qw.stop()
        thread.join(30)
        store.close()


def _session_pids(sid: int) -> set[int]:
    """Live (not zombie) processes of session ``sid`` (Linux /proc)."""
    pids = set()
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/stat") as fh:
                stat = fh.read()
        except OSError:
            continue
        fields = stat.rsplit(")", 1)[1].split()
        if fields[0] != "Z" and int(fields[3]) == sid:  # state, ppid, pgrp, session
            pids.add(int(name))
    return pids


def _start_worker(url: str, log, lease: str = "2") -> subprocess.Popen:
    env = {k: v for k, v in os.environ.items() if not k.startswith("TOPOSCOUT_")}
    env.update(TOPOSCOUT_LEASE_SECONDS=lease, TOPOSCOUT_WORKERS="1", PYTHONUNBUFFERED="1")
    return subprocess.Popen([sys.executable, "-m", "toposcout.service.cli", "worker", url], env=env, stdout=log,
                            stderr=subprocess.STDOUT, start_new_session=True)


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_a_killed_queue_worker_loses_nothing_and_leaves_no_compute_process(tmp_path, database_url, k6_model,
                                                                           small_model, wait_until, wait_study):
    Store(database_url).close()
    store = Store(database_url)
    log = open(tmp_path / "worker.log", "ab")
    tasks, keys = _study_tasks(k6_model, ["line", "ring"], noise_scales=[1.0, 2.0], seeds=1)
    study, _, _ = store.create_study(owner="a", request={"t": "k6"}, model_name="k6", tasks=tasks, keys=keys)
    first = _start_worker(database_url, log)
    second = None
    try:
        assert wait_until(lambda: store.queue_counts()["leased"] == 1, timeout=120), (tmp_path / "worker.log"
                                                                                        ).read_text()[-2000:]
        time.sleep(1.0)  # the compute process is running the task now
        before = _session_pids(first.pid)
        assert len(before) >= 2  # the queue worker and its compute process
        os.kill(first.pid, signal.SIGKILL)  # the queue worker only: its compute child must follow it
        first.wait(10)
        assert wait_until(lambda: not _session_pids(first.pid), timeout=5), _session_pids(first.pid)
        second = _start_worker(database_url, log)
        done = wait_study(store, study["id"], timeout=300)
        assert done["status"] == "done" and done["progress"] == {"done": 4, "total": 4}
        assert sorted(r["task_index"] for r in done["rows"]) == [0, 1, 2, 3]
        assert all(r["status"] == "done" and r["state_fidelity"] is not None for r in done["rows"])
    finally:
        for p in (first, second):
            if p is not None and p.poll() is None:
                os.killpg(p.pid, signal.SIGKILL)
                p.wait(10)
        log.close()
        store.close()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_sigkill_of_the_server_leaves_no_worker_behind(tmp_path, start_server, k6_model, wait_until):
    srv = start_server(tmp_path, workers=1, args=["--workers", "2"])
    try:
        body = {"model": k6_model, "connectivities": ["line", "ring"], "noise_scales": [1.0, 2.0], "seeds": 1}
        r = httpx.post(srv.url + "/v1/studies", json=body, timeout=30)
        assert r.status_code == 202, r.text
        sid = r.json()["id"]
        # two API processes answer on one port and share the store
        for _ in range(20):
            assert httpx.get(f"{srv.url}/v1/studies/{sid}", timeout=10).status_code == 200
        assert wait_until(lambda: httpx.get(f"{srv.url}/v1/studies/{sid}", timeout=10).json()["status"] == "running",
                          timeout=120)
        time.sleep(1.0)
        group = _session_pids(srv.proc.pid)
        assert len(group) >= 5, group  # serve, 2 API processes (+ their compile lanes), queue worker, compute
        os.kill(srv.proc.pid, signal.SIGKILL)  # the server alone, not its process group
        srv.proc.wait(10)
        time.sleep(5.0)
        assert _session_pids(srv.proc.pid) == set(), "worker processes outlived their server"
    finally:
        srv.stop()  # SIGKILLs whatever is left of the group


def test_a_full_queue_answers_429_with_retry_after(tmp_path, small_model, make_model):
    from fastapi.testclient import TestClient

    from toposcout.service.api.app import create_app
    from toposcout.service.settings import Settings

    settings = Settings(data_dir=tmp_path, run_workers=False, max_queued_tasks=4)  # nobody takes tasks here
    with TestClient(create_app(settings)) as c:
        body = {"model": small_model, "connectivities": ["line", "ring", "grid"], "compile_only": True, "seeds": 1}
        assert c.post("/v1/studies", json=body).status_code == 202  # 3 tasks queued
        r = c.post("/v1/studies", json={**body, "seed": 5})  # 3 more would make 6 > 4
        assert r.status_code == 429 and int(r.headers["retry-after"]) > 0
        assert "max_queued_tasks=4" in r.json()["detail"]
        one = {**body, "connectivities": ["line"], "seed": 6}
        assert c.post("/v1/studies", json=one).status_code == 202  # 4 fits exactly
        assert "toposcout_queue_length 4" in c.get("/metrics").text


def test_worker_help_names_both_kinds_and_a_bad_count_is_refused(capsys):
    from toposcout.service.cli import main

    assert main(["worker", "--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "database URL" in text and "queue worker" in text and "tcp://host:8786" in text
    err = io.StringIO()
    assert main(["worker", "sqlite:///x.db", "--nworkers", "0"], err=err) == 2
    assert "--nworkers must be at least 1" in err.getvalue()


def test_serve_with_several_api_processes_refuses_a_port_in_use(tmp_path, free_port):
    # every API process listens with SO_REUSEPORT (socket(7)); a port held by a socket without it
    # cannot be shared, and serve says so with exit code 2 before starting anything
    import socket

    port = free_port()
    holder = socket.socket()
    holder.bind(("127.0.0.1", port))
    holder.listen(1)
    try:
        env = {**os.environ, "TOPOSCOUT_DATA_DIR": str(tmp_path), "TOPOSCOUT_RUN_WORKERS": "0"}
        proc = subprocess.run([sys.executable, "-m", "toposcout.service.cli", "serve", "--port", str(port),
                               "--workers", "2"], env=env, capture_output=True, text=True, timeout=120)
    finally:
        holder.close()
    assert proc.returncode == 2, proc.stderr
    assert f"127.0.0.1:{port}" in proc.stderr and "--port" in proc.stderr
