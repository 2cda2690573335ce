"""The two explosive requests (a UAI header declaring 1e9 variables, a node-link graph with
3^15 maximal cliques) against a live server: answer time and the API's memory growth (RSS of
the API process and its preparation processes, where requests are read, sampled every 10 ms
while the request is in flight), and /healthz latency while they are refused.

  * a 46-byte UAI text that declares 1,000,000,000 variables,
  * a 45-node node-link graph (every pair joined except within groups of three) with 3^15
    maximal cliques.

By default it starts its own ``toposcout serve`` on 127.0.0.1 (a free port, a temporary data
folder, SQLite, one worker) and stops it afterwards.

    .venv/bin/python benchmarks/bench_hostile.py                 # 5 rounds of each request
    .venv/bin/python benchmarks/bench_hostile.py --rounds 20
    .venv/bin/python benchmarks/bench_hostile.py --worst-clients 3 --probes 200   # the /healthz phase only

Last, ``--worst-clients`` clients (default 3; 0: skip) repeat every case of the hostile suite tagged
"worst" (``tests/hostile_cases.py``) from a process of their own while ``/healthz`` is probed
``--probes`` times (default 100): median, p90, p99 and max.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import httpx
import psutil

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from tests.hostile_cases import CASES, EXPLOSIVE  # noqa: E402  (the suite's own data: one definition)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_server(folder: Path) -> tuple[subprocess.Popen, str]:
    port = _free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("TOPOSCOUT_")}
    env.update(TOPOSCOUT_DATA_DIR=str(folder), TOPOSCOUT_WORKERS="1")
    log = open(folder / "server.log", "wb")
    proc = subprocess.Popen([sys.executable, "-m", "toposcout.service.cli", "serve", "--port", str(port)],
                            env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    url = f"http://127.0.0.1:{port}"
    end = time.monotonic() + 90
    while time.monotonic() < end:
        if proc.poll() is not None:
            raise SystemExit(f"the server exited: {(folder / 'server.log').read_text()[-2000:]}")
        try:
            if httpx.get(url + "/healthz", timeout=2).status_code == 200:
                return proc, url
        except httpx.HTTPError:
            time.sleep(0.1)
    proc.kill()
    raise SystemExit("the server did not answer within 90 s")


def api_rss(proc: psutil.Process) -> int:
    """RSS of the API process and its own child processes (the preparation processes, where a request
    is read, and the compile lane), not the queue worker's (it computes rows, not requests)."""
    total = proc.memory_info().rss
    for child in proc.children():
        try:
            if " worker " not in " ".join(child.cmdline()):
                total += child.memory_info().rss
        except psutil.NoSuchProcess:
            pass
    return total


def one(client: httpx.Client, proc: psutil.Process, body: dict) -> dict:
    """Send ``body``; the answer's status, seconds, and the peak RSS growth while in flight."""
    base = api_rss(proc)
    peak = [base]
    done = threading.Event()

    def sample():
        while not done.is_set():
            peak[0] = max(peak[0], api_rss(proc))
            time.sleep(0.01)

    t = threading.Thread(target=sample)
    t.start()
    t0 = time.perf_counter()
    r = client.post("/v1/studies", json=body)
    elapsed = time.perf_counter() - t0
    done.set()
    t.join()
    peak[0] = max(peak[0], api_rss(proc))
    return {"status": r.status_code, "field": r.json().get("field"), "seconds": elapsed,
            "rss_growth_mb": (peak[0] - base) / 2**20}


def healthz_during(url: str, body: dict, probes: int = 40) -> list[float]:
    stop = threading.Event()

    def hammer():
        with httpx.Client(base_url=url, timeout=120) as c:
            while not stop.is_set():
                c.post("/v1/studies", json=body)

    threads = [threading.Thread(target=hammer) for _ in range(2)]
    for t in threads:
        t.start()
    time.sleep(0.2)
    lat = probe_healthz(url, probes, pause=0.02)
    stop.set()
    for t in threads:
        t.join()
    return lat


def probe_healthz(url: str, probes: int, *, pause: float) -> list[float]:
    """Seconds of ``probes`` sequential ``GET /healthz``, ``pause`` s apart."""
    lat = []
    with httpx.Client(base_url=url, timeout=10) as c:
        for _ in range(probes):
            t0 = time.perf_counter()
            c.get("/healthz")
            lat.append(time.perf_counter() - t0)
            time.sleep(pause)
    return lat


def _hammer_worst(url: str, clients: int, stop) -> None:
    """Child process: ``clients`` threads sending the suite's worst cases one after the other until ``stop``."""
    chosen = [c for c in CASES if "worst" in c.tags]

    def one() -> None:
        with httpx.Client(base_url=url, timeout=60) as client:
            built = []
            for case in chosen:
                req = dict(case.request)
                method, path = req.pop("method"), req.pop("path")
                req.pop("auth", None)  # this server has no tokens
                built.append(client.build_request(method, path, **req))
                built[-1].read()
            while not stop.is_set():
                for request in built:
                    client.send(request)

    threads = [threading.Thread(target=one) for _ in range(clients)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()


def healthz_while_worst(url: str, clients: int, probes: int) -> list[float]:
    import multiprocessing  # noqa: PLC0415 - only this phase starts a process

    ctx = multiprocessing.get_context("fork")  # the hammer must not share this process's GIL with the probes
    stop = ctx.Event()
    proc = ctx.Process(target=_hammer_worst, args=(url, clients, stop))
    proc.start()
    time.sleep(1.0)
    try:
        lat = probe_healthz(url, probes, pause=0.05)
    finally:
        stop.set()
        proc.join(60)
    return sorted(lat)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rounds", type=int, default=5, help="times each request is sent (default 5; 0: skip)")
    p.add_argument("--worst-clients", type=int, default=3, help="clients repeating the worst cases (default 3)")
    p.add_argument("--probes", type=int, default=100, help="/healthz probes meanwhile (default 100)")
    args = p.parse_args(argv)
    folder = Path(tempfile.mkdtemp(prefix="toposcout-hostile-"))
    server, url = start_server(folder)
    try:
        proc = psutil.Process(server.pid)
        time.sleep(5)  # the preparation processes start with the API
        rss0 = api_rss(proc)
        print(f"toposcout hostile benchmark: {url}, API RSS (with its preparation processes) at start "
              f"{rss0 / 2**20:.0f} MiB")
        for name, model in EXPLOSIVE.items() if args.rounds else ():
            body = {"model": model, "compile_only": True, "connectivities": ["line"]}
            size = len(model) if isinstance(model, str) else len(json.dumps(model))
            with httpx.Client(base_url=url, timeout=120) as client:
                runs = [one(client, proc, body) for _ in range(args.rounds + 1)]
            cold, runs = runs[0], runs[1:]  # the first request of a kind pays the lazy imports
            secs = [r["seconds"] for r in runs]
            lat = healthz_during(url, body)
            print(f"{name:<32} model {size:>6} bytes  -> {runs[0]['status']} field {runs[0]['field']!r}  "
                  f"answer first {cold['seconds'] * 1000:6.1f} ms, then median {statistics.median(secs) * 1000:6.1f} ms  "
                  f"max {max(secs) * 1000:6.1f} ms  "
                  f"RSS growth max {max(r['rss_growth_mb'] for r in [cold, *runs]):5.1f} MiB  "
                  f"/healthz meanwhile median {statistics.median(lat) * 1000:5.1f} ms  max {max(lat) * 1000:5.1f} ms")
        if args.worst_clients:
            lat = healthz_while_worst(url, args.worst_clients, args.probes)
            n = len(lat)
            print(f"/healthz while {args.worst_clients} clients repeat the {sum('worst' in c.tags for c in CASES)} worst "
                  f"cases: {n} probes, median {statistics.median(lat) * 1000:.1f} ms  p90 "
                  f"{lat[int(0.9 * n) - 1] * 1000:.1f} ms  p99 {lat[max(0, int(0.99 * n) - 1)] * 1000:.1f} ms  "
                  f"max {lat[-1] * 1000:.1f} ms  (load average {os.getloadavg()[0]:.1f})")
        rss1 = api_rss(proc)
        print(f"API RSS (with its preparation processes) at the end {rss1 / 2**20:.0f} MiB "
              f"(growth {(rss1 - rss0) / 2**20:.1f} MiB)")
    finally:
        os.killpg(server.pid, signal.SIGINT)  # the server and its workers (its own process group)
        try:
            server.wait(20)
        except subprocess.TimeoutExpired:
            os.killpg(server.pid, signal.SIGKILL)
    return 0


if __name__ == "__main__":
    sys.exit(main())
