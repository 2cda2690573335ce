"""Dashboard pages in process (Starlette's TestClient): sign-in, paging, escaping, clean errors."""

from __future__ import annotations

import html
import re

import pytest
from fastapi.testclient import TestClient

from toposcout.service.api.app import create_app
from toposcout.service.settings import Settings

TOKEN = "dave-dashboard-token"
AUTH = {"Authorization": f"Bearer {TOKEN}"}
MODEL = {"name": "<b>tri</b>", "variables": ["a", "b", "c"], "cliques": [["a", "b", "c"]]}


@pytest.fixture(scope="module")
def app_client(tmp_path_factory):
    folder = tmp_path_factory.mktemp("dashboard")
    settings = Settings(database_url=f"sqlite:///{folder / 'd.db'}", data_dir=folder, workers=1,
                        tokens=f"dave:{TOKEN}", max_active_studies_per_owner=64)
    with TestClient(create_app(settings)) as c:
        yield c


def _submit(c: TestClient, **extra) -> str:
    body = {"model": MODEL, "connectivities": ["all-to-all"], "compile_only": True, "seeds": 1, **extra}
    r = c.post("/v1/studies", json=body, headers=AUTH)
    assert r.status_code == 202, r.text
    return r.json()["id"]


@pytest.fixture(scope="module")
def studies(app_client, wait_study) -> list[str]:
    ids = [_submit(app_client, seed=i) for i in range(3)]
    ids += [_submit(app_client) for _ in range(19)]  # equal tasks: rows come from the cache
    for i in ids:
        wait_study(app_client, i, 60, headers=AUTH)
    return ids


def test_pages_without_a_token_ask_for_one(app_client):
    app_client.cookies.clear()
    r = app_client.get("/")
    assert r.status_code == 401
    assert '<label for="token">' in r.text and "Traceback" not in r.text


def test_token_in_the_address_becomes_a_cookie(app_client):
    app_client.cookies.clear()
    r = app_client.get(f"/submit?token={TOKEN}", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/submit"
    cookie = r.headers["set-cookie"]
    assert "toposcout_token=" in cookie and "HttpOnly" in cookie and "SameSite=strict" in cookie
    r = app_client.get("/submit")
    assert r.status_code == 200 and "New study" in r.text
    app_client.cookies.clear()


def test_list_is_paged_newest_first(app_client, studies):
    app_client.cookies.set("toposcout_token", TOKEN)
    first = app_client.get("/")
    assert first.status_code == 200
    ids = re.findall(r'<tr data-id="([0-9a-f]+)"', first.text)
    assert len(ids) == 20 and ids[0] == studies[-1]
    assert 'rel="next"' in first.text and "page 1 of 2" in first.text
    second = app_client.get("/?page=2")
    assert re.findall(r'<tr data-id="([0-9a-f]+)"', second.text) == studies[:2][::-1]
    assert 'rel="prev"' in second.text
    assert app_client.get("/?page=banana").status_code == 200  # a bad page number shows page 1
    done = app_client.get("/?status=done")
    assert "22 studies" in done.text
    assert "best connectivity" in first.text.lower() and "all-to-all-3" in first.text


def test_model_names_are_escaped(app_client, studies):
    app_client.cookies.set("toposcout_token", TOKEN)
    page = app_client.get(f"/studies/{studies[0]}").text
    assert "<b>tri</b>" not in page and "&lt;b&gt;tri&lt;/b&gt;" in page


def test_compile_only_study_has_the_gate_chart_and_drawings(app_client, studies):
    app_client.cookies.set("toposcout_token", TOKEN)
    r = app_client.get(f"/studies/{studies[0]}")
    assert r.status_code == 200
    assert 'id="chart-gates"' in r.text and 'id="chart-fidelity"' not in r.text
    assert 'id="drawing-0"' in r.text
    assert "default-src 'self'" in r.headers["content-security-policy"]
    assert not re.search(r'(src|href)="(https?:)?//', r.text)  # nothing from other hosts
    svg = app_client.get(f"/studies/{studies[0]}/charts/gates.svg")
    assert svg.status_code == 200 and svg.headers["content-type"].startswith("image/svg+xml")
    png = app_client.get(f"/studies/{studies[0]}/drawings/0.png?download=1")
    assert png.content.startswith(b"\x89PNG") and "attachment" in png.headers["content-disposition"]


@pytest.mark.parametrize("path, status, words", [
    ("/studies/{id}/charts/pie.svg", 404, "unknown chart 'pie'"),
    ("/studies/{id}/charts/fidelity.svg", 404, "needs a noise simulation"),
    ("/studies/{id}/charts/gates.gif", 404, "unknown chart format 'gif'"),
    ("/studies/{id}/drawings/first.svg", 404, "task index"),
    ("/studies/{id}/drawings/7.svg", 404, "no finished row 7"),
    ("/studies/0123456789abcdef0123456789abcdef", 404, ""),
    ("/static/secrets.txt", 404, "no such file"),
])
def test_bad_addresses_get_a_clear_page(app_client, studies, path, status, words):
    app_client.cookies.set("toposcout_token", TOKEN)
    r = app_client.get(path.format(id=studies[0]))
    assert r.status_code == status
    assert words in html.unescape(r.text)
    assert "Traceback" not in r.text


def test_live_fragment_has_the_table(app_client, studies):
    app_client.cookies.set("toposcout_token", TOKEN)
    r = app_client.get(f"/studies/{studies[0]}/live")
    assert r.status_code == 200
    assert 'id="rows"' in r.text and 'id="study-status"' in r.text and "<html" not in r.text


def test_sign_in_page_shows_no_error_and_no_sign_out_to_a_visitor(app_client):
    app_client.cookies.clear()
    for r in (app_client.get("/signin"), app_client.get("/")):
        assert 'role="alert"' not in r.text, r.url
        assert "Sign out" not in r.text and "/signout" not in r.text, r.url
    # a token that was tried and refused is an error; still no sign-out for someone not signed in
    app_client.cookies.set("toposcout_token", "not-the-token")
    r = app_client.get("/")
    assert r.status_code == 401 and 'role="alert"' in r.text and "not accepted" in r.text
    assert "/signout" not in r.text
    app_client.cookies.clear()


def test_a_refused_form_keeps_file_and_fields_and_lists_every_error_by_its_field(app_client):
    import json as _json

    app_client.cookies.clear()
    model = _json.dumps({"name": "kept", "variables": ["a", "b"], "cliques": [["a", "b"]]}).encode()
    form = {"connectivities": ["line"], "extra_connectivities": "grid:2x2", "noise_scales": "1 lots",
            "fidelity_target": "2", "seeds": "many", "layers": "99", "compile_only": "true"}
    r = app_client.post("/submit", data=form, files={"file": ("kept.json", model, "application/json")}, headers=AUTH)
    assert r.status_code == 422
    page = html.unescape(r.text)
    for name, needle in (("seeds", "'many'"), ("layers", "99"), ("fidelity_target", "2"),
                         ("noise_scales", "'lots'")):
        m = re.search(rf'<p class="field-error" id="{name}-error">(.*?)</p>', page, re.S)
        assert m and needle in m.group(1), name
        assert re.search(rf'id="{name}"[^>]*aria-invalid="true"[^>]*aria-describedby="{name}-error"', page), name
    assert page.count("<li>") == 4  # all at once, in the summary too
    assert 'value="grid:2x2"' in page and 'value="many"' in page and 'value="1 lots"' in page
    kept = re.search(r'name="kept_file_b64" value="([^"]+)"', page).group(1)
    assert "kept.json" in page
    # the second try needs no new file: the kept one is sent
    fixed = {**form, "kept_file_name": "kept.json", "kept_file_b64": kept, "noise_scales": "1", "fidelity_target": "",
             "seeds": "1", "layers": "1"}
    r = app_client.post("/submit", data=fixed, headers=AUTH, follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"].startswith("/studies/"), r.text[:500]


def test_labels_filters_and_the_compare_view(app_client, wait_study):
    app_client.cookies.clear()
    other = {"name": "pair", "variables": ["a", "b"], "cliques": [["a", "b"]]}
    ids = []
    for label, model, conns in (("lab-A", MODEL, ["line"]), ("lab-A", other, ["ring", "line"]), ("lab-B", MODEL, ["line"])):
        r = app_client.post("/v1/studies", json={"model": model, "connectivities": conns, "compile_only": True,
                                                "seeds": 1, "label": label}, headers=AUTH)
        assert r.status_code == 202, r.text
        ids.append(r.json()["id"])
    for i in ids:
        wait_study(app_client, i, 60, headers=AUTH)
    got = app_client.get("/v1/studies", params={"label": "lab-A"}, headers=AUTH).json()
    assert {s["id"] for s in got["items"]} == set(ids[:2]) and got["total"] == 2
    got = app_client.get("/v1/studies", params={"label": "lab-A", "model": "pair"}, headers=AUTH).json()
    assert [s["id"] for s in got["items"]] == [ids[1]]
    assert got["items"][0]["connectivities"] == ["ring", "line"] and got["items"][0]["profiles"] == []
    page = html.unescape(app_client.get("/", params={"label": "lab-A"}, headers=AUTH).text)
    assert ids[0] in page and ids[1] in page and ids[2] not in page
    assert "ring, line" in page and 'name="label" type="text" value="lab-A"' in page
    r = app_client.get("/compare", params={"ids": [ids[0], ids[2]]}, headers=AUTH)
    assert r.status_code == 200
    rows = re.findall(r'<tr( class="differs")?><th scope="row">([^<]*)', r.text)
    differs = {title.strip() for cls, title in rows if cls}
    same = {title.strip() for cls, title in rows if not cls}
    assert "label" in differs and "model" in same and "connectivities" in same
    assert app_client.get("/compare", params={"ids": ids[0]}, headers=AUTH).status_code == 422


def test_the_form_takes_a_label_and_several_profiles(app_client, wait_study):
    # the form reaches what the API and the CLI can do (one product everywhere)
    import json as _json

    app_client.cookies.clear()
    model = _json.dumps({"name": "formed", "variables": ["a", "b"], "cliques": [["a", "b"]]}).encode()
    page = app_client.get("/submit", headers=AUTH).text
    assert 'name="label"' in page and re.search(r'<select id="profile" name="profile" multiple', page)
    form = {"connectivities": ["line"], "noise_scales": "1", "seeds": "1", "layers": "1", "label": "orchard-week-3",
            "profile": ["superconducting", "trapped_ion"]}
    r = app_client.post("/submit", data=form, files={"file": ("formed.json", model, "application/json")},
                        headers=AUTH, follow_redirects=False)
    assert r.status_code == 303, r.text[:500]
    study_id = r.headers["location"].rsplit("/", 1)[1]
    study = wait_study(app_client, study_id, 120, headers=AUTH)
    assert study["request"]["label"] == "orchard-week-3"
    assert sorted(row["profile"] for row in study["rows"]) == ["superconducting", "trapped_ion"]
    # a bad label is named beside its field, the rest of the form kept
    bad = {**form, "label": "x" * 81}
    r = app_client.post("/submit", data=bad, files={"file": ("formed.json", model, "application/json")}, headers=AUTH)
    assert r.status_code == 422 and 'id="label-error"' in r.text and 'value="1"' in r.text
