"""Run a list of tasks on this machine: in-process or in local worker processes.

The simulator holds the GIL and runs one simulation at a time per process, so rows
that simulate go to worker processes (``spawn``); compile-only rows are quick and run
in-process. Rows come back in task order.
"""

from __future__ import annotations

from concurrent.futures import ProcessPoolExecutor, as_completed
from multiprocessing import get_context
from typing import Callable, Sequence

from toposcout.compiler.study import run_task
from toposcout.service.execution.threads import default_workers, limit_threads, threads_per_worker

__all__ = ["run_tasks"]


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
                futs = {pool.submit(run_task, t): i for i, t in enumerate(tasks)}
                for f in as_completed(futs):
                    done(futs[f], f.result())
    finally:
        if bar is not None:
            bar.close()
    return [r for r in rows if r is not None]
