"""The API against a real uvicorn server on 127.0.0.1 (``toposcout serve`` in a subprocess).

One server with tokens (alice, bob) serves the end-to-end, bad-input, concurrency and fuzzing
tests; the restart test runs its own and kills it with SIGKILL mid-study.
"""

from __future__ import annotations

import contextlib
import math
import shutil
import subprocess
import sys
import time
import uuid
from concurrent.futures import ThreadPoolExecutor

import httpx
import pytest

from toposcout.compiler.study import make_tasks, run_task

ALICE, BOB = "alice-token-0001", "bob-token-000002"
TOKENS = f"alice:{ALICE},bob:{BOB}"


@pytest.fixture(scope="module")
def server(tmp_path_factory, start_server):
    with start_server(tmp_path_factory.mktemp("server"), tokens=TOKENS, workers=2,
                      env={"TOPOSCOUT_MAX_BODY_BYTES": str(4 * 2**20)}) as srv:
        yield srv


@pytest.fixture(scope="module")
def alice(server):
    with httpx.Client(base_url=server.url, headers={"Authorization": f"Bearer {ALICE}"}, timeout=60) as c:
        yield c


@pytest.fixture(scope="module")
def bob(server):
    with httpx.Client(base_url=server.url, headers={"Authorization": f"Bearer {BOB}"}, timeout=60) as c:
        yield c


def _same(a, b) -> bool:
    if isinstance(a, float) or isinstance(b, float):
        return a is not None and b is not None and math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12)
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    return a == b


def test_end_to_end_rows_equal_the_library(alice, small_model, comparable, wait_study):
    body = {"model": small_model, "connectivities": ["line", "grid:2x2", "all-to-all"], "seeds": 2,
            "noise_scales": [1.0]}
    r = alice.post("/v1/studies", json=body)
    assert r.status_code == 202, r.text
    created = r.json()
    assert r.headers["location"] == created["url"] == f"/v1/studies/{created['id']}"
    assert created["progress"] == {"done": 0, "total": 3}
    study = wait_study(alice, created["id"])
    assert study["status"] == "done" and study["owner"] == "alice" and study["model_name"] == "tri-chain"
    # the library's own result for the same input (default options, the same seeds)
    expected = [run_task(t) for t in make_tasks(small_model, body["connectivities"], seeds=2)]
    for got, want in zip(study["rows"], expected):
        assert got["status"] == "done" and got["cached"] is False
        assert "state_fidelity" in got and "circuit_qpy_b64" not in got
        g, w = comparable(got), comparable(want)
        w.pop("memory_estimate_bytes", None), g.pop("memory_estimate_bytes", None)
        assert g.keys() == w.keys()
        assert all(_same(g[k], w[k]) for k in g), {k: (g[k], w[k]) for k in g if not _same(g[k], w[k])}
    assert study["best_connectivity"] in {r["connectivity"] for r in study["rows"]}
    # a resubmission is answered from the cache
    again = alice.post("/v1/studies", json=body).json()
    assert again["status"] == "done" and again["id"] != created["id"]
    rows = alice.get(f"/v1/studies/{again['id']}").json()["rows"]
    assert all(r["cached"] for r in rows)
    # and again: the process now knows every key as cached, so it answers on the event loop; same answer
    third = alice.post("/v1/studies", json=body)
    assert third.status_code == 202 and third.headers["location"] == third.json()["url"] != again["url"]
    assert {k: v for k, v in third.json().items() if k not in ("id", "url")} == \
        {k: v for k, v in again.items() if k not in ("id", "url")}
    assert alice.get(third.json()["url"]).json()["rows"] == rows
    # downloads
    qasm = alice.get(f"/v1/studies/{created['id']}/circuits/0.qasm")
    assert qasm.status_code == 200 and qasm.text.startswith("OPENQASM 3")
    qpy = alice.get(f"/v1/studies/{created['id']}/circuits/0.qpy")
    from toposcout.compiler.compile import load_qpy

    circuit = load_qpy(qpy.content)
    assert circuit.count_ops().get("cx", 0) == study["rows"][0]["two_qubit_gates"]
    csv_text = alice.get(f"/v1/studies/{created['id']}/rows.csv").text
    assert csv_text.splitlines()[0].startswith("task_index,status,cached") and len(csv_text.splitlines()) == 4
    doc = alice.get(f"/v1/studies/{created['id']}/rows.json").json()
    assert len(doc["rows"]) == 3 and doc["status"] == "done"
    listing = alice.get("/v1/studies", params={"owner": "alice", "status": "done", "limit": 1}).json()
    assert listing["limit"] == 1 and listing["total"] >= 2 and len(listing["items"]) == 1
    metrics = alice.get("/metrics").text
    assert 'toposcout_studies{status="done"}' in metrics and "toposcout_task_duration_seconds_count" in metrics


def test_compile_endpoint_and_catalogues(alice, small_model):
    r = alice.post("/v1/compile", json={"model": small_model, "connectivities": ["ring"], "seeds": 1})
    assert r.status_code == 200, r.text
    row = r.json()["rows"][0]
    want = run_task(make_tasks(small_model, ["ring"], seeds=1, compile_only=True)[0])
    assert row["two_qubit_gates"] == want["two_qubit_gates"] and row["depth"] == want["depth"]
    assert alice.post("/v1/compile", json={"model": small_model, "connectivities": ["ring"], "seeds": 1}
                      ).json()["rows"][0]["cached"] is True
    assert {c["name"] for c in alice.get("/v1/connectivities").json()["connectivities"]} >= {"line", "grid"}
    assert alice.get("/v1/profiles").json()["default"] == "superconducting"
    assert alice.get("/v1/schema/model").json()["title"] == "toposcout model"
    assert httpx.get(alice.base_url.join("/healthz")).json()["status"] == "ok"  # no token needed


def _nested(depth: int) -> bytes:
    return b'{"model": ' + b"[" * depth + b"]" * depth + b"}"


UAI_OK = "MARKOV\n2\n2 2\n1\n2 0 1\n4\n1 2 3 4\n"
V40 = {"name": "v40", "variables": [f"x{i}" for i in range(40)], "cliques": [[f"x{i}", f"x{i+1}"] for i in range(39)]}
V200 = {"name": "v200", "variables": [f"x{i}" for i in range(200)], "cliques": []}
K25 = {"name": "k25", "variables": [f"x{i}" for i in range(25)], "cliques": [[f"x{i}" for i in range(25)]]}
K14 = {"name": "k14", "variables": [f"x{i}" for i in range(14)], "cliques": [[f"x{i}" for i in range(14)]]}
J = {"content-type": "application/json"}

# (name, method, path, request kwargs, auth (alice|bob|none|bad), status, substring of detail, field)
#: stands for the small model in the table below (filled in by the test from the fixture)
SMALL = "<the small model>"


def _fill(value, model):
    if value == SMALL:
        return model
    if isinstance(value, dict):
        return {k: _fill(v, model) for k, v in value.items()}
    if isinstance(value, list):
        return [_fill(v, model) for v in value]
    return value


BAD = [
    ("broken JSON", "POST", "/v1/studies", {"content": b'{"model": ', "headers": J}, "alice", 422, "not valid JSON", "body"),
    ("NaN literal", "POST", "/v1/studies", {"content": b'{"model": NaN}', "headers": J}, "alice", 422, "NaN", "body"),
    ("Infinity angle", "POST", "/v1/studies", {"content": b'{"model": {"variables": ["a", "b"], "cliques": [["a", "b"]], '
                                                         b'"parameters": {"terms": {"a,b": Infinity}}}}', "headers": J},
     "alice", 422, "Infinity", "body"),
    ("overflowing angle", "POST", "/v1/studies", {"content": b'{"model": {"variables": ["a", "b"], "cliques": [["a", "b"]], '
                                                            b'"parameters": {"terms": {"a,b": 1e400}}}}', "headers": J},
     "alice", 422, "parameters", None),
    ("array body", "POST", "/v1/studies", {"json": [1, 2]}, "alice", 422, "expected a JSON object", "body"),
    ("not UTF-8", "POST", "/v1/studies", {"content": b'{"model": "\xff\xfe"}', "headers": J}, "alice", 422, "UTF-8", "body"),
    ("nested too deeply", "POST", "/v1/studies", {"content": _nested(100_000), "headers": J}, "alice", 422, "nested", "body"),
    ("seeds is a string", "POST", "/v1/studies", {"json": {"model": SMALL, "seeds": "five"}}, "alice", 422,
     "seeds", "seeds"),
    ("seeds is false", "POST", "/v1/studies", {"json": {"model": SMALL, "seeds": False}}, "alice", 422, "seeds", "seeds"),
    ("compile_only is a string", "POST", "/v1/studies", {"json": {"model": SMALL, "compile_only": "yes"}}, "alice",
     422, "compile_only", "compile_only"),
    ("layers zero", "POST", "/v1/studies", {"json": {"model": SMALL, "layers": 0}}, "alice", 422, "layers", "layers"),
    ("unknown field", "POST", "/v1/studies", {"json": {"model": SMALL, "colour": "red"}}, "alice", 422, "colour", "colour"),
    ("missing model", "POST", "/v1/studies", {"json": {"seeds": 2}}, "alice", 422, "model", "model"),
    ("duplicate variables", "POST", "/v1/studies", {"json": {"model": {"variables": ["a", "a"]}}}, "alice", 422,
     "duplicate", "model.variables[1]"),
    ("broken UAI", "POST", "/v1/studies", {"json": {"model": "MARKOV\n2\n2 2\n1\n3 0 1\n", "model_format": "uai"}},
     "alice", 422, "line", "model"),
    ("40 variables, density matrix forced", "POST", "/v1/studies", {"json": {"model": V40, "method": "density-matrix"}},
     "alice", 422, "max_active_qubits", "method"),
    ("unknown method", "POST", "/v1/studies", {"json": {"model": V40, "method": "magic"}}, "alice", 422, "method",
     "method"),
    ("fit past max_fit_variables", "POST", "/v1/studies", {"json": {"model": V40, "fit": {}}}, "alice", 422,
     "max_fit_variables", "fit"),
    ("fit without factors", "POST", "/v1/studies", {"json": {"model": SMALL, "fit": {"loss": "kl"}}}, "alice", 422,
     "no factors", "fit.loss"),
    ("precision out of range", "POST", "/v1/studies", {"json": {"model": V40, "precision": 1.5}}, "alice", 422,
     "precision", "precision"),
    ("no trajectories", "POST", "/v1/studies", {"json": {"model": V40, "trajectories": 0}}, "alice", 422,
     "trajectories", "trajectories"),
    ("200 variables", "POST", "/v1/studies", {"json": {"model": V200, "compile_only": True}}, "alice", 422, "variables", None),
    ("clique of 25 variables", "POST", "/v1/studies", {"json": {"model": K25, "compile_only": True}}, "alice", 422,
     "clique", None),
    ("order over the cap", "POST", "/v1/studies", {"json": {"model": K14, "compile_only": True}}, "alice", 422,
     "max_order=12", "max_order"),
    ("unknown connectivity", "POST", "/v1/studies", {"json": {"model": SMALL, "connectivities": ["moebius"]}},
     "alice", 422, "unknown connectivity family", "connectivities[0]"),
    ("model does not fit", "POST", "/v1/studies", {"json": {"model": SMALL, "connectivities": ["line:3"]}},
     "alice", 422, "at least 4", "connectivity"),
    ("server file as connectivity", "POST", "/v1/studies",
     {"json": {"model": SMALL, "connectivities": ["custom:/etc/passwd"]}}, "alice", 422, "reads no files",
     "connectivities[0]"),
    ("huge connectivity", "POST", "/v1/studies", {"json": {"model": SMALL, "connectivities": ["line:9999"]}},
     "alice", 422, "max_physical_qubits", "connectivities[0]"),
    ("negative custom edge", "POST", "/v1/studies",
     {"json": {"model": SMALL, "connectivities": [{"family": "custom", "edges": [[0, -1]]}]}}, "alice", 422,
     ">= 0", "connectivities[0].edges"),
    ("unknown gate set", "POST", "/v1/studies", {"json": {"model": SMALL, "gate_set": "magic"}}, "alice", 422,
     "unknown gate set", "gate_set"),
    ("profile as a path", "POST", "/v1/studies", {"json": {"model": SMALL, "profile": "../../etc/passwd"}},
     "alice", 422, "unknown profile", "profile"),
    ("negative noise scale", "POST", "/v1/studies", {"json": {"model": SMALL, "noise_scales": [-1.0]}}, "alice",
     422, "noise_scales[0]", "noise_scales[0]"),
    ("too many noise scales", "POST", "/v1/studies", {"json": {"model": SMALL, "noise_scales": [1.0] * 100}},
     "alice", 422, "noise_scales", "noise_scales"),
    ("50 MB body", "POST", "/v1/studies", {"content": b" " * (50 * 2**20), "headers": J}, "alice", 413, "limit", "body"),
    ("path traversal in file name", "POST", "/v1/studies", {"files": {"file": ("../../etc/passwd.uai", UAI_OK.encode())}},
     "alice", 422, "plain name", "file"),
    ("unknown form field", "POST", "/v1/studies", {"files": {"file": ("m.uai", UAI_OK.encode())}, "data": {"evil": "1"}},
     "alice", 422, "unknown form field", "evil"),
    ("wrong content type", "POST", "/v1/studies", {"content": b"model", "headers": {"content-type": "text/plain"}},
     "alice", 415, "Content-Type", None),
    ("no token", "POST", "/v1/studies", {"json": {"model": SMALL}}, "none", 401, "token", None),
    ("unknown token", "GET", "/v1/studies", {}, "bad", 401, "unknown token", None),
    ("not a bearer header", "GET", "/v1/studies", {"headers": {"Authorization": "Basic YWxpY2U6eA=="}}, "raw", 401,
     "Bearer", None),
    ("another user's token cancels", "DELETE", "/v1/studies/{alice_study}", {}, "bob", 403, "only its owner", "study_id"),
    ("unknown study", "GET", "/v1/studies/" + "0" * 32, {}, "alice", 404, "no study", "study_id"),
    ("reused idempotency key", "POST", "/v1/studies",
     {"json": {"model": SMALL, "seeds": 3}, "headers": {"Idempotency-Key": "fixed-key-1"}}, "alice", 409,
     "different request", "Idempotency-Key"),
    ("limit too large", "GET", "/v1/studies", {"params": {"limit": 1000}}, "alice", 422, "limit", "limit"),
    ("unknown status filter", "GET", "/v1/studies", {"params": {"status": "bogus"}}, "alice", 422, "status", "status"),
    ("task index not a number", "GET", "/v1/studies/{alice_study}/circuits/abc.qpy", {}, "alice", 422, "task_index",
     "task_index"),
]


def test_bad_and_hostile_requests_get_a_4xx_naming_the_problem(server, alice, bob, small_model, wait_study):
    assert len(BAD) >= 25
    first = alice.post("/v1/studies", json={"model": small_model, "compile_only": True, "connectivities": ["line"],
                                            "seeds": 1}, headers={"Idempotency-Key": "fixed-key-1"})
    assert first.status_code == 202
    sid = first.json()["id"]
    before = alice.get("/v1/studies", params={"limit": 100}).json()
    clients = {"alice": alice, "bob": bob}
    failures = []
    for name, method, path, kwargs, who, status, needle, field in BAD:
        path = path.replace("{alice_study}", sid)
        kwargs = _fill(dict(kwargs), small_model)
        if who in clients:
            r = clients[who].request(method, path, **kwargs)
        else:
            headers = dict(kwargs.pop("headers", {}))
            if who == "bad":
                headers["Authorization"] = "Bearer not-a-known-token"
            r = httpx.request(method, server.url + path, headers=headers, timeout=60, **kwargs)
        try:
            body = r.json()
        except ValueError:
            body = {"detail": r.text, "field": "<not JSON>"}
        ok = (r.status_code == status and needle.lower() in str(body.get("detail", "")).lower()
              and (field is None or body.get("field") == field) and set(body) == {"detail", "field"})
        if not ok:
            failures.append(f"{name}: {r.status_code} {body}")
        assert ALICE not in r.text and BOB not in r.text  # tokens are never echoed
        assert httpx.get(server.url + "/healthz", timeout=10).status_code == 200, f"server down after {name!r}"
    assert not failures, "\n".join(failures)
    after = alice.get("/v1/studies", params={"limit": 100}).json()
    assert after["total"] == before["total"]  # nothing was created by a bad request, nothing lost
    assert wait_study(alice, sid)["status"] == "done"
    assert ALICE not in server.log() and BOB not in server.log()  # nor logged


def test_429_with_retry_after_when_a_token_has_too_many_unfinished_studies(tmp_path, k6_model, start_server):
    with start_server(tmp_path, workers=1, env={"TOPOSCOUT_MAX_ACTIVE_STUDIES_PER_OWNER": "1"}) as srv, \
            httpx.Client(base_url=srv.url, timeout=30) as c:
        slow = {"model": k6_model, "connectivities": ["line"], "seeds": 1, "fidelity_target": 0.5}
        first = c.post("/v1/studies", json=slow)
        assert first.status_code == 202
        r = c.post("/v1/studies", json={**slow, "seed": 1})
        assert r.status_code == 429 and int(r.headers["retry-after"]) > 0
        assert "max_active_studies_per_owner=1" in r.json()["detail"]
        cancel = c.delete(f"/v1/studies/{first.json()['id']}")
        assert cancel.status_code == 200 and cancel.json()["status"] == "cancelled"
        assert c.post("/v1/studies", json={**slow, "seed": 1, "compile_only": True}).status_code == 202
        assert c.get(f"/v1/studies/{first.json()['id']}").json()["status"] == "cancelled"  # the record stays


def test_200_submissions_from_20_clients(server, alice, small_model, wait_study):
    body = {"model": small_model, "connectivities": ["line", "ring"], "compile_only": True, "seeds": 1, "seed": 11}
    warm = alice.post("/v1/studies", json=body).json()
    wait_study(alice, warm["id"])  # later submissions are answered from the cache
    before = alice.get("/v1/studies", params={"limit": 1}).json()["total"]

    def client_run(k: int) -> list[str]:
        ids = []
        with httpx.Client(base_url=server.url, headers={"Authorization": f"Bearer {ALICE}"}, timeout=60) as c:
            for _ in range(10):
                r = c.post("/v1/studies", json=body)
                assert r.status_code == 202, r.text
                ids.append(r.json()["id"])
        return ids

    with ThreadPoolExecutor(20) as pool:
        ids = [i for chunk in pool.map(client_run, range(20)) for i in chunk]
    assert len(ids) == 200 and len(set(ids)) == 200
    assert alice.get("/v1/studies", params={"limit": 1}).json()["total"] == before + 200
    for sid in ids[::20]:
        assert alice.get(f"/v1/studies/{sid}").json()["status"] == "done"

    key = f"retry-{uuid.uuid4().hex}"

    def retry(_):
        with httpx.Client(base_url=server.url, headers={"Authorization": f"Bearer {ALICE}"}, timeout=60) as c:
            return c.post("/v1/studies", json={**body, "seed": 12}, headers={"Idempotency-Key": key}).json()["id"]

    with ThreadPoolExecutor(20) as pool:
        same = list(pool.map(retry, range(20)))
    assert len(set(same)) == 1
    assert alice.get("/v1/studies", params={"limit": 1}).json()["total"] == before + 201


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_restart_after_sigkill_loses_nothing(tmp_path, backend, k6_model, small_model, postgres_database,
                                             start_server, wait_study):
    with (postgres_database() if backend == "postgresql" else contextlib.nullcontext(None)) as pg_url:
        srv = start_server(tmp_path, workers=2, database_url=pg_url)
        try:
            c = httpx.Client(base_url=srv.url, timeout=30)
            slow = {"model": k6_model, "connectivities": ["line", "ring", "grid"], "seeds": 1}
            a = c.post("/v1/studies", json=slow).json()
            b = c.post("/v1/studies", json={"model": small_model, "compile_only": True, "seed": 4,
                                            "connectivities": ["line", "ring"]}).json()
            end = time.monotonic() + 60
            while c.get(f"/v1/studies/{a['id']}").json()["progress"]["done"] < 1:
                assert time.monotonic() < end, srv.log()
                time.sleep(0.1)
            srv.kill()  # SIGKILL the server and its workers mid-study
            c.close()
            srv2 = srv.restarted()
            try:
                with httpx.Client(base_url=srv2.url, timeout=30) as c2:
                    sa, sb = wait_study(c2, a["id"], 120), wait_study(c2, b["id"], 60)
                    assert c2.get("/v1/studies").json()["total"] == 2
            finally:
                srv2.stop()
        finally:
            srv.stop()
    assert sa["status"] == "done" and sb["status"] == "done"
    assert sa["progress"] == {"done": 3, "total": 3} and len(sa["rows"]) == 3
    assert all(r["status"] == "done" and r["error"] is None for r in sa["rows"]), sa["rows"]
    assert {r["connectivity_family"] for r in sa["rows"]} == {"line", "ring", "grid"}


def test_schemathesis_finds_no_server_error_or_schema_violation(server, tmp_path):
    exe = shutil.which("schemathesis", path=str(__import__("pathlib").Path(sys.executable).parent))
    assert exe, "schemathesis is a test dependency"
    cmd = [exe, "--no-color", "run", server.url + "/openapi.json", "-H", f"Authorization: Bearer {ALICE}",
           "--max-examples", "10", "--seed", "1", "--workers", "2", "--phases", "examples,fuzzing",
           "--checks", "not_a_server_error,status_code_conformance,content_type_conformance,"
                       "response_schema_conformance,response_headers_conformance",
           "--max-time", "45", "--request-timeout", "30", "--generation-database", "none"]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=240, cwd=tmp_path)
    assert proc.returncode == 0, proc.stdout[-6000:] + proc.stderr[-2000:]
    assert httpx.get(server.url + "/healthz").status_code == 200
