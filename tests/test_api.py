"""The API in process (TestClient): access rules, OpenAPI, uploads, token hygiene, serve's guard."""

from __future__ import annotations

import io
import logging

import pytest
from fastapi.testclient import TestClient

from toposcout.service.api.app import create_app
from toposcout.service.api.server import _RedactTokens, serve
from toposcout.service.api.auth import parse_tokens
from toposcout.service.settings import Settings

UAI = "MARKOV\n3\n2 2 2\n2\n2 0 1\n2 1 2\n4\n1 2 3 4\n4\n2 1 1 2\n"


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    settings = Settings(data_dir=tmp_path_factory.mktemp("api"), workers=1, tokens="carol:carol-secret-1")
    with TestClient(create_app(settings)) as c:
        c.headers["Authorization"] = "Bearer carol-secret-1"
        yield c


def test_openapi_documents_every_error_response(client):
    doc = client.get("/openapi.json").json()
    assert doc["openapi"].startswith("3.1")
    ops = [(p, m, op) for p, item in doc["paths"].items() for m, op in item.items()]
    assert len(ops) >= 13
    for path, method, op in ops:
        if path == "/healthz":
            continue
        assert {"401", "403", "422"} <= set(op["responses"]), (method, path)
        for code, resp in op["responses"].items():
            if code.startswith("4"):
                assert resp["content"]["application/json"]["schema"] == {"$ref": "#/components/schemas/ErrorBody"}
    post = doc["paths"]["/v1/studies"]["post"]
    assert {"409", "413", "415", "429"} <= set(post["responses"])
    assert set(post["requestBody"]["content"]) == {"application/json", "multipart/form-data"}
    assert "StudyRequest" in doc["components"]["schemas"]


def test_every_endpoint_but_healthz_needs_the_token(client):
    assert client.get("/healthz", headers={"Authorization": ""}).status_code == 200
    for path in ("/v1/studies", "/v1/connectivities", "/v1/profiles", "/v1/schema/model", "/metrics", "/openapi.json"):
        r = client.get(path, headers={"Authorization": ""})
        assert r.status_code == 401 and r.headers["www-authenticate"] == "Bearer", path
        assert client.get(path).status_code == 200, path
    r = client.get("/v1/studies", headers={"Authorization": "Bearer carol-secret-2"})
    assert r.status_code == 401 and "carol-secret" not in r.text


def test_uploaded_model_file_runs_and_records_its_owner(client, wait_study):
    r = client.post("/v1/studies", files={"file": ("door-chain.uai", UAI.encode())},
                    data={"compile_only": "true", "connectivities": ["line", "ring"], "seeds": "1"})
    assert r.status_code == 202, r.text
    study = wait_study(client, r.json()["id"])
    assert study["owner"] == "carol" and study["model_name"] == "door-chain"
    assert study["request"]["compile_only"] is True and len(study["rows"]) == 2
    assert all(row["status"] == "done" for row in study["rows"])


def test_model_given_as_json_text_and_as_nodelink(client, small_model):
    import json

    text = json.dumps(small_model)
    r = client.post("/v1/compile", json={"model": text, "connectivities": ["line"], "seeds": 1})
    assert r.status_code == 200 and r.json()["rows"][0]["variables"] == 4
    nodelink = {"directed": False, "multigraph": False, "graph": {}, "nodes": [{"id": "p"}, {"id": "q"}],
                "edges": [{"source": "p", "target": "q"}]}
    r = client.post("/v1/compile", json={"model": nodelink, "connectivities": ["line"], "seeds": 1})
    assert r.status_code == 200, r.text
    assert r.json()["rows"][0]["variables"] == 2


def test_compile_endpoint_caps_its_targets(client, small_model):
    r = client.post("/v1/compile", json={"model": small_model, "connectivities": ["line"] * 7})
    assert r.status_code == 422 and r.json()["field"] == "connectivities" and "cap of 6" in r.json()["detail"]


def test_without_tokens_only_loopback_clients_are_served(tmp_path):
    settings = Settings(data_dir=tmp_path, workers=1)
    app = create_app(settings)
    with TestClient(app) as local:
        assert local.get("/v1/studies").status_code == 200  # the test client counts as loopback
    with TestClient(app, client=("192.0.2.7", 5000)) as remote:
        r = remote.get("/v1/studies")
        assert r.status_code == 403 and "loopback" in r.json()["detail"]
        assert remote.get("/healthz").status_code == 200


def test_serve_refuses_a_public_address_without_tokens(monkeypatch):
    monkeypatch.delenv("TOPOSCOUT_TOKENS", raising=False)
    monkeypatch.delenv("TOPOSCOUT_TOKENS_FILE", raising=False)
    err = io.StringIO()
    assert serve(host="0.0.0.0", port=1, err=err) == 2
    assert "loopback" in err.getvalue() and "--allow-remote" in err.getvalue()


def test_access_log_redacts_tokens():
    rec = logging.LogRecord("uvicorn.access", logging.INFO, __file__, 1, '%s - "%s %s HTTP/%s" %d',
                            ("127.0.0.1:5", "GET", "/?token=carol-secret-1&x=1", "1.1", 200), None)
    _RedactTokens().filter(rec)
    assert "carol-secret-1" not in rec.getMessage() and "token=***" in rec.getMessage()


def test_token_file_format(tmp_path):
    f = tmp_path / "tokens"
    f.write_text("# group tokens\nalice:alice-secret-1\n\nbob:bob-secret-22\n")
    assert Settings(tokens_file=f).token_table() == {"alice-secret-1": "alice", "bob-secret-22": "bob"}
    with pytest.raises(Exception) as exc:
        parse_tokens(["alice:short"])
    assert "short" not in str(exc.value)  # the message never shows the token


def test_custom_graphs_of_one_size_get_apart_names(client, small_model):
    ring = [[0, 1], [1, 2], [2, 3], [3, 0]]
    line = [[0, 1], [1, 2], [2, 3]]
    r = client.post("/v1/compile", json={"model": small_model, "seeds": 1, "strategy": "generic", "connectivities": [
        {"family": "custom", "edges": ring}, {"family": "custom", "edges": line},
        {"family": "custom", "edges": line, "name": "lab-line"}]})
    assert r.status_code == 200, r.text
    assert sorted(row["connectivity"] for row in r.json()["rows"]) == ["custom-4", "custom-4-2", "lab-line"]
    r = client.post("/v1/compile", json={"model": small_model, "seeds": 1, "connectivities": [
        {"family": "custom", "edges": ring, "name": "lab"}, {"family": "custom", "edges": line, "name": "lab"}]})
    assert r.status_code == 422 and "'lab'" in r.json()["detail"] and r.json()["field"] == "connectivity"
