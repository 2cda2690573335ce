"""The notebook client against a real local server (uvicorn + SQLite, with tokens)."""

from __future__ import annotations

import io
import json
import math
import re
from pathlib import Path

import httpx
import networkx as nx
import pandas as pd
import pytest

from toposcout.compiler.errors import ToposcoutError
from toposcout.service import cli
from toposcout.service.client import API_ONLY_COLUMNS, Client, StudyHandle, ToposcoutClientError, model_payload

TOKEN = "alice-secret-token"
UAI = "MARKOV\n3\n2 2 2\n2\n2 0 1\n2 1 2\n\n4\n1.0 0.5 0.5 1.0\n\n4\n1.0 0.5 0.5 1.0\n"


@pytest.fixture(scope="module")
def server(tmp_path_factory, start_server):
    s = start_server(tmp_path_factory.mktemp("client-server"), tokens=f"alice:{TOKEN},bob:bob-secret-token")
    yield s
    s.stop()


@pytest.fixture()
def client(server):
    with Client(server.url, token=TOKEN) as c:
        yield c


def _api_study(server, study_id: str) -> dict:
    r = httpx.get(f"{server.url}/v1/studies/{study_id}", headers={"Authorization": f"Bearer {TOKEN}"})
    assert r.status_code == 200
    return r.json()


def _same(a, b) -> bool:
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return a == b


def test_dataframe_equals_the_api_rows(server, client, small_model):
    df = client.compare(small_model, ["line", "grid", "all-to-all"], compile_only=True, strategy="generic", seeds=1,
                        progress=False)
    assert isinstance(df, pd.DataFrame) and len(df) == 3
    study_id = client.studies(limit=1)["items"][0]["id"]
    api_rows = _api_study(server, study_id)["rows"]
    keys = []
    for r in api_rows:
        keys += [k for k in r if k not in keys]
    assert sorted(df.columns) == sorted(keys)
    assert list(df["task_index"]) == [r["task_index"] for r in api_rows]
    for (_, got), want in zip(df.iterrows(), api_rows):
        for k in keys:
            if k in want:
                assert _same(got[k], want[k]), (k, got[k], want[k])
            else:
                assert got[k] is None or (isinstance(got[k], float) and math.isnan(got[k]))
    assert set(df["status"]) == {"done"}
    assert list(df["connectivity"]) == ["line-4", "grid-2x2", "all-to-all-4"]


def test_handle_waits_with_a_progress_bar(client, capsys, small_model):
    h = client.submit(small_model, ["line"], compile_only=True, seeds=1, strategy="generic")
    assert isinstance(h, StudyHandle) and len(h.id) >= 8
    assert h.wait(progress=True, timeout=60) is h
    assert h.status == "done" and h.progress == (1, 1)
    err = capsys.readouterr().err
    assert "row" in err and f"study {h.id[:8]}" in err
    circ = h.circuit(0)
    assert circ.num_qubits == 4
    assert "OPENQASM 3" in h.qasm(0)


@pytest.mark.parametrize("kind", ["networkx", "uai-text", "uai-path", "json-path", "json-text"])
def test_model_may_be_a_graph_uai_text_or_a_path(client, server, tmp_path, kind, small_model):
    if kind == "networkx":
        g = nx.Graph([("p", "q"), ("q", "r"), ("r", "p"), ("r", "s")])
        model, cliques = g, {frozenset("pqr"), frozenset("rs")}
    elif kind.startswith("uai"):
        model = UAI
        if kind == "uai-path":
            model = tmp_path / "chain.uai"
            model.write_text(UAI)
        cliques = {frozenset({"v0", "v1"}), frozenset({"v1", "v2"})}
    else:
        model = json.dumps(small_model)
        if kind == "json-path":
            (tmp_path / "kite.json").write_text(model)
            model = str(tmp_path / "kite.json")
        cliques = {frozenset("abc"), frozenset("cd")}
    h = client.submit(model, ["all-to-all"], compile_only=True, seeds=1)
    got = _api_study(server, h.id)["request"]["model"]["cliques"]
    assert {frozenset(c) for c in got} == cliques
    assert h.wait(progress=False, timeout=60).status == "done"


def test_a_server_error_carries_the_servers_message(server, client, small_model):
    body = {"model": small_model, "connectivities": ["line", "moebius"], "compile_only": True}
    raw = httpx.post(f"{server.url}/v1/studies", json=body, headers={"Authorization": f"Bearer {TOKEN}"})
    assert raw.status_code == 422
    with pytest.raises(ToposcoutClientError) as info:
        client.submit(small_model, ["line", "moebius"], compile_only=True)
    e = info.value
    assert e.status == 422
    assert e.message == raw.json()["detail"] and "moebius" in e.message
    assert e.field == raw.json()["field"] == "connectivities[1]"
    assert "moebius" in str(e) and "422" in str(e)


def test_an_unknown_study_is_a_clean_404(client):
    with pytest.raises(ToposcoutClientError) as info:
        client.study("0" * 32).refresh()
    assert info.value.status == 404 and info.value.message


@pytest.mark.parametrize("token", ["not-a-real-token", None])
def test_a_wrong_or_missing_token_fails_cleanly(server, token, small_model):
    with Client(server.url, token=token) as c:
        with pytest.raises(ToposcoutClientError) as info:
            c.submit(small_model, ["line"], compile_only=True)
    assert info.value.status == 401
    assert "token" in info.value.message
    assert TOKEN not in str(info.value)


def test_an_unreachable_server_is_a_client_error(server, free_port):
    with Client(f"http://127.0.0.1:{free_port()}", timeout=2) as c:
        with pytest.raises(ToposcoutClientError) as info:
            c.studies()
    assert info.value.status is None and "cannot reach" in info.value.message


def test_a_bad_model_argument_is_a_client_error(tmp_path):
    with pytest.raises(ToposcoutClientError, match="cannot read the model file"):
        model_payload(str(tmp_path / "missing.json"))
    with pytest.raises(ToposcoutClientError, match="cannot send a model of type"):
        model_payload(42)


def test_injected_http_client_is_used(server):
    seen = []
    http = httpx.Client(event_hooks={"request": [lambda r: seen.append(r.url.path)]})
    c = Client(server.url, token=TOKEN, http=http)
    assert c.health()["status"] == "ok"
    c.close()  # not ours: stays open
    assert not http.is_closed and seen == ["/healthz"]
    http.close()


def test_cli_compare_on_a_server_gives_the_local_rows(server, tmp_path, small_model):
    path = tmp_path / "kite.json"
    path.write_text(json.dumps(small_model))
    args = ["compare", str(path), "-c", "line", "-c", "grid", "--compile-only", "--strategy", "generic",
            "--seeds", "1", "--json"]
    local_out, remote_out, err = io.StringIO(), io.StringIO(), io.StringIO()
    assert cli.main(args, out=local_out, err=err) == 0, err.getvalue()
    assert cli.main(args + ["--server", server.url, "--token", TOKEN], out=remote_out, err=err) == 0, err.getvalue()
    local, remote = json.loads(local_out.getvalue()), json.loads(remote_out.getvalue())
    assert remote["model"] == local["model"] == small_model["name"]
    for lr, rr in zip(local["rows"], remote["rows"]):
        assert not set(API_ONLY_COLUMNS) & set(rr)
        for k in ("connectivity", "two_qubit_gates", "depth", "swaps", "layout", "final_layout"):
            assert rr[k] == lr[k], k


def test_cli_compare_on_a_server_with_a_wrong_token_is_a_clean_error(server, tmp_path, small_model):
    path = tmp_path / "kite.json"
    path.write_text(json.dumps(small_model))
    out, err = io.StringIO(), io.StringIO()
    code = cli.main(["compare", str(path), "-c", "line", "--compile-only", "--server", server.url, "--token", "nope"],
                    out=out, err=err)
    assert code == cli.EXIT_BAD_INPUT
    assert "401" in err.getvalue() and "token" in err.getvalue()
    assert "Traceback" not in err.getvalue()



def test_cli_compare_on_a_server_names_the_study_and_sends_a_local_profile(server, tmp_path, small_model):
    # The study id and its dashboard page are printed; a profile file is sent as its content.
    path = tmp_path / "kite.json"
    path.write_text(json.dumps(small_model))
    src = (Path(__file__).resolve().parent.parent / "topologies" / "profiles" / "superconducting.toml").read_text()
    prof = tmp_path / "lab.toml"
    prof.write_text(src.replace('name = "superconducting"', 'name = "lab-chip"'))
    out, err = io.StringIO(), io.StringIO()
    code = cli.main(["compare", str(path), "-c", "line", "--strategy", "generic", "--seeds", "1", "--profile",
                     str(prof), "--json", "--server", server.url, "--token", TOKEN], out=out, err=err)
    assert code == 0, err.getvalue()
    m = re.search(r"study (\S+): (\S+)", err.getvalue())
    assert m and m.group(2) == f"{server.url}/studies/{m.group(1)}"
    study = _api_study(server, m.group(1))
    assert study["request"]["profile"]["name"] == "lab-chip"
    assert {r["profile"] for r in json.loads(out.getvalue())["rows"]} == {"lab-chip"}
    page = httpx.get(m.group(2), headers={"Authorization": f"Bearer {TOKEN}"})
    assert page.status_code == 200 and m.group(1) in page.text


def test_the_study_object_summarises_itself_and_draws_the_dashboards_charts(client, small_model):
    from matplotlib.figure import Figure

    from toposcout.service.web import charts

    df = client.compare(small_model, ["line"], noise_scales=[0.5, 1.0], strategy="generic", seeds=1, progress=False)
    h = df.attrs["study"]
    assert isinstance(h, StudyHandle) and h.status == "done"
    page = h._repr_html_()
    assert small_model["name"] in page and h.dashboard_url in page and "0.5, 1.0" in page
    assert h.charts() == ["gates", "fidelity", "budget", "sweep"]
    rows = h.row_dicts()
    for kind in h.charts():
        fig = h.plot(kind)
        assert isinstance(fig, Figure)
        assert fig.get_suptitle() == charts.CHART_TITLES[kind]
        # the same drawing as the dashboard's chart of the same rows
        ref = charts.chart_figure(kind, rows)
        assert [a.get_title() for a in fig.axes] == [a.get_title() for a in ref.axes]
        assert [len(a.patches) + len(a.lines) for a in fig.axes] == [len(a.patches) + len(a.lines) for a in ref.axes]
    assert [a.get_title() for a in h.plot("budget").axes] == ["noise scale 0.5x", "noise scale 1x"]
    with pytest.raises(ToposcoutError):
        h.plot("pie")


def test_request_from_tasks_keeps_every_profile(small_model):
    from toposcout.compiler.study import make_tasks
    from toposcout.service.client import request_from_tasks

    tasks = make_tasks(small_model, ["line"], profile=["superconducting", "trapped_ion"], noise_scales=[1.0, 2.0])
    body = request_from_tasks(tasks)
    assert body["profile"] == ["superconducting", "trapped_ion"] and body["noise_scales"] == [1.0, 2.0]
