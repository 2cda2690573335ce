"""Regions of a chip: `compare --regions 20` on the 27-qubit example device with a 12-variable model.

    .venv/bin/python benchmarks/bench_regions.py [--method auto|trajectories|clifford] [--compile-only]
                                                 [--strategy structured] [--skip-gain] [--in-process]

Prints the wall time of the whole run (20 placements compiled per strategy and ranked by ESP, the best
3 of each simulated unless --compile-only), the best / median / worst region, and the distribution of
what error-aware placement buys over count-only placement on 32 seeded random devices (ESP ratio).
"""

from __future__ import annotations

import argparse
import io
import json
import math
import random
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

MODEL = {"name": "chain-of-triangles-12", "variables": [f"v{i}" for i in range(12)],
         "cliques": [["v0", "v1", "v2"], ["v2", "v3", "v4"], ["v4", "v5", "v6"], ["v6", "v7", "v8"],
                     ["v8", "v9", "v10"], ["v10", "v11"]]}


def regions(method: str, compile_only: bool, strategy: str | None = None) -> None:
    from toposcout.service.cli import main

    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "m.json"
        path.write_text(json.dumps(MODEL))
        argv = ["compare", str(path), "--device", "alder-27", "--regions", "20", "--method", method]
        if compile_only:
            argv.append("--compile-only")
        if strategy:
            argv += ["--strategy", strategy]
        out, err = io.StringIO(), io.StringIO()
        t = time.perf_counter()
        rc = main(argv, out=out, err=err)
        sec = time.perf_counter() - t
    print(out.getvalue())
    if rc:
        print(err.getvalue(), file=sys.stderr)
    print(f"toposcout {' '.join(argv[:1] + ['MODEL'] + argv[2:])}: {sec:.1f} s wall (exit {rc})")


def in_process() -> None:
    """The same study in this one process (no worker pool, so the ranking runs once), compile-only and with
    the best 3 regions simulated (clifford estimate; 200 trajectories), error budget off."""
    from toposcout.compiler.study import make_tasks, run_task

    for kw in (dict(compile_only=True), dict(method="clifford"), dict(method="trajectories", trajectories=200)):
        ts = make_tasks(MODEL, None, device="alder-27", strategy="structured", regions=20, error_budget=False, **kw)
        t = time.perf_counter()
        rows = [run_task(x) for x in ts]
        sec = time.perf_counter() - t
        figs = [(r["chip_region_rank"], round(r["chip_region_esp"], 3),
                 round(r.get("clifford_state_fidelity") or r.get("state_fidelity") or 0, 3)) for r in rows]
        print(f"in process, {kw}: rank 20 regions + {len(rows)} rows in {sec:.1f} s; (rank, ESP, F) {figs}")


def placement_gain(cases: int = 32) -> None:
    """ESP(error-aware) / ESP(count-only) on seeded random devices (the check of tests/test_devices.py)."""
    from toposcout.compiler.ansatz import build_ansatz
    from toposcout.compiler.compile import compile_ansatz
    from toposcout.compiler.devices import parse_device
    from toposcout.compiler.model import parse_model
    from toposcout.compiler.regions import compiled_esp
    from toposcout.compiler.targets import get_gate_set, make_connectivity

    rng = random.Random(2026)
    out = {"generic": [], "structured": []}
    for k in range(cases):
        fam, size = rng.choice([("grid", "3x3"), ("grid", "3x4"), ("ring", "8"), ("line", "7"), ("heavy-hex", "3")])
        conn = make_connectivity(fam, 1, size=size)
        qubits = []
        for q in range(conn.num_qubits):
            t1 = 120 * math.exp(rng.gauss(0, 0.4)) * (0.15 if rng.random() < 0.1 else 1)
            qubits.append({"index": q, "t1_us": t1, "t2_us": min(t1 * 0.8 * math.exp(rng.gauss(0, 0.3)), 1.9 * t1),
                           "one_qubit_error": min(3e-4 * math.exp(rng.gauss(0, 0.5)), 0.1),
                           "p1_given_0": min(0.012 * math.exp(rng.gauss(0, 0.6)), 0.4),
                           "p0_given_1": min(0.025 * math.exp(rng.gauss(0, 0.6)) * (5 if rng.random() < 0.1 else 1),
                                             0.5)})
        couplers = [{"qubits": list(e), "two_qubit_error": min(8e-3 * math.exp(rng.gauss(0, 0.5))
                                                               * (8 if rng.random() < 0.1 else 1), 0.3)}
                    for e in conn.edges]
        dev = parse_device({"name": "r", "qubits": conn.num_qubits, "edges": [list(e) for e in conn.edges],
                            "base": "superconducting", "defaults": {"two_qubit_error": 0.005},
                            "coupler": couplers, "qubit": qubits})
        n = rng.randint(3, 5)
        v = [f"x{i}" for i in range(n)]
        cl = [[v[i], v[i + 1]] for i in range(n - 1)]
        if rng.random() < 0.5:
            cl.append(rng.sample(v, 3))
        ans = build_ansatz(parse_model({"variables": v, "cliques": cl}))
        st = ("structured", "generic")[k % 2]
        a = compile_ansatz(ans, dev.connectivity, get_gate_set("cx"), strategy=st, seeds=1, profile=dev.profile)
        c = compile_ansatz(ans, dev.connectivity, get_gate_set("cx"), strategy=st, seeds=1)
        out[st].append(compiled_esp(a, dev.profile) / compiled_esp(c, dev.profile))
    for st, r in out.items():
        r = np.array(r)
        print(f"{st:<10} ESP(errors)/ESP(count) over {len(r)} random devices: min {r.min():.3f}, "
              f"10th pct {np.percentile(r, 10):.3f}, median {np.median(r):.3f}, mean {r.mean():.3f}, "
              f"90th pct {np.percentile(r, 90):.3f}, max {r.max():.3f}; not lower (1 % tol.) in "
              f"{np.mean(r >= 0.99):.0%}")


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--method", default="auto")
    ap.add_argument("--compile-only", action="store_true")
    ap.add_argument("--strategy", default=None, help="default: one set of rows per generic and structured")
    ap.add_argument("--skip-gain", action="store_true")
    ap.add_argument("--in-process", action="store_true", help="only the one-process timings")
    a = ap.parse_args()
    if a.in_process:
        in_process()
        raise SystemExit(0)
    regions(a.method, a.compile_only, a.strategy)
    if not a.skip_gain:
        placement_gain()
