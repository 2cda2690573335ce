"""Reading and preparing a request in preparation processes (``service/api/preparing.py``): the caps are
server settings, a preparation past ``prepare_seconds`` or over ``prepare_memory_bytes`` is stopped with
a 422 naming that cap, and the API answers meanwhile."""

from __future__ import annotations

import json
import threading
import time

import httpx
import pytest
from fastapi.testclient import TestClient

from toposcout.service.api.app import create_app
from toposcout.service.api.preparing import PrepareBusy, PreparePool, busy
from toposcout.service.settings import Settings

PAIR = {"name": "pair", "variables": ["a", "b"], "cliques": [["a", "b"]]}
V = [f"x{i}" for i in range(64)]
#: a valid request whose preparation takes about 0.5 s here (4000 pair cliques, 192 tasks of 32 KB each)
SLOW = {"model": {"variables": V, "cliques": [[V[i], V[j]] for i in range(64) for j in range(i + 1, 64)][:4000]},
        "connectivities": ["line", "ring", "grid", "all-to-all", "heavy-hex"] + [f"line:{q}" for q in range(64, 71)],
        "noise_scales": [0.5 + 0.1 * i for i in range(16)]}


def _chain(n):
    return {"name": f"chain{n}", "variables": V[:n], "cliques": [[V[i], V[i + 1]] for i in range(n - 1)]}


def _nodelink(links):
    return {"directed": False, "multigraph": False, "graph": {}, "nodes": [{"id": i} for i in range(links + 1)],
            "links": [{"source": i, "target": i + 1} for i in range(links)]}


# (setting, lowered value, request, field named, text in the message): the default accepts the request,
# the lowered setting refuses it
CASES = [
    ("max_cliques", 3, {"model": _chain(5), "compile_only": True}, "model.cliques", "cap of 3"),
    ("max_links", 10, {"model": _nodelink(11), "compile_only": True}, "model.links", "cap of 10"),
    ("max_json_containers", 100, {"model": _nodelink(60), "compile_only": True}, "body", "max_json_containers=100"),
    ("max_study_model_bytes", 2**16, {"model": _chain(60), "connectivities": ["line", "ring", "grid", "all-to-all"],
                                      "noise_scales": [0.5 + 0.1 * i for i in range(16)]},
     "model", "max_study_model_bytes=65536"),
    ("max_seeds", 2, {"model": PAIR, "compile_only": True, "seeds": 3}, "seeds", "max_seeds=2"),
    ("max_trajectories", 100, {"model": PAIR, "method": "trajectories", "trajectories": 200}, "trajectories",
     "max_trajectories=100"),
]


@pytest.fixture(scope="module")
def default_client(tmp_path_factory):
    settings = Settings(data_dir=tmp_path_factory.mktemp("prep-default"), run_workers=False)
    with TestClient(create_app(settings)) as c:
        yield c


@pytest.mark.parametrize("setting,value,body,field,needle", CASES, ids=[c[0] for c in CASES])
def test_a_lowered_setting_changes_the_refusal(tmp_path, default_client, setting, value, body, field, needle):
    r = default_client.post("/v1/studies", json=body)
    assert r.status_code == 202, r.text
    settings = Settings(data_dir=tmp_path, run_workers=False, **{setting: value})
    with TestClient(create_app(settings)) as c:
        r = c.post("/v1/studies", json=body)
    assert r.status_code == 422, r.text
    assert r.json()["field"] == field and needle in r.json()["detail"], r.json()


def test_a_setting_is_read_from_the_environment(monkeypatch):
    monkeypatch.setenv("TOPOSCOUT_MAX_CLIQUES", "7")
    monkeypatch.setenv("TOPOSCOUT_PREPARE_SECONDS", "2.5")
    s = Settings()
    assert s.max_cliques == 7 and s.prepare_seconds == 2.5
    with pytest.raises(ValueError):  # a server may lower the library's caps, not raise them
        Settings(max_cliques=10**6)


def test_a_preparation_over_its_memory_bound_is_stopped_and_named(tmp_path, default_client):
    # a 3 MB body of one million floats: ~32 MB once decoded, over a 16 MiB bound
    body = {"model": PAIR, "noise_scales": [1.5] * 10**6}
    r = default_client.post("/v1/studies", json=body)  # the default bound lets the schema answer
    assert r.status_code == 422 and r.json()["field"] == "noise_scales", r.text
    settings = Settings(data_dir=tmp_path, run_workers=False, prepare_memory_bytes=16 * 2**20)
    with TestClient(create_app(settings)) as c:
        r = c.post("/v1/studies", json=body)
        assert r.status_code == 422 and r.json()["field"] == "body", r.text
        assert "prepare_memory_bytes=16777216" in r.json()["detail"], r.json()
        assert "TOPOSCOUT_PREPARE_MEMORY_BYTES" in r.json()["detail"]
        assert c.post("/v1/studies", json={"model": PAIR, "compile_only": True}).status_code == 202  # a new process


def test_a_slow_preparation_is_stopped_while_the_api_answers(tmp_path, start_server):
    srv = start_server(tmp_path, env={"TOPOSCOUT_PREPARE_SECONDS": "0.1"}, workers=1)
    raw = json.dumps(SLOW).encode()
    answers: list[httpx.Response] = []

    def slow():
        answers.append(httpx.post(srv.url + "/v1/studies", content=raw, timeout=60,
                                  headers={"Content-Type": "application/json"}))

    probes = []
    with httpx.Client(base_url=srv.url, timeout=5) as c:
        c.get("/healthz")
        t = threading.Thread(target=slow)
        t.start()
        while t.is_alive():
            t0 = time.perf_counter()
            assert c.get("/healthz").status_code == 200
            probes.append(time.perf_counter() - t0)
            time.sleep(0.01)
        t.join()
        (r,) = answers
        assert r.status_code == 422, r.text
        assert r.json()["field"] == "body" and "prepare_seconds=0.1" in r.json()["detail"], r.json()
        assert "TOPOSCOUT_PREPARE_SECONDS" in r.json()["detail"]
        # the stopped process is replaced: the next request is prepared as usual
        ok = c.post("/v1/studies", json={"model": PAIR, "compile_only": True, "connectivities": ["line"]})
        assert ok.status_code == 202, ok.text
    assert probes and max(probes) < 0.5, probes


def test_every_preparation_process_busy_is_a_429_with_retry_after():
    pool = PreparePool(1)
    held = pool._free.get()  # the pool's one process, taken as a call in flight would hold it
    settings = Settings(database_url="sqlite://", prepare_seconds=0.2, prepare_processes=1)
    t0 = time.monotonic()
    with pytest.raises(PrepareBusy):
        pool.run("data", {"model": PAIR}, None, settings)
    assert 0.2 <= time.monotonic() - t0 < 5
    pool._free.put(held)
    r = busy(settings)
    assert r.status_code == 429 and r.headers["retry-after"] == "2"
    assert json.loads(r.body)["field"] is None and "prepare_seconds=0.2" in json.loads(r.body)["detail"]
