"""Load benchmark of the REST API on loopback: 20 concurrent clients, bounded request count.

Measures throughput and p50/p99 latency of
  * ``GET /v1/studies/{id}`` on a finished study, and
  * a cached ``POST /v1/studies`` (every task already in the cache: answered without work).

By default it starts its own ``toposcout serve`` on 127.0.0.1 (a free port, a temporary data
folder, SQLite) and stops it afterwards; ``--url`` points it at a running server instead
(``--token`` for one with tokens). Only loopback addresses are accepted.

    .venv/bin/python benchmarks/bench_load.py                  # 20 clients x 50 requests per phase
    .venv/bin/python benchmarks/bench_load.py --clients 20 --requests 100
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import threading
import time
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


def _phase(url: str, headers: dict, clients: int, requests: int, call) -> dict:
    latencies: list[float] = []
    errors: list[str] = []
    lock = threading.Lock()
    barrier = threading.Barrier(clients)

    def worker():
        mine, bad = [], []
        with httpx.Client(base_url=url, headers=headers, timeout=30) as c:
            call(c)  # warm the connection
            barrier.wait()
            for _ in range(requests):
                t0 = time.perf_counter()
                r = call(c)
                mine.append(time.perf_counter() - t0)
                if r.status_code >= 300:
                    bad.append(f"{r.status_code} {r.text[:100]}")
        with lock:
            latencies.extend(mine)
            errors.extend(bad)

    threads = [threading.Thread(target=worker) for _ in range(clients)]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    wall = time.perf_counter() - t0
    return {"requests": len(latencies), "errors": len(errors), "first_error": errors[0] if errors else None,
            "throughput_rps": len(latencies) / wall, "p50_ms": 1000 * statistics.median(latencies),
            "p99_ms": 1000 * _percentile(latencies, 99), "max_ms": 1000 * max(latencies)}


def run(url: str, token: str | None, clients: int, requests: int) -> dict:
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    with httpx.Client(base_url=url, headers=headers, timeout=120) as c:
        sid = c.post("/v1/studies", json=BODY).json()["id"]
        end = time.monotonic() + 300
        while c.get(f"/v1/studies/{sid}").json()["status"] not in ("done", "failed"):
            if time.monotonic() > end:
                raise SystemExit("the warm-up study did not finish within 300 s")
            time.sleep(0.2)
        n_rows = len(c.get(f"/v1/studies/{sid}").json()["rows"])
    get = _phase(url, headers, clients, requests, lambda c: c.get(f"/v1/studies/{sid}"))
    post = _phase(url, headers, clients, requests, lambda c: c.post("/v1/studies", json=BODY))
    return {"rows_per_study": n_rows, "get_done_study": get, "cached_post": post}


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--url", help="a running server on loopback (default: start one)")
    p.add_argument("--token", default=os.environ.get("TOPOSCOUT_TOKEN"), help="bearer token for --url")
    p.add_argument("--clients", type=int, default=20, help="concurrent clients (default 20)")
    p.add_argument("--requests", type=int, default=50, help="requests per client per phase (default 50)")
    args = p.parse_args(argv)
    if not 1 <= args.clients <= 200 or not 1 <= args.requests <= 1000:
        p.error("--clients must be 1..200 and --requests 1..1000 (the benchmark is bounded)")
    server = None
    url = args.url
    if url is None:
        from tests.service_support import Server

        tmp = Path(tempfile.mkdtemp(prefix="toposcout-bench-"))
        server = Server(tmp, env={"TOPOSCOUT_WORKERS": "2"}).start()
        url = server.url
    host = urlparse(url).hostname
    if host not in ("127.0.0.1", "localhost", "::1"):
        p.error("the load benchmark only runs against a loopback address")
    try:
        out = run(url, args.token, args.clients, args.requests)
    finally:
        if server is not None:
            server.stop()
    print(f"toposcout load benchmark: {args.clients} clients x {args.requests} requests per phase, {url}")
    print(f"study: {out['rows_per_study']} rows")
    for name, label in (("get_done_study", "GET /v1/studies/{id} (done)"), ("cached_post", "POST /v1/studies (cached)")):
        r = out[name]
        print(f"{label:<30} {r['throughput_rps']:7.1f} req/s  p50 {r['p50_ms']:6.1f} ms  p99 {r['p99_ms']:6.1f} ms  "
              f"max {r['max_ms']:6.1f} ms  errors {r['errors']}" + (f" ({r['first_error']})" if r["errors"] else ""))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
