"""The child side of a local worker process: receive tasks over a pipe, answer rows.

Kept apart from :mod:`.local` so that a spawned child imports nothing heavy before it has
capped its simulator threads.
"""

from __future__ import annotations

from toposcout.service.execution.base import failure_row
from toposcout.service.execution.lifeline import die_with_parent
from toposcout.service.execution.threads import limit_threads

__all__ = ["worker_main"]


def worker_main(conn, threads: int = 0, parent_pid: int | None = None,
                kernel: bool = True) -> None:  # pragma: no cover - runs in the child process
    """Child process: receive tasks, answer rows, until ``None`` or the pipe closes. A task
    is a task dict (its row comes back), or a step of a row split into parts:
    ``("plan", task, parts)``, ``("part", part)`` or ``("merge", plan, results)``.

    threads: default 0 (leave as is); else the simulator threads of this process.
    parent_pid: end this process when that parent dies (:func:`.lifeline.die_with_parent`;
    ``kernel``: also through PR_SET_PDEATHSIG, for a parent that started it from a thread that lives on)."""
    if parent_pid is not None:
        die_with_parent(parent_pid, kernel=kernel)
    if threads:
        limit_threads(threads)
    # imported after the thread cap: the simulator's OpenMP runtime reads it when it loads
    from toposcout.compiler.parts import merge_parts, plan_row, run_part
    from toposcout.compiler.study import run_task

    steps = {"plan": plan_row, "part": run_part, "merge": merge_parts}  # a row split into parts (.local)

    conn.send(("ready", None))
    while True:
        try:
            task = conn.recv()
        except (EOFError, OSError):
            return
        if task is None:
            return
        try:
            row = steps[task[0]](*task[1:]) if isinstance(task, tuple) else run_task(task)
        except Exception as exc:  # a bug: the row says so, the worker lives on
            row = failure_row(task if isinstance(task, dict) else {},
                              f"internal error while running the task ({type(exc).__name__}: {exc})", "executor")
        try:
            conn.send(("row", row))
        except (BrokenPipeError, OSError):
            return
