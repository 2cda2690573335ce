"""Load benchmark of the REST API on loopback: 20 concurrent clients, bounded request count.

Measures throughput and p50/p99 latency of
  * ``GET /v1/studies/{id}`` on a finished study (target p99 < 25 ms), and
  * a cached ``POST /v1/studies`` (every task already in the cache: answered without work;
    target p99 < 50 ms),
both on SQLite and, with ``--postgres``, again on a fresh PostgreSQL database; and on PostgreSQL
(``--postgres``, fresh databases made and dropped here):
  * the per-owner cap under a burst: 20 concurrent submissions of one owner, exactly the cap
    (8) accepted;
  * 200 submissions from 20 clients (one owner each, 10 studies each, an Idempotency-Key per
    study, retried after a 429 or a lost connection) with the API killed (SIGKILL of the
    whole process group) and restarted in the middle: every study exactly once, every row
    done, no 5xx.

By default it starts its own ``toposcout serve`` on 127.0.0.1 (a free port, a temporary data
folder, SQLite; ``--api-workers N`` API processes) and stops it afterwards; ``--url`` points
the first two phases at a running server instead (``--token`` for one with tokens). Only
loopback addresses are accepted. The Python clients are threads of one process unless
``--client-processes P`` spreads them over P processes: in one process they share one interpreter
lock, and the time a client waits for it is in its latency (wrk, when installed, measures the
same requests from C).

    .venv/bin/python benchmarks/bench_load.py                  # 20 clients x 50 requests per phase
    .venv/bin/python benchmarks/bench_load.py --api-workers 2 --postgres
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import sys
import tempfile
import threading
import time
import uuid
from pathlib import Path
from urllib.parse import urlparse

import httpx

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

MODEL = {"name": "bench-chain", "variables": ["a", "b", "c", "d", "e"],
         "cliques": [["a", "b", "c"], ["c", "d"], ["d", "e"]]}
BODY = {"model": MODEL, "connectivities": ["line", "ring", "grid"], "compile_only": True, "seeds": 2}


def _percentile(xs: list[float], q: float) -> float:
    xs = sorted(xs)
    k = min(len(xs) - 1, max(0, int(round(q / 100 * (len(xs) - 1)))))
    return xs[k]


def _call(c: httpx.Client, spec: tuple) -> httpx.Response:
    method, path, body = spec
    return c.get(path) if method == "GET" else c.post(path, json=body)


def _clients(url: str, headers: dict, clients: int, requests: int, spec: tuple, barrier) -> tuple:
    """``clients`` threads of this process, each ``requests`` calls after the barrier: latencies,
    errors, and the first start and last end (perf_counter: CLOCK_MONOTONIC, one clock for all processes)."""
    latencies: list[float] = []
    errors: list[str] = []
    spans: list[tuple[float, float]] = []
    lock = threading.Lock()

    def worker():
        mine, bad = [], []
        with httpx.Client(base_url=url, headers=headers, timeout=30) as c:
            _call(c, spec)  # warm the connection
            barrier.wait()
            start = time.perf_counter()
            for _ in range(requests):
                t0 = time.perf_counter()
                r = _call(c, spec)
                mine.append(time.perf_counter() - t0)
                if r.status_code >= 300:
                    bad.append(f"{r.status_code} {r.text[:100]}")
            end = time.perf_counter()
        with lock:
            latencies.extend(mine)
            errors.extend(bad)
            spans.append((start, end))

    threads = [threading.Thread(target=worker) for _ in range(clients)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return latencies, errors, min(s for s, _ in spans), max(e for _, e in spans)


def _client_process(url, headers, clients, requests, spec, barrier, out) -> None:
    out.put(_clients(url, headers, clients, requests, spec, barrier))


def _phase(url: str, headers: dict, clients: int, requests: int, spec: tuple, processes: int = 1) -> dict:
    """``clients`` concurrent clients (threads), spread over ``processes`` load-generator processes
    (one: every client shares one interpreter lock, which then adds to what they measure)."""
    if processes == 1:
        parts = [_clients(url, headers, clients, requests, spec, threading.Barrier(clients))]
    else:
        import multiprocessing  # only for a load generator of several processes

        ctx = multiprocessing.get_context("spawn")
        barrier, out = ctx.Barrier(clients), ctx.Queue()
        shares = [n for n in (clients // processes + (i < clients % processes) for i in range(processes)) if n]
        procs = [ctx.Process(target=_client_process, args=(url, headers, n, requests, spec, barrier, out))
                 for n in shares]
        for pr in procs:
            pr.start()
        parts = [out.get(timeout=600) for _ in procs]
        for pr in procs:
            pr.join(30)
    latencies = [x for part in parts for x in part[0]]
    errors = [x for part in parts for x in part[1]]
    wall = max(p[3] for p in parts) - min(p[2] for p in parts)
    return {"requests": len(latencies), "errors": len(errors), "first_error": errors[0] if errors else None,
            "throughput_rps": len(latencies) / wall, "p50_ms": 1000 * statistics.median(latencies),
            "p99_ms": 1000 * _percentile(latencies, 99), "max_ms": 1000 * max(latencies)}


def run(url: str, token: str | None, clients: int, requests: int, processes: int = 1) -> dict:
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    with httpx.Client(base_url=url, headers=headers, timeout=120) as c:
        sid = c.post("/v1/studies", json=BODY).json()["id"]
        end = time.monotonic() + 300
        while c.get(f"/v1/studies/{sid}").json()["status"] not in ("done", "failed"):
            if time.monotonic() > end:
                raise SystemExit("the warm-up study did not finish within 300 s")
            time.sleep(0.2)
        n_rows = len(c.get(f"/v1/studies/{sid}").json()["rows"])
    get = _phase(url, headers, clients, requests, ("GET", f"/v1/studies/{sid}", None), processes)
    post = _phase(url, headers, clients, requests, ("POST", "/v1/studies", BODY), processes)
    out = {"rows_per_study": n_rows, "get_done_study": get, "cached_post": post}
    if shutil.which("wrk"):
        out["wrk_get"] = _wrk(f"{url}/v1/studies/{sid}", clients, token, None)
        out["wrk_post"] = _wrk(f"{url}/v1/studies", clients, token, BODY)
    return out


def _lua_long_string(text: str) -> str:
    """``text`` as a Lua long bracket string whose level (``[==[``) does not occur in it: a JSON body
    holds ``]]`` (nested arrays), which closes a level-0 ``[[...]]`` early (Lua 5.1 manual, section 2.1).

    >>> _lua_long_string('[["a","b"]]')
    '[=[[["a","b"]]]=]'
    """
    level = 0
    while f"]{'=' * level}]" in text:
        level += 1
    return f"[{'=' * level}[{text}]{'=' * level}]"


def _wrk(url: str, clients: int, token: str | None, body: dict | None, seconds: int = 8) -> dict:
    """The same request driven by wrk (C): it measures the server rather than Python clients."""
    import json
    import re
    import subprocess

    lines = [f'wrk.headers["Authorization"] = "Bearer {token}"'] if token else []
    if body is not None:
        lines += ['wrk.method = "POST"', 'wrk.headers["Content-Type"] = "application/json"',
                  f"wrk.body = {_lua_long_string(json.dumps(body, separators=(',', ':')))}"]
    with tempfile.NamedTemporaryFile("w", suffix=".lua", delete=False) as fh:
        fh.write("\n".join(lines) + "\n")
    res = subprocess.run(["wrk", f"-t{min(2, clients)}", f"-c{clients}", f"-d{seconds}s", "--latency", "-s", fh.name,
                          url], capture_output=True, text=True, timeout=seconds + 60)
    os.unlink(fh.name)
    if res.returncode != 0 or res.stderr.strip():
        # a script error makes wrk send plain GETs of the URL and say so only on stderr
        raise SystemExit(f"wrk failed ({res.returncode}): {res.stderr.strip()[:300]}")
    text = res.stdout

    def ms(q: str) -> float:
        m = re.search(rf"^\s*{q}%\s+([\d.]+)(us|ms|s)\s*$", text, re.M)
        if not m:
            return float("nan")
        return float(m.group(1)) * {"us": 1e-3, "ms": 1.0, "s": 1e3}[m.group(2)]

    rps = re.search(r"Requests/sec:\s+([\d.]+)", text)
    non2xx = re.search(r"Non-2xx or 3xx responses:\s+(\d+)", text)
    return {"throughput_rps": float(rps.group(1)) if rps else float("nan"), "p50_ms": ms("50"), "p99_ms": ms("99"),
            "non_2xx": int(non2xx.group(1)) if non2xx else 0}


PG_DEFAULT = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
CAP = 8


def _fresh_pg(admin_url: str):
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    admin = make_url(admin_url)
    engine = create_engine(admin, isolation_level="AUTOCOMMIT")
    name = f"toposcout_bench_{uuid.uuid4().hex[:10]}"
    with engine.connect() as c:
        c.execute(text(f'CREATE DATABASE "{name}"'))

    def drop():
        with engine.connect() as c:
            c.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        engine.dispose()
    return admin.set(database=name).render_as_string(hide_password=False), drop


def _post_until_accepted(c: httpx.Client, body: dict, key: str, stats: dict, lock: threading.Lock) -> str:
    """POST with one Idempotency-Key until 202: a 429 waits (at most 1 s of its Retry-After),
    a lost connection (the server being killed) is retried with the same key."""
    while True:
        t0 = time.perf_counter()
        try:
            r = c.post("/v1/studies", json=body, headers={"Idempotency-Key": key})
        except httpx.TransportError:
            with lock:
                stats["connection_errors"] += 1
            time.sleep(0.2)
            continue
        dt_ms = 1000 * (time.perf_counter() - t0)
        with lock:
            stats["latencies"].append(dt_ms)
            stats["status"][r.status_code] = stats["status"].get(r.status_code, 0) + 1
        if r.status_code == 202:
            return r.json()["id"]
        if r.status_code == 429:
            time.sleep(min(1.0, float(r.headers.get("retry-after", "1"))))
            continue
        if r.status_code >= 500:
            time.sleep(0.2)
            continue
        raise SystemExit(f"unexpected {r.status_code}: {r.text[:200]}")


def run_postgres(admin_url: str, api_workers: int) -> dict:
    from tests.conftest import Server

    url, drop = _fresh_pg(admin_url)
    tokens = {f"client{i:02d}": f"bench-token-{i:02d}-{uuid.uuid4().hex[:6]}" for i in range(20)}
    tokens["burst"] = f"bench-token-burst-{uuid.uuid4().hex[:6]}"
    env = {"TOPOSCOUT_WORKERS": "2", "TOPOSCOUT_LEASE_SECONDS": "5",
           "TOPOSCOUT_MAX_ACTIVE_STUDIES_PER_OWNER": str(CAP)}
    tmp = Path(tempfile.mkdtemp(prefix="toposcout-bench-pg-"))
    server = Server(tmp, tokens=",".join(f"{o}:{t}" for o, t in tokens.items()), env=env, database_url=url,
                    args=["--workers", str(api_workers)]).start()
    out: dict = {}
    try:
        # 1. the cap under a burst: 20 concurrent submissions of one owner, none cached
        barrier = threading.Barrier(20)
        codes: list[int] = []
        lock = threading.Lock()

        def burst(i: int) -> None:
            body = {"model": MODEL, "connectivities": ["line"], "compile_only": True, "seeds": 1, "seed": 1000 + i}
            with httpx.Client(base_url=server.url, headers={"Authorization": f"Bearer {tokens['burst']}"},
                              timeout=60) as c:
                barrier.wait()
                r = c.post("/v1/studies", json=body)
            with lock:
                codes.append(r.status_code)

        threads = [threading.Thread(target=burst, args=(i,)) for i in range(20)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        out["burst"] = {"accepted": codes.count(202), "refused_429": codes.count(429), "cap": CAP,
                        "other": [c for c in codes if c not in (202, 429)]}

        # 2. 200 submissions from 20 clients, the API killed and restarted in the middle
        stats = {"latencies": [], "status": {}, "connection_errors": 0}
        ids: dict[str, list[str]] = {o: [] for o in tokens if o != "burst"}
        accepted = threading.Semaphore(0)

        def client(owner: str) -> None:
            k = int(owner[-2:])
            with httpx.Client(base_url=server.url, headers={"Authorization": f"Bearer {tokens[owner]}"},
                              timeout=60) as c:
                for j in range(10):
                    body = {"model": MODEL, "connectivities": ["line"], "compile_only": True, "seeds": 1,
                            "seed": 100 * k + j}
                    ids[owner].append(_post_until_accepted(c, body, f"{owner}-{j}", stats, lock))
                    accepted.release()

        threads = [threading.Thread(target=client, args=(o,)) for o in ids]
        t0 = time.perf_counter()
        for t in threads:
            t.start()
        for _ in range(100):
            accepted.acquire()
        server.kill()  # SIGKILL: the API processes and the queue worker, no shutdown at all
        killed_at = time.perf_counter() - t0
        server = server.restarted()
        for t in threads:
            t.join()
        wall = time.perf_counter() - t0
        # every study exactly once, every row done
        admin = {"Authorization": f"Bearer {tokens['client00']}"}
        with httpx.Client(base_url=server.url, headers=admin, timeout=60) as c:
            end = time.monotonic() + 600
            pending = {sid for v in ids.values() for sid in v}
            while pending and time.monotonic() < end:
                for sid in list(pending):
                    st = c.get(f"/v1/studies/{sid}").json()
                    if st["status"] in ("done", "failed", "cancelled"):
                        pending.discard(sid)
                time.sleep(0.5)
            per_owner = {o: c.get("/v1/studies", params={"owner": o, "limit": 1}).json()["total"] for o in ids}
            done_rows = failed = 0
            for sid in (sid for v in ids.values() for sid in v):
                st = c.get(f"/v1/studies/{sid}").json()
                done_rows += sum(1 for r in st["rows"] if r["status"] == "done")
                failed += st["status"] != "done"
        all_ids = [sid for v in ids.values() for sid in v]
        lat = stats["latencies"]
        out["submissions"] = {
            "studies": len(all_ids), "distinct": len(set(all_ids)),
            "stored_per_owner": sorted(set(per_owner.values())), "lost": 200 - len(set(all_ids)),
            "duplicated": sum(per_owner.values()) - len(set(all_ids)), "rows_done": done_rows,
            "not_done": failed + len(pending), "status_counts": stats["status"],
            "5xx": sum(n for code, n in stats["status"].items() if code >= 500),
            "connection_errors": stats["connection_errors"], "killed_at_s": killed_at, "wall_s": wall,
            "p50_ms": statistics.median(lat), "p99_ms": _percentile(lat, 99)}
    finally:
        server.stop()
        drop()
    return out


def _print(out: dict, clients: int, requests: int, url: str) -> None:
    print(f"toposcout load benchmark: {clients} clients x {requests} requests per phase, {url}")
    print(f"study: {out['rows_per_study']} rows")
    targets = {"get_done_study": 25.0, "cached_post": 50.0}
    for name, label in (("get_done_study", "GET /v1/studies/{id} (done)"), ("cached_post", "POST /v1/studies (cached)")):
        r = out[name]
        met = "met" if r["p99_ms"] < targets[name] else "NOT met"
        print(f"{label:<30} {r['throughput_rps']:7.1f} req/s  p50 {r['p50_ms']:6.1f} ms  p99 {r['p99_ms']:6.1f} ms  "
              f"max {r['max_ms']:6.1f} ms  errors {r['errors']}  (target p99 < {targets[name]:g} ms: {met})"
              + (f" ({r['first_error']})" if r["errors"] else ""))
    for name, label, target in (("wrk_get", "GET (done), wrk", 25.0), ("wrk_post", "POST (cached), wrk", 50.0)):
        if name in out:
            r = out[name]
            print(f"{label:<30} {r['throughput_rps']:7.1f} req/s  p50 {r['p50_ms']:6.1f} ms  p99 {r['p99_ms']:6.1f} ms  "
                  f"non-2xx {r['non_2xx']}  (target p99 < {target:g} ms: {'met' if r['p99_ms'] < target else 'NOT met'})")


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--url", help="a running server on loopback (default: start one)")
    p.add_argument("--token", default=os.environ.get("TOPOSCOUT_TOKEN"), help="bearer token for --url")
    p.add_argument("--clients", type=int, default=20, help="concurrent clients (default 20)")
    p.add_argument("--requests", type=int, default=50, help="requests per client per phase (default 50)")
    p.add_argument("--client-processes", type=int, default=1, metavar="P",
                   help="spread the Python clients over P processes (default 1: all 20 share one interpreter lock)")
    p.add_argument("--api-workers", type=int, default=1, help="API processes of the server started here (default 1)")
    p.add_argument("--postgres", nargs="?", const=os.environ.get("TOPOSCOUT_TEST_POSTGRES_URL", PG_DEFAULT),
                   metavar="ADMIN_URL", help="also the latency phases on PostgreSQL, and the cap burst and 200 "
                                             f"submissions with a kill; default admin URL {PG_DEFAULT}")
    p.add_argument("--skip-latency", action="store_true", help="only the PostgreSQL phase")
    args = p.parse_args(argv)
    if not 1 <= args.clients <= 200 or not 1 <= args.requests <= 1000 or not 1 <= args.api_workers <= 8 \
            or not 1 <= args.client_processes <= min(16, args.clients):
        p.error("--clients must be 1..200, --requests 1..1000, --api-workers 1..8, --client-processes 1..16 and at "
                "most --clients (the benchmark is bounded)")
    if not args.skip_latency:
        stores = ["SQLite"] + (["PostgreSQL"] if args.postgres and args.url is None else [])
        for store in stores:
            server = None
            drop = None
            url = args.url
            if url is None:
                from tests.conftest import Server

                tmp = Path(tempfile.mkdtemp(prefix="toposcout-bench-"))
                database_url = None
                if store == "PostgreSQL":
                    database_url, drop = _fresh_pg(args.postgres)
                server = Server(tmp, env={"TOPOSCOUT_WORKERS": "2"}, database_url=database_url,
                                args=["--workers", str(args.api_workers)]).start()
                url = server.url
            host = urlparse(url).hostname
            if host not in ("127.0.0.1", "localhost", "::1"):
                p.error("the load benchmark only runs against a loopback address")
            try:
                out = run(url, args.token, args.clients, args.requests, args.client_processes)
            finally:
                if server is not None:
                    server.stop()
                if drop is not None:
                    drop()
            where = f" ({args.api_workers} API processes, {store})" if args.url is None else ""
            where += f", clients in {args.client_processes} processes" if args.client_processes > 1 else ""
            _print(out, args.clients, args.requests, url + where)
    if args.postgres:
        pg = run_postgres(args.postgres, args.api_workers)
        b, s = pg["burst"], pg["submissions"]
        print(f"PostgreSQL, {args.api_workers} API processes:")
        print(f"  cap burst: 20 concurrent submissions of one owner: {b['accepted']} accepted, {b['refused_429']} x 429 "
              f"(cap {b['cap']}: {'exactly enforced' if b['accepted'] == b['cap'] and not b['other'] else 'NOT held'})")
        print(f"  200 submissions from 20 clients, API SIGKILLed at {s['killed_at_s']:.1f} s and restarted: "
              f"{s['distinct']} studies, {s['lost']} lost, {s['duplicated']} duplicated, {s['5xx']} 5xx, "
              f"{s['rows_done']} rows done, {s['not_done']} not done; "
              f"{s['connection_errors']} connection errors retried; statuses {s['status_counts']}; "
              f"POST p50 {s['p50_ms']:.1f} ms p99 {s['p99_ms']:.1f} ms; {s['wall_s']:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
