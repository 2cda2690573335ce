"""The API's ``fit`` block and ``families`` (planning.py, schemas.py, study.run_task) and ``Client.fit``."""

from __future__ import annotations

import json

import numpy as np
import pytest
from fastapi.testclient import TestClient

from toposcout.compiler.fit import fit_model
from toposcout.compiler.model import parse_model
from toposcout.service.api.app import create_app
from toposcout.service.client import Client, ToposcoutClientError, request_from_tasks
from toposcout.service.settings import Settings

MODEL = {"name": "doors", "variables": ["a", "b", "c"], "cliques": [["a", "b", "c"]],
         "factors": [{"scope": ["a", "b", "c"], "values": [3, 1, 1, 1, 1, 1, 1, 4]}]}


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    settings = Settings(data_dir=tmp_path_factory.mktemp("api-fit"), workers=1, tokens="dora:dora-secret-1")
    with TestClient(create_app(settings)) as c:
        c.headers["Authorization"] = "Bearer dora-secret-1"
        yield c


def test_study_with_fit_block_and_two_families(client, wait_study):
    body = {"model": MODEL, "connectivities": ["line"], "compile_only": True, "seeds": 1, "strategy": "generic",
            "families": ["clique", "pairwise"], "fit": {"loss": "kl", "restarts": 2}}
    r = client.post("/v1/studies", json=body)
    assert r.status_code == 202, r.text
    study = wait_study(client, r.json()["id"])
    rows = study["rows"]
    assert sorted(x["family"] for x in rows) == ["clique", "pairwise"]
    # the worker's fit is the library's fit with the same options (deterministic by seed)
    ref = {fam: fit_model(parse_model(MODEL), family=fam, restarts=2, seed=0) for fam in ("clique", "pairwise")}
    for row in rows:
        assert row["angles_fitted"] is True and row["fit_loss"] == "kl"
        assert row["fit_loss_value"] == pytest.approx(ref[row["family"]].loss, abs=1e-12)
        assert row["fit_parameters"] == ref[row["family"]].parameters
    assert study["request"]["fit"]["loss"] == "kl" and study["request"]["families"] == ["clique", "pairwise"]


@pytest.mark.parametrize("fit, model, field, text", [
    ({"loss": "kl"}, {"variables": ["a", "b"], "cliques": [["a", "b"]]}, "fit.loss", "no factors"),
    ({"loss": "mmd"}, MODEL, "fit.data", "needs samples"),
    ({"loss": "mmd", "data": "a,b\n0,1\n1,0\n"}, MODEL, "fit.data", "no column for variable 'c'"),
    ({"loss": "mmd", "data": "a,b,c\n0,1,1\n1,x,0\n"}, MODEL, "fit.data", "line 3"),
    ({"loss": "mmd", "data": "a,b,c\n0,1,1\n1,1,0\n"}, MODEL, "fit.data", "constant"),
    ({"restarts": 0}, MODEL, "fit.restarts", ""),
    ({"loss": "hinge"}, MODEL, "fit.loss", ""),
])
def test_bad_fit_blocks_are_422_naming_the_field(client, fit, model, field, text):
    r = client.post("/v1/studies", json={"model": model, "connectivities": ["line"], "compile_only": True,
                                         "fit": fit})
    assert r.status_code == 422, r.text
    body = r.json()
    assert field in json.dumps(body) and text in json.dumps(body)


def test_fit_refused_past_the_servers_cap(client):
    v = [f"x{i}" for i in range(17)]
    model = {"variables": v, "cliques": [[v[i], v[i + 1]] for i in range(16)],
             "factors": [{"scope": [v[i], v[i + 1]], "values": [2, 1, 1, 2]} for i in range(16)]}
    r = client.post("/v1/studies", json={"model": model, "connectivities": ["line"], "compile_only": True,
                                         "fit": {}})
    assert r.status_code == 422 and "max_fit_variables" in r.text


def test_client_fit_returns_the_fitted_model(client):
    c = Client(str(client.base_url), token="dora-secret-1", http=client)
    out = c.fit(MODEL, restarts=1, seed=3)
    ref = fit_model(parse_model(MODEL), restarts=1, seed=3)
    assert out["parameters"] == ref.parameters and out["loss_value"] == pytest.approx(ref.loss, abs=1e-12)
    assert parse_model(out["model"]).parameters == ref.parameters
    with pytest.raises(ToposcoutClientError) as e:
        c.fit({"variables": ["a", "b"], "cliques": [["a", "b"]]})
    assert e.value.status == 422


def test_request_from_tasks_keeps_families_and_the_fit_block():
    from toposcout.compiler.study import make_tasks

    samples = np.array([1, 2, 3, 5])
    req = {"loss": "mmd", "restarts": 1, "max_iter": 10, "tol": 0.0, "optimizer": "adam", "seed": 0,
           "bandwidths": [1.0], "samples": samples.tolist()}
    tasks = []
    for fam in ("clique", "pairwise"):
        tasks += make_tasks(MODEL, ["line"], compile_only=True, family=fam, fit_request=req)
    body = request_from_tasks(tasks)
    assert body["families"] == ["clique", "pairwise"]
    assert body["fit"]["data"].splitlines() == ["a,b,c", "1,0,0", "0,1,0", "1,1,0", "1,0,1"]
    assert body["fit"]["kernel_bandwidths"] == [1.0] and body["fit"]["optimizer"] == "adam"


def test_dashboard_form_fits_and_compares_families(client, wait_study):
    client.cookies.set("toposcout_token", "dora-secret-1")
    r = client.post("/submit", files={"file": ("doors.json", json.dumps(MODEL).encode(), "application/json")},
                    data={"connectivities": ["line"], "compile_only": "true", "seeds": "1", "strategy": "generic",
                          "noise_scales": "1", "families": ["clique", "pairwise"], "fit": "kl"},
                    follow_redirects=False)
    assert r.status_code == 303, r.text
    study = wait_study(client, r.headers["location"].rsplit("/", 1)[-1])
    assert sorted(x["family"] for x in study["rows"]) == ["clique", "pairwise"]
    assert all(x["angles_fitted"] for x in study["rows"])
    study_page = client.get(r.headers["location"]).text
    assert ">family<" in study_page.replace(" ", "") or "family</th>" in study_page
    assert "fitted" in study_page and "fit loss" in study_page  # compile-only: no target KLs to show
    assert 'id="chart-fit"' in study_page  # the loss curve of each family's fit
    svg = client.get(r.headers["location"] + "/charts/fit.svg")
    assert svg.status_code == 200 and "<svg" in svg.text and "loss per iteration" in svg.text
    page = client.get("/submit").text
    assert 'name="families"' in page and 'name="fit"' in page
    client.cookies.clear()
