"""Speed-up of one row split across Dask workers.

    .venv/bin/python benchmarks/bench_split.py                 # 20-variable chain, trajectories to SE 0.01
    .venv/bin/python benchmarks/bench_split.py --variables 16 --precision 0.02   # a quicker case

Runs the same row (a chain of pairs on a line, superconducting-like profile, structured
compilation, ``method=trajectories``, no error budget) through :class:`DaskExecutor` on a
``LocalCluster`` of 1 worker and then of 2 workers (each worker one task thread and
``OMP_NUM_THREADS = cores / workers``, as ``toposcout worker`` sets it). With one worker the
row runs whole (``run_task``); with two it is split into two parts
(``toposcout.compiler.parts``: plan, two shares of the trajectories with non-overlapping seed
ranges, merge). Prints the wall time of each, the speed-up, and both rows' state fidelity
with its standard error (they must agree within standard error).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


class _Store:
    def __init__(self):
        self.rows = {}

    def record_row(self, study_id, task_index, row, seconds, cached=False):
        self.rows[(study_id, task_index)] = row


def chain(n: int) -> dict:
    names = [f"x{i}" for i in range(n)]
    return {"name": f"chain{n}", "variables": names, "cliques": [names[i:i + 2] for i in range(n - 1)]}


def run(task: dict, workers: int) -> tuple[dict, float]:
    import distributed

    from toposcout.service.execution.dask import WORKER_PRELOAD, DaskExecutor

    omp = max(1, (os.cpu_count() or 1) // workers)
    env = {"OMP_NUM_THREADS": str(omp), "MKL_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}
    with distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, memory_limit="6GiB",
                                  host="127.0.0.1", dashboard_address=None, preload=list(WORKER_PRELOAD),
                                  env=env) as cluster:
        store = _Store()
        ex = DaskExecutor(store=store, address=cluster.scheduler_address, time_limit=None)
        ex.start()
        try:
            assert ex.wait_connected(60)
            t0 = time.perf_counter()
            ex.submit("bench", [(0, task)])
            assert ex.wait_idle(7200)
            seconds = time.perf_counter() - t0
        finally:
            ex.shutdown()
    return store.rows[("bench", 0)], seconds


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--variables", type=int, default=20)
    p.add_argument("--precision", type=float, default=0.01)
    args = p.parse_args(argv)
    from toposcout.compiler.study import make_tasks

    task = make_tasks(chain(args.variables), ["line"], seeds=1, strategy="structured", method="trajectories",
                      precision=args.precision, error_budget=False, time_budget_seconds=7200)[0]
    print("| workers | parts | active qubits | trajectories | state fidelity | seconds | speed-up |")
    print("|---|---|---|---|---|---|---|")
    base = None
    rows = []
    for workers in (1, 2):
        row, seconds = run(task, workers)
        rows.append(row)
        base = base or seconds
        if row.get("noise_error") or row.get("error"):
            print(f"  error: {row.get('error') or row.get('noise_error')}")
        print(f"| {workers} | {row.get('row_parts') or 1} | {row.get('active_qubits')} | {row.get('trajectories')} | "
              f"{row.get('state_fidelity'):.4f} ± {row.get('state_fidelity_se'):.4f} | {seconds:.1f} | "
              f"{base / seconds:.2f} |", flush=True)
    a, b = rows
    diff = abs(a["state_fidelity"] - b["state_fidelity"])
    se = (a["state_fidelity_se"] ** 2 + b["state_fidelity_se"] ** 2) ** 0.5
    print(f"\n1 vs 2 workers: |dF| = {diff:.4f} = {diff / se:.2f} standard errors of the difference")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
