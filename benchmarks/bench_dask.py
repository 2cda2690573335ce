"""Local executor vs a two-worker Dask LocalCluster on the same sweep (not a timed test).

    .venv/bin/python benchmarks/bench_dask.py [--model examples/orchard-frost.json] [--workers 2]

The sweep: one model, 4 connectivities x 6 noise scales = 24 noisy tasks. Reported:

* local: the service's :class:`toposcout.service.execution.local.LocalExecutor` with ``--workers`` spawned
  processes (warm: started before the clock runs), as the service runs it, and once more with
  ``OMP_NUM_THREADS=1`` in its environment (one simulator thread per process, as on a Dask worker);
* dask: :class:`toposcout.service.execution.dask.DaskExecutor` on a warm LocalCluster (started, modules
  preloaded) with rows going to an in-memory store; the cluster's start-up is reported apart;
* per-task overhead of the Dask path beyond the task's own compute:
  ``(wall x workers - sum of row_seconds) / tasks`` — for the noisy sweep, and for 48 tiny
  compile-only tasks where almost everything is overhead.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
CONNECTIVITIES = ["line", "ring", "grid", "all-to-all"]
NOISE_SCALES = [0.25, 0.5, 1.0, 1.5, 2.0, 3.0]


class _Store:
    """In-memory stand-in for the database: only what the executors call."""

    def __init__(self):
        self.rows: dict = {}
        self.lock = threading.Lock()

    def record_row(self, study_id, task_index, row, seconds=None, cached=False):
        with self.lock:
            self.rows[(study_id, task_index)] = row

    def task_keys(self, study_id):
        return {}

    def cached_row(self, key):
        return None

    def mark_running(self, study_id):
        pass


def _run_local(tasks, workers: int, omp: str | None) -> tuple[float, list[dict]]:
    from toposcout.service.execution.local import LocalExecutor

    old = os.environ.get("OMP_NUM_THREADS")
    if omp is not None:
        os.environ["OMP_NUM_THREADS"] = omp
    store = _Store()
    ex = LocalExecutor(None, store, workers=workers, time_limit=3600)
    try:
        ex.start()
        ex.submit("warm", [(0, tasks[0])])  # processes up and modules imported before timing
        ex.wait_idle(600)
        t0 = time.perf_counter()
        ex.submit("sweep", list(enumerate(tasks)))
        if not ex.wait_idle(3600):
            raise RuntimeError("the local sweep did not finish")
        wall = time.perf_counter() - t0
    finally:
        ex.shutdown()
        if omp is not None:
            if old is None:
                os.environ.pop("OMP_NUM_THREADS", None)
            else:
                os.environ["OMP_NUM_THREADS"] = old
    return wall, [store.rows[("sweep", i)] for i in range(len(tasks))]


def _run_dask(executor, store, study, tasks) -> tuple[float, list[dict]]:
    t0 = time.perf_counter()
    executor.submit(study, list(enumerate(tasks)))
    if not executor.wait_idle(3600):
        raise RuntimeError("the Dask sweep did not finish")
    wall = time.perf_counter() - t0
    rows = [store.rows[(study, i)] for i in range(len(tasks))]
    return wall, rows


def _overhead(wall: float, rows: list[dict], workers: int) -> float:
    return (wall * workers - sum(r["row_seconds"] for r in rows)) / len(rows)


def main(argv=None) -> int:
    from distributed import LocalCluster

    from toposcout.compiler.study import make_tasks
    from toposcout.service.execution.dask import WORKER_PRELOAD, DaskExecutor

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--model", default=str(ROOT / "examples" / "orchard-frost.json"))
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = p.parse_args(argv)

    from toposcout.compiler.model import load_model

    model = load_model(args.model)
    tasks = make_tasks(model, CONNECTIVITIES, noise_scales=NOISE_SCALES, seeds=2, strategy="auto")
    tiny = make_tasks({"name": "pair", "variables": ["a", "b", "c"], "cliques": [["a", "b"], ["b", "c"]]},
                      CONNECTIVITIES, compile_only=True, seeds=1, strategy="generic") * 12
    out: dict = {"model": model.name, "variables": model.num_variables, "tasks": len(tasks),
                 "workers": args.workers}

    out["local_wall_s"], local_rows = _run_local(tasks, args.workers, None)
    out["local_sum_row_s"] = sum(r["row_seconds"] for r in local_rows)
    out["local_omp1_wall_s"], omp_rows = _run_local(tasks, args.workers, "1")
    out["local_omp1_sum_row_s"] = sum(r["row_seconds"] for r in omp_rows)
    errors = [r["error"] for r in local_rows + omp_rows if r.get("error")]
    if errors:
        raise SystemExit(f"local rows failed: {errors[:3]}")

    t0 = time.perf_counter()
    cluster = LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True, memory_limit="4GiB",
                           host="127.0.0.1", dashboard_address=None, preload=list(WORKER_PRELOAD))
    store = _Store()
    ex = DaskExecutor(store=store, address=cluster.scheduler_address)
    ex.start()
    ex.wait_connected(60)
    out["dask_cluster_start_s"] = time.perf_counter() - t0
    try:
        _run_dask(ex, store, "warm-up", tiny[:4])  # first contact: functions and modules
        wall, rows = _run_dask(ex, store, "sweep", tasks)
        out["dask_wall_s"] = wall
        out["dask_sum_row_s"] = sum(r["row_seconds"] for r in rows)
        out["dask_overhead_per_task_ms"] = 1000 * _overhead(wall, rows, args.workers)
        tw, trows = _run_dask(ex, store, "tiny", tiny)
        out["tiny_tasks"] = len(tiny)
        out["tiny_wall_s"] = tw
        out["tiny_overhead_per_task_ms"] = 1000 * _overhead(tw, trows, args.workers)
        out["tiny_median_row_ms"] = 1000 * statistics.median(r["row_seconds"] for r in trows)
        out["max_state_fidelity_difference"] = max(abs(a["state_fidelity"] - b["state_fidelity"])
                                                   for a, b in zip(local_rows, rows))
        out["same_compiled_figures"] = all(
            all(a[k] == b[k] for k in ("connectivity", "strategy", "two_qubit_gates", "swaps", "depth"))
            for a, b in zip(local_rows, rows))
    finally:
        ex.shutdown()
        cluster.close()
    out["speedup_local_over_dask"] = out["local_wall_s"] / out["dask_wall_s"]
    out["speedup_local_omp1_over_dask"] = out["local_omp1_wall_s"] / out["dask_wall_s"]
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        print(f"model {out['model']} ({out['variables']} variables), {out['tasks']} noisy tasks, "
              f"{out['workers']} workers")
        print(f"local executor      {out['local_wall_s']:7.2f} s wall  (sum of rows {out['local_sum_row_s']:.2f} s)")
        print(f"local, OMP=1        {out['local_omp1_wall_s']:7.2f} s wall  "
              f"(sum of rows {out['local_omp1_sum_row_s']:.2f} s)")
        print(f"dask LocalCluster   {out['dask_wall_s']:7.2f} s wall  (sum of rows {out['dask_sum_row_s']:.2f} s; "
              f"cluster start {out['dask_cluster_start_s']:.2f} s)")
        print(f"speedup             {out['speedup_local_over_dask']:7.2f}x (local wall / dask wall); "
              f"{out['speedup_local_omp1_over_dask']:.2f}x against local with OMP=1")
        print(f"dask overhead/task  {out['dask_overhead_per_task_ms']:7.1f} ms (noisy sweep), "
              f"{out['tiny_overhead_per_task_ms']:.1f} ms ({out['tiny_tasks']} tiny compile-only tasks, "
              f"median row {out['tiny_median_row_ms']:.1f} ms)")
        print(f"rows agree          compiled figures {out['same_compiled_figures']}, "
              f"max |state fidelity difference| {out['max_state_fidelity_difference']:.1e}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
