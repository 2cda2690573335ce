"""The dashboard in headless Chromium (Playwright) against a real server (uvicorn + SQLite).

With ``TOPOSCOUT_REQUIRE_BROWSER=1`` (set by ``.ci/run``) a missing Chromium or Playwright
fails these tests instead of skipping them. Screenshots of every page go to
``tests/output/screenshots/`` (a CI artefact; the folder is git-ignored).
"""

from __future__ import annotations

import io
import json
import os
import re
import sys
from pathlib import Path
from urllib.parse import urlparse

import httpx
import pytest

CHROMIUM = "/usr/bin/chromium"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run"]
SHOTS = Path(__file__).resolve().parent / "output" / "screenshots"
TOKEN = "carol-browser-token"
MODEL = {"name": "pond-sensors", "variables": ["inlet", "reeds", "dock", "outlet"],
         "cliques": [["inlet", "reeds", "dock"], ["dock", "outlet"]]}
KINDS = ("gates", "fidelity", "budget", "sweep")


#: what the browser tests need, as one line (the skip reason and the README say it)
INSTALL = "sudo apt-get install chromium"


def _require_browser():
    required = os.environ.get("TOPOSCOUT_REQUIRE_BROWSER") == "1"
    try:
        from playwright.sync_api import sync_playwright  # noqa: F401
    except ImportError:
        if required:
            pytest.fail("TOPOSCOUT_REQUIRE_BROWSER=1 but the python package playwright is not installed")
        pytest.skip("browser tests need the playwright package: pip install -e '.[test]'")
    if not Path(CHROMIUM).exists():
        if required:
            pytest.fail(f"TOPOSCOUT_REQUIRE_BROWSER=1 but {CHROMIUM} is missing (install it: {INSTALL})")
        pytest.skip(f"browser tests need Chromium at {CHROMIUM}; install it with: {INSTALL}")


@pytest.fixture(scope="module")
def server(tmp_path_factory, start_server):
    _require_browser()
    s = start_server(tmp_path_factory.mktemp("browser-server"), tokens=f"carol:{TOKEN}")
    yield s
    s.stop()


@pytest.fixture(scope="module")
def browser(server):
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        yield b
        b.close()


@pytest.fixture(scope="module")
def requests_seen() -> list[str]:
    return []


@pytest.fixture(scope="module")
def context(browser, server, requests_seen):
    ctx = browser.new_context(viewport={"width": 1400, "height": 1000}, accept_downloads=True)
    ctx.on("request", lambda req: requests_seen.append(req.url))
    page = ctx.new_page()
    page.goto(f"{server.url}/?token={TOKEN}")  # stores the token in a cookie, then drops it from the URL
    assert "token=" not in page.url
    page.close()
    yield ctx
    ctx.close()


@pytest.fixture()
def page(context):
    p = context.new_page()
    errors: list[str] = []
    p.on("pageerror", lambda exc: errors.append(str(exc)))
    yield p
    p.close()
    assert not errors, f"script errors on the page: {errors}"


@pytest.fixture(scope="module")
def model_file(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("models") / "pond-sensors.json"
    path.write_text(json.dumps(MODEL))
    return path


def _shot(page, name: str) -> None:
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / f"{name}.png"), full_page=True)


def _check_accessible(page) -> None:
    """Every image and chart has alternative text; every form field has a label."""
    bad_imgs = page.eval_on_selector_all("img", "els => els.filter(e => !(e.getAttribute('alt') || '').trim())"
                                                ".map(e => e.src)")
    assert not bad_imgs, f"images without alt text: {bad_imgs}"
    bad_svgs = page.eval_on_selector_all(
        "svg", "els => els.filter(e => !e.querySelector(':scope > title') && !e.getAttribute('aria-label')).length")
    assert bad_svgs == 0
    unlabelled = page.eval_on_selector_all(
        "input, select, textarea",
        """els => els.filter(e => e.type !== 'hidden' && e.type !== 'submit' && e.type !== 'button')
                    .filter(e => !(e.id && document.querySelector('label[for="' + e.id + '"]'))
                                 && !e.closest('label') && !e.getAttribute('aria-label'))
                    .map(e => e.name || e.id || e.outerHTML)""")
    assert not unlabelled, f"form fields without a label: {unlabelled}"
    assert page.eval_on_selector_all("progress", "els => els.filter(e => !e.getAttribute('aria-label')).length") == 0
    assert page.locator("html").get_attribute("lang") == "en"


@pytest.fixture(scope="module")
def submitted(context, server, model_file) -> dict:
    """A tiny noisy sweep submitted through the form while the list is open in another tab."""
    lst = context.new_page()
    lst.goto(server.url + "/")
    before = lst.locator("#studies tbody tr[data-id]").count()
    form = context.new_page()
    form.goto(server.url + "/submit")
    form.set_input_files("#file", str(model_file))
    for box in form.locator("input[name=connectivities]").all():
        box.uncheck()
    form.check("#conn-line")
    form.check("#conn-grid")
    form.fill("#noise_scales", "0.5 2")
    form.fill("#fidelity_target", "0.5")
    form.select_option("#profile", "superconducting")
    form.select_option("#strategy", "generic")
    form.fill("#seeds", "1")
    _shot(form, "submit-form")
    with form.expect_navigation():
        form.click("#submit-study")
    m = re.search(r"/studies/([0-9a-f]+)$", form.url)
    assert m, form.url
    study_id = m.group(1)
    navigations: list[str] = []
    form.on("framenavigated", lambda fr: navigations.append(fr.url) if fr == form.main_frame else None)
    # the list in the other tab shows the new study without a reload
    lst.wait_for_selector(f"#studies tbody tr[data-id='{study_id}']", timeout=15000)
    assert lst.locator("#studies tbody tr[data-id]").count() == before + 1
    # the study page reaches done without a reload
    form.wait_for_function("() => document.getElementById('study-status').textContent.trim() === 'done'",
                           timeout=120000)
    form.wait_for_selector("#chart-sweep img", timeout=15000)
    form.wait_for_function("() => [...document.images].every(i => i.complete && i.naturalWidth > 0)", timeout=30000)
    assert navigations == [], f"the study page reloaded: {navigations}"
    lst.wait_for_function(f"() => document.querySelector(\"#studies tr[data-id='{study_id}'] .status\")"
                          f".textContent.trim() === 'done'", timeout=15000)
    lst.close()
    return {"id": study_id, "page": form}


def test_study_list_loads(page, server):
    resp = page.goto(server.url + "/")
    assert resp.status == 200
    assert page.locator("h1").inner_text() == "Studies"
    assert page.locator("#studies thead th").all_inner_texts() == [
        "compare", "Label", "Model", "Connectivities", "Profiles", "Noise scales", "Status", "Progress", "Owner",
        "Submitted", "Best connectivity"]
    _check_accessible(page)
    _shot(page, "study-list")


def test_submitted_study_appears_and_finishes_without_reload(submitted, server, context):
    page = context.new_page()
    page.goto(server.url + "/")
    row = page.locator(f"#studies tbody tr[data-id='{submitted['id']}']")
    assert row.locator(".status").inner_text() == "done"
    cells = row.locator("td").all_inner_texts()  # after a refresh by the page's script too
    assert cells[2] == "pond-sensors" and cells[8] == "carol"
    assert "line" in cells[3] and cells[5] == "0.5, 2"  # the submitted sweep (page and script agree)
    assert cells[10] in ("line-4", "grid-2x2")  # the best connectivity
    _shot(page, "study-list-after-submit")
    page.close()


def test_study_page_shows_table_and_every_chart(submitted, context, server):
    page = context.new_page()
    page.goto(f"{server.url}/studies/{submitted['id']}")
    page.wait_for_function("() => [...document.images].every(i => i.complete && i.naturalWidth > 0)", timeout=30000)
    rows = page.locator("#rows tbody tr")
    assert rows.count() == 4  # 2 connectivities x 2 noise scales
    headers = page.locator("#rows thead th").all_inner_texts()
    for h in ("connectivity", "noise scale", "2q gates", "depth", "state fidelity", "Hellinger fidelity"):
        assert h in headers
    for kind in KINDS:
        img = page.locator(f"#chart-{kind} img")
        assert img.count() == 1
        assert img.evaluate("i => i.naturalWidth") > 100
        assert "not a device measurement" in img.get_attribute("alt")
        svg = context.request.get(img.evaluate("i => i.src")).text()
        assert "<title" in svg and "'superconducting'" in svg and "not a device measurement" in svg
        png = context.request.get(f"{server.url}/studies/{submitted['id']}/charts/{kind}.png?download=1")
        assert png.ok and png.body().startswith(b"\x89PNG")
    _check_accessible(page)
    _shot(page, "study-page")
    page.close()


def test_connectivity_drawing_marks_the_placed_variables(submitted, context, server):
    page = context.new_page()
    page.goto(f"{server.url}/studies/{submitted['id']}")
    figs = page.locator("figure.drawing")
    assert figs.count() == 2
    api = context.request.get(f"{server.url}/v1/studies/{submitted['id']}").json()
    for i in range(figs.count()):
        fig = figs.nth(i)
        alt = fig.locator("img").get_attribute("alt")
        task = int(fig.get_attribute("id").split("-")[1])
        row = next(r for r in api["rows"] if r["task_index"] == task)
        for var, q in row["layout"].items():
            assert f"{var} on q{q}" in alt
        svg = context.request.get(fig.locator("img").evaluate("i => i.src")).text()
        texts = re.findall(r"<text[^>]*>([^<]*)</text>", svg)
        for var in MODEL["variables"]:
            assert var in texts, (var, row["connectivity"])
    fig.locator("img").scroll_into_view_if_needed()
    fig.screenshot(path=str(SHOTS / "connectivity-drawing.png"))
    # as the browser renders the drawings: no variable or SWAP label overlaps a qubit marker or
    # another label (bounding boxes of the SVG's elements; a qubit's own number sits inside it)
    srcs = [figs.nth(i).locator("img").evaluate("i => i.src") for i in range(figs.count())]
    for src in srcs:
        page.goto(src)
        boxes = page.evaluate("""() => {
            const r = e => { const b = e.getBoundingClientRect(); return [b.left, b.top, b.right, b.bottom]; };
            const pick = p => [...document.querySelectorAll(`[id^="${p}"]`)].map(e => [e.id, r(e)]);
            return {qubits: pick("qubit-"), labels: pick("variable-label-").concat(pick("swap-label-"))};
        }""")
        assert boxes["qubits"] and boxes["labels"], src

        def overlaps(a, b):
            return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]

        for name, box in boxes["labels"]:
            for q, node in boxes["qubits"]:
                assert not overlaps(box, node), (src, name, "over", q)
        for i, (a, ba) in enumerate(boxes["labels"]):
            for b, bb in boxes["labels"][i + 1:]:
                assert not overlaps(ba, bb), (src, a, b)
    page.close()


def test_downloaded_circuits_are_valid(submitted, context, server, tmp_path):
    from qiskit import qasm3, qpy

    from toposcout.service.store import Store

    page = context.new_page()
    page.goto(f"{server.url}/studies/{submitted['id']}")
    link = page.locator("#rows tbody tr[data-task='1'] a", has_text="QPY")
    with page.expect_download() as dl:
        link.click()
    path = tmp_path / "c.qpy"
    dl.value.save_as(path)
    downloaded = qpy.load(io.BytesIO(path.read_bytes()))[0]
    store = Store(server.database_url, run_migrations=False)
    try:
        stored = qpy.load(io.BytesIO(store.circuit(submitted["id"], 1)))[0]
    finally:
        store.close()
    assert downloaded == stored
    with page.expect_download() as dl:
        page.locator("#rows tbody tr[data-task='1'] a", has_text="OpenQASM 3").click()
    text = Path(dl.value.path()).read_text()
    assert text.startswith("OPENQASM 3")
    parsed = qasm3.loads(text)
    assert parsed.num_qubits == stored.num_qubits
    two = lambda c: sum(1 for ins in c.data if ins.operation.num_qubits == 2)  # noqa: E731
    assert two(parsed) == two(stored)
    for what in ("rows.csv", "rows.json"):
        r = context.request.get(f"{server.url}/v1/studies/{submitted['id']}/{what}")
        assert r.ok and r.body()
    page.close()


def test_form_shows_the_apis_validation_message(page, server, model_file):
    body = {"model": MODEL, "connectivities": ["line", "grid:0x3"], "compile_only": True}
    api = httpx.post(f"{server.url}/v1/studies", json=body, headers={"Authorization": f"Bearer {TOKEN}"})
    assert api.status_code == 422
    page.goto(server.url + "/submit")
    page.set_input_files("#file", str(model_file))
    for box in page.locator("input[name=connectivities]").all():
        box.uncheck()
    page.check("#conn-line")
    page.fill("#extra_connectivities", "grid:0x3")
    page.check("#compile_only")
    page.click("#submit-study")
    alert = page.locator("#form-error")
    alert.wait_for()
    assert api.json()["detail"] in alert.inner_text()
    assert page.locator("#extra_connectivities").input_value() == "grid:0x3"  # what was typed stays
    _check_accessible(page)
    _shot(page, "submit-error")


def test_a_missing_file_and_a_bad_number_are_explained(page, server, model_file):
    page.goto(server.url + "/submit")
    page.eval_on_selector("#file", "e => e.removeAttribute('required')")
    page.click("#submit-study")
    assert "choose a model file" in page.locator("#form-error").inner_text()
    page.set_input_files("#file", str(model_file))
    page.fill("#seeds", "many")
    page.click("#submit-study")
    msg = page.locator("#form-error").inner_text()
    assert "seeds" in msg and "many" in msg


def test_unknown_study_is_a_clean_404_page(page, server):
    resp = page.goto(server.url + "/studies/" + "f" * 32)
    assert resp.status == 404
    assert page.locator("[role=alert]").inner_text().strip()
    assert "Traceback" not in page.content()


def test_pages_need_the_token(browser, server):
    ctx = browser.new_context()
    p = ctx.new_page()
    resp = p.goto(server.url + "/")
    assert resp.status == 401
    assert p.locator("label[for=token]").count() == 1
    _shot(p, "sign-in")
    p.fill("#token", TOKEN)
    p.click("#sign-in")
    assert p.locator("h1").inner_text() == "Studies"
    ctx.close()


def test_api_docs_work_with_the_network_blocked(browser, server):
    # Every request that does not go to the server is aborted, as on a machine with no internet:
    # /docs must still render the API's operations from the assets the package ships.
    host = urlparse(server.url).netloc
    blocked: list[str] = []
    ctx = browser.new_context(viewport={"width": 1200, "height": 900})

    def gate(route):
        if urlparse(route.request.url).netloc == host or route.request.url.startswith("data:"):
            route.continue_()
        else:
            blocked.append(route.request.url)
            route.abort()

    ctx.route("**/*", gate)
    try:
        p = ctx.new_page()
        p.goto(f"{server.url}/?token={TOKEN}")
        p.goto(f"{server.url}/docs")
        p.wait_for_selector(".swagger-ui .opblock", timeout=30000)
        title = p.locator(".swagger-ui .info .title").inner_text()
        assert "toposcout" in title and "OAS 3.1" in title
        assert p.locator(".swagger-ui .opblock").count() >= 10
        SHOTS.mkdir(parents=True, exist_ok=True)
        p.screenshot(path=str(SHOTS / "api-docs-offline.png"))
    finally:
        ctx.close()
    assert not blocked, f"/docs asked for outside resources: {blocked}"


def test_no_external_requests(requests_seen, server, submitted):
    assert requests_seen, "no requests were recorded"
    host = urlparse(server.url).netloc
    outside = [u for u in requests_seen if not u.startswith("data:") and urlparse(u).netloc != host]
    assert not outside, f"requests left 127.0.0.1: {outside}"


def test_the_skip_reason_and_the_readme_say_how_to_install_chromium(monkeypatch):
    # On a fresh machine without Chromium the browser tests skip; the reason must name the fix.
    pytest.importorskip("playwright")
    monkeypatch.setenv("TOPOSCOUT_REQUIRE_BROWSER", "0")
    monkeypatch.setattr(sys.modules[__name__], "CHROMIUM", "/nonexistent/chromium")
    try:
        _require_browser()
    except pytest.skip.Exception as exc:
        assert INSTALL in str(exc)
    else:
        raise AssertionError("no skip without Chromium")
    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")
    after_command = readme.split("# (b) set up and run the tests", 1)[1][:900]
    assert INSTALL in after_command
