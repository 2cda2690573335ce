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
    from toposcout.compiler import regions

    out = {"generic": [], "structured": []}
    for strategy, ratio in regions.placement_gain(cases, seed=2026):
        out[strategy].append(ratio)
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
