"""The executor interface and the rows an executor writes for a task it failed itself.

An executor takes ``(task_index, task)`` pairs of a study, runs each through
:func:`toposcout.compiler.study.run_task` somewhere other than the API, and records every
finished row in the store itself. This module imports no executor: the local process pool
(:mod:`.local`) and Dask (:mod:`.dask`) are siblings that import it.
"""

from __future__ import annotations

import abc
from typing import Any, Mapping

__all__ = ["Executor", "failure_row", "timeout_message", "row_parts", "TaskTimeout", "WorkerDied"]


class Executor(abc.ABC):
    """Runs the tasks of studies and records their rows in the store."""

    @abc.abstractmethod
    def start(self) -> None:
        """Start workers (or connect to them); called once by the API at start-up."""

    @abc.abstractmethod
    def submit(self, study_id: str, tasks: list[tuple[int, dict]]) -> None:
        """Queue ``(task_index, task)`` pairs of a study (rows still pending in the store)."""

    @abc.abstractmethod
    def cancel(self, study_id: str) -> None:
        """Drop the study's queued tasks and stop its running ones where possible."""

    @abc.abstractmethod
    def shutdown(self) -> None:
        """Stop the workers; queued tasks stay pending in the store for the next start."""

    @abc.abstractmethod
    def pending(self, study_id: str | None = None) -> int:
        """Tasks queued or running (of one study, or all)."""


def failure_row(task: Mapping[str, Any], message: str, field_name: str) -> dict:
    """A row for a task the executor failed (time limit, dead worker): what is known up front."""
    spec = task.get("connectivity") or {}
    family = spec.get("family") if isinstance(spec, Mapping) else str(spec).partition(":")[0]
    model = task.get("model") or {}
    return {"error": message, "error_field": field_name, "connectivity": family,
            "noise_scale": task.get("noise_scale", 1.0), "gate_set": task.get("gate_set", "cx"),
            "strategy_requested": task.get("strategy", "auto"), "model": model.get("name"),
            "variables": len(model.get("variables") or ()), "row_seconds": 0.0}


class TaskTimeout(Exception):
    pass


class WorkerDied(Exception):
    pass


def timeout_message(limit: float) -> str:
    return (f"the task ran past the time limit of {limit:g} s and was stopped; use a smaller model, fewer seeds "
            f"or compile-only, or ask for a larger TOPOSCOUT_TASK_TIME_LIMIT_SECONDS")


def row_parts(slots: int, rows: int) -> int:
    """Parts a row is split into (``toposcout.compiler.parts``): ``slots // rows`` for ``rows``
    rows running or waiting (the row itself included), at least 1: when every slot already has
    a row of its own, no row is split. The one rule of the CLI pool, the local and the Dask
    executors."""
    return max(1, slots // max(rows, 1))
