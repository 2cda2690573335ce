"""Run a list of tasks on this machine: in-process or in local worker processes.

The simulator holds the GIL and runs one simulation at a time per process, so rows
that simulate go to worker processes (``spawn``); compile-only rows are quick and run
in-process. Rows come back in task order.

When there are more worker processes than rows that simulate (one large row and
``--workers 2``), each such row is split into parts (``toposcout.compiler.parts``): the plan,
every part (a share of the trajectories or clifford shots) and the merge run as separate
tasks of the same pool, so the row uses every worker.
"""

from __future__ import annotations

from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, as_completed, wait
from multiprocessing import get_context
from typing import Callable, Sequence

from toposcout.compiler.study import run_task
from toposcout.service.execution.base import row_parts
from toposcout.service.execution.threads import default_workers, limit_threads, threads_per_worker

__all__ = ["run_tasks", "parts_per_row"]


def parts_per_row(tasks: Sequence[dict], workers: int) -> int:
    """Parts each simulating row is split into: workers // simulating rows when there are
    fewer such rows than workers, else 1 (every worker already has a row of its own)."""
    simulate = sum(1 for t in tasks if not t.get("compile_only"))
    return row_parts(workers, simulate) if simulate else 1


def run_tasks(
    tasks: Sequence[dict],
    *,
    workers: int | None = None,
    progress: bool = False,
    on_row: Callable[[int, dict], None] | None = None,
) -> list[dict]:
    """Run every task; ``on_row(i, row)`` is called as each finishes.

    workers: default None: in-process when every task is compile-only or there is one
        task, else :func:`default_workers` processes.
    progress: default False; show a tqdm progress bar on stderr.
    """
    if workers is None:
        simulate = [t for t in tasks if not t.get("compile_only")]
        workers = 1 if len(tasks) <= 1 or not simulate else min(default_workers(), len(tasks))
    bar = None
    if progress:
        from tqdm import tqdm  # only for a terminal bar

        bar = tqdm(total=len(tasks), unit="row", desc="toposcout", leave=False)
    rows: list[dict | None] = [None] * len(tasks)

    def done(i: int, row: dict) -> None:
        rows[i] = row
        if on_row:
            on_row(i, row)
        if bar is not None:
            bar.update(1)

    try:
        if workers <= 1:
            for i, t in enumerate(tasks):
                done(i, run_task(t))
        else:
            with ProcessPoolExecutor(max_workers=workers, mp_context=get_context("spawn"),
                                     initializer=limit_threads, initargs=(threads_per_worker(workers),)) as pool:
                parts = parts_per_row(tasks, workers)
                if parts > 1:
                    _run_split(pool, tasks, parts, done)
                else:
                    futs = {pool.submit(run_task, t): i for i, t in enumerate(tasks)}
                    for f in as_completed(futs):
                        done(futs[f], f.result())
    finally:
        if bar is not None:
            bar.close()
    return [r for r in rows if r is not None]


def _run_split(pool, tasks: Sequence[dict], parts: int, done: Callable[[int, dict], None]) -> None:
    """Plan each row, run its parts as they come, merge when a row's parts are all back."""
    from toposcout.compiler.parts import merge_parts, plan_row, run_part  # only when a row is split into parts

    pending = {}
    for i, t in enumerate(tasks):
        pending[pool.submit(plan_row, t, 1 if t.get("compile_only") else parts)] = ("plan", i)
    state: dict[int, tuple[dict, list]] = {}
    while pending:
        finished, _ = wait(list(pending), return_when=FIRST_COMPLETED)
        for f in finished:
            kind, i = pending.pop(f)
            res = f.result()
            if kind == "plan":
                if not res["parts"]:
                    done(i, res["row"])
                    continue
                state[i] = (res, [])
                for p in res["parts"]:
                    pending[pool.submit(run_part, p)] = ("part", i)
            elif kind == "part":
                plan, results = state[i]
                results.append(res)
                if len(results) == len(plan["parts"]):
                    pending[pool.submit(merge_parts, plan, results)] = ("merge", i)
                    del state[i]
            else:
                done(i, res)
