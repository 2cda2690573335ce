"""The hostile-input suite against a live ``toposcout serve`` with tokens on,
once on SQLite and once on PostgreSQL (one server per store, reused by every case).

Per case (``tests/hostile_cases.py``): the status, the field the error body names, an answer in
under 5 s, and the one error shape; then, while the heaviest of them are sent again and again,
``/healthz`` answers in under 100 ms and the server's memory (with its child processes) grows by
less than 100 MB.
"""

from __future__ import annotations

import os
import statistics
import threading
import time

import httpx
import psutil
import pytest

from tests.hostile_cases import CASES, TOKENS, Case

ALICE = "Bearer " + TOKENS.split(",")[0].split(":", 1)[1]


@pytest.fixture(scope="module", params=["sqlite", "postgresql"])
def hostile_server(request, tmp_path_factory, start_server, postgres_database):
    folder = tmp_path_factory.mktemp(f"hostile-{request.param}")
    if request.param == "sqlite":
        srv = start_server(folder, tokens=TOKENS, workers=1)
        try:
            yield request.param, srv
        finally:
            srv.stop()
    else:
        with postgres_database() as url:
            srv = start_server(folder, tokens=TOKENS, workers=1, database_url=url)
            try:
                yield request.param, srv
            finally:
                srv.stop()


def build(client: httpx.Client, case: Case) -> httpx.Request:
    req = dict(case.request)
    method, path = req.pop("method"), req.pop("path")
    auth = req.pop("auth", ALICE)
    headers = dict(req.pop("headers", {}))
    if auth:
        headers["Authorization"] = auth
    request = client.build_request(method, path, headers=headers, **req)
    request.read()  # the body as bytes: the request can be sent again
    return request


def send(base_url: str, case: Case, timeout: float = 30.0) -> httpx.Response:
    with httpx.Client(base_url=base_url, timeout=timeout) as client:
        return client.send(build(client, case))


def test_the_suite_is_large_and_named():
    names = [c.name for c in CASES]
    assert len(CASES) >= 60 and len(set(names)) == len(names)
    assert all(400 <= c.status < 500 and c.field for c in CASES)


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_hostile_request_is_refused_naming_the_field(hostile_server, case):
    store, srv = hostile_server
    t0 = time.perf_counter()
    r = send(srv.url, case)
    elapsed = time.perf_counter() - t0
    body = r.json()
    assert r.status_code == case.status, body
    assert set(body) == {"detail", "field"} and isinstance(body["detail"], str) and body["detail"]
    if case.field.endswith("*"):
        assert (body["field"] or "").startswith(case.field[:-1]), body
    else:
        assert body["field"] == case.field, body
    assert "Traceback" not in body["detail"] and "tok-alice" not in body["detail"]
    assert elapsed < 5.0, f"{case.name}: answered in {elapsed:.2f} s"


def test_healthz_stays_fast_while_the_worst_case_is_refused(hostile_server):
    store, srv = hostile_server
    # the heaviest cases (tagged "worst": the explosive parsers, the largest bodies), one after the
    # other in one client, again and again
    chosen = [c for c in CASES if "worst" in c.tags]
    proc = psutil.Process(srv.proc.pid)
    for case in chosen:  # one round first: the preparation processes are started and have seen each case
        send(srv.url, case)
    rss_before = _settled_rss(proc)
    stop = threading.Event()
    statuses: list[int] = []

    def hammer():
        # the requests are encoded once: the probes below share this process's GIL with the hammer
        with httpx.Client(base_url=srv.url, timeout=30) as client:
            built = [build(client, case) for case in chosen]
            while not stop.is_set():
                for request in built:
                    statuses.append(client.send(request).status_code)

    threads = [threading.Thread(target=hammer)]
    for t in threads:
        t.start()
    latencies = []
    try:
        with httpx.Client(base_url=srv.url, timeout=5) as client:
            time.sleep(0.3)  # the hostile requests are in flight
            for _ in range(30):
                t0 = time.perf_counter()
                assert client.get("/healthz").status_code == 200
                latencies.append(time.perf_counter() - t0)
                time.sleep(0.05)
    finally:
        stop.set()
        for t in threads:
            t.join(30)
    growth = _tree_rss(proc) - rss_before
    lat = sorted(latencies)
    median = statistics.median(lat)
    print(f"\n{store}: {len(chosen)} worst cases, {len(statuses)} refusals; /healthz median {median * 1000:.1f} ms "
          f"p90 {lat[int(0.9 * len(lat)) - 1] * 1000:.1f} ms max {lat[-1] * 1000:.1f} ms, "
          f"growth {growth / 2**20:.1f} MiB")
    assert statuses and all(400 <= s < 500 for s in statuses), statuses
    # /healthz under 100 ms while the worst cases are refused, every probe. The requests are read and
    # prepared in preparation processes at niceness 10 (service/api/preparing.py), so nothing of theirs
    # holds the API process's GIL or its core. Measured on this 2-core machine with
    # `benchmarks/bench_hostile.py --rounds 0 --worst-clients 3 --probes 200` (three hostile clients):
    # median 3-4.5 ms, max 33-76 ms at load average 5-6, against median 7-10 ms, max 40-336 ms with the
    # preparation in threads of the API (where asyncio's slow-callback log showed no callback over 15 ms:
    # the loop waited for the GIL). What is left is other processes on the machine: an idle server's
    # probes reach 62 ms with four busy loops beside it (load average 5) and 250-300 ms at load average
    # 10. CI runs the suite alone on its machine: there every probe counts; on a shared machine one probe
    # in 30 may be late for reasons no server fixes
    late = [x for x in lat if x >= 0.100]
    allowed = 0 if os.environ.get("CI") else 1
    assert len(late) <= allowed and median < 0.020, (f"/healthz over 100 ms {len(late)} times of {len(lat)} "
                                                     f"(max {lat[-1] * 1000:.0f} ms), median {median * 1000:.0f} ms")
    assert growth < 100 * 2**20, f"the server (with its preparation processes) grew by {growth / 2**20:.0f} MiB"


def _settled_rss(proc: psutil.Process, timeout: float = 60.0) -> int:
    """:func:`_tree_rss` once two readings 0.5 s apart differ by less than 5 MiB (processes starting)."""
    last, end = _tree_rss(proc), time.monotonic() + timeout
    while time.monotonic() < end:
        time.sleep(0.5)
        now = _tree_rss(proc)
        if abs(now - last) < 5 * 2**20:
            return now
        last = now
    return last


def _tree_rss(proc: psutil.Process) -> int:
    """Resident memory of the server and its child processes (preparation, compile lane, queue worker)."""
    total = proc.memory_info().rss
    for child in proc.children(recursive=True):
        try:
            total += child.memory_info().rss
        except psutil.NoSuchProcess:
            pass
    return total


def test_csv_export_of_a_hostile_name_is_neutralised(hostile_server, wait_study):
    # OWASP "CSV Injection": a text cell beginning with = + - @ gets a leading single quote;
    # numbers (noise_scale, depth, a negative figure) stay numbers
    import csv
    import io

    _, srv = hostile_server
    name = '=HYPERLINK("http://attacker.invalid","open")'
    with httpx.Client(base_url=srv.url, headers={"Authorization": ALICE}, timeout=30) as c:
        r = c.post("/v1/studies", json={"model": {"name": name, "variables": ["a", "b"], "cliques": [["a", "b"]]},
                                        "compile_only": True, "connectivities": ["line"], "seeds": 1})
        assert r.status_code == 202, r.text
        study = wait_study(c, r.json()["id"], timeout=120)
        assert study["status"] == "done", study
        text = c.get(f"/v1/studies/{study['id']}/rows.csv").text
    row = next(csv.DictReader(io.StringIO(text)))
    assert row["model"] == "'" + name
    assert row["connectivity"] == "line-2" and float(row["noise_scale"]) == 1.0 and int(row["depth"]) > 0
    for key, value in row.items():
        if value.startswith(("=", "+", "-", "@")):
            float(value)  # only a number may still begin so (ValueError otherwise)
