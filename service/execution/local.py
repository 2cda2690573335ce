"""The local executor: worker processes of our own on this machine.

The API never runs a task itself: the simulator holds the GIL for a whole run, so a task in
the API process (or one of its threads) would freeze every other request. An executor takes
``(task_index, task)`` pairs, runs each through :func:`toposcout.compiler.study.run_task` somewhere
else, and writes every finished row to the store itself (``store.record_row``), so a server
killed at any moment loses at most the rows that were running. In a server it runs inside a
queue worker process (:mod:`.queue`), which takes the tasks from the store with a lease; a
killed worker's tasks are taken again when their leases expire.

* :class:`LocalExecutor`: a few worker processes of our own (``spawn``), one task at a time
  each. A task past the time limit gets its process killed (and replaced) and its row fails
  with the reason; a cancelled study's running tasks are stopped the same way. Two studies
  asking for the same task key while it runs share one computation.
* :class:`ProcessLane`: one worker process for synchronous calls (``POST /v1/compile``).
"""

from __future__ import annotations

import collections
import logging
import multiprocessing
import os
import threading
import time
from concurrent.futures import Future, wait
from dataclasses import dataclass, field
from typing import Any

from toposcout.service.execution.base import (Executor, TaskTimeout, WorkerDied, failure_row, row_parts,
                                               timeout_message)
from toposcout.service.execution.threads import threads_per_worker
from toposcout.compiler.study import task_key
from toposcout.service.execution.child import worker_main as _worker_main
from toposcout.service.store import UNCACHEABLE_FIELDS

__all__ = ["LocalExecutor", "ProcessLane"]

log = logging.getLogger("toposcout.executor")


class _Worker:
    """One spawned child process running :func:`_worker_main`, killable at any time."""

    def __init__(self, threads: int = 0, *, kernel_lifeline: bool = True):
        self.proc: multiprocessing.Process | None = None
        self.conn = None
        self.restarts = 0
        self.threads = threads
        # PR_SET_PDEATHSIG follows the starting thread: only for workers started by a slot thread
        self.kernel_lifeline = kernel_lifeline

    def ensure(self) -> None:
        if self.proc is not None and self.proc.is_alive():
            return
        self.close()
        ctx = multiprocessing.get_context("spawn")
        parent, child = ctx.Pipe()
        self.proc = ctx.Process(target=_worker_main, args=(child, self.threads, os.getpid(), self.kernel_lifeline),
                                daemon=True, name="toposcout-worker")
        self.proc.start()
        child.close()
        self.conn = parent
        try:
            if not self.conn.poll(120):
                raise WorkerDied("the worker process did not start within 120 s")
            self.conn.recv()
        except (EOFError, OSError):
            code = self.proc.exitcode if self.proc else None
            self.kill()
            raise WorkerDied(f"the worker process exited (code {code}) while starting") from None

    def run(self, task: dict, time_limit: float, should_stop=lambda: False) -> dict | None:
        """The row of ``task``; raises TaskTimeout / WorkerDied; None when ``should_stop()``."""
        self.ensure()
        self.conn.send(task)
        deadline = time.monotonic() + time_limit
        while True:
            try:
                ready = self.conn.poll(0.05)
            except (EOFError, OSError):
                ready = True
            if ready:
                try:
                    kind, row = self.conn.recv()
                    return row
                except (EOFError, OSError):
                    code = self.proc.exitcode if self.proc else None
                    self.kill()
                    raise WorkerDied(f"the worker process exited (code {code}) while running the task")
            if self.proc is not None and not self.proc.is_alive():
                code = self.proc.exitcode
                self.kill()
                raise WorkerDied(f"the worker process exited (code {code}) while running the task; "
                                 "it may have run out of memory")
            if should_stop():
                self.kill()
                return None
            if time.monotonic() > deadline:
                self.kill()
                raise TaskTimeout()

    def kill(self) -> None:
        if self.proc is not None:
            if self.proc.is_alive():
                self.proc.kill()
            self.proc.join(5)
            self.restarts += 1
        self.close()

    def close(self) -> None:
        if self.conn is not None:
            try:
                self.conn.close()
            except OSError:
                pass
        self.conn = None
        self.proc = None

    def stop(self) -> None:
        """Stop the process now (an unfinished task stays pending in the store)."""
        if self.proc is not None and self.proc.is_alive():
            self.proc.kill()
            self.proc.join(5)
        self.close()


@dataclass(eq=False)
class _PartItem:
    """One step of a row split into parts (``("part", part)``), for any idle slot to run."""
    study_id: str
    message: tuple
    result: Future = field(default_factory=Future)


@dataclass
class _QueuedTask:
    """A task waiting for or running in a local worker process (identical tasks follow one)."""
    study_id: str
    task_index: int
    task: dict
    key: str
    followers: list["_QueuedTask"] = field(default_factory=list)


class LocalExecutor(Executor):
    """Worker processes on this machine (``spawn``), one task each at a time.

    workers: default ``settings.workers``; time_limit: default ``settings.task_time_limit_seconds``.
    """

    def __init__(self, settings: Any, store: Any, *, workers: int | None = None, time_limit: float | None = None,
                 split_rows: bool = True):
        self.store = store
        #: split a trajectories or clifford row across idle worker processes (compiler.parts) when
        #: fewer rows than workers are running or waiting
        self.split_rows = split_rows
        self.workers = int(workers or getattr(settings, "workers", 2))
        self.time_limit = float(time_limit or getattr(settings, "task_time_limit_seconds", 900.0))
        self._cv = threading.Condition()
        self._queue: collections.deque[_QueuedTask] = collections.deque()
        self._queued: set[tuple[str, int]] = set()
        self._running: dict[str, _QueuedTask] = {}        # task key -> leader item being computed
        self._cancelled: set[str] = set()
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self._slots: list[_Worker] = []
        self.stats: collections.Counter = collections.Counter()

    # --- interface ------------------------------------------------------------------
    def start(self) -> None:
        if self._threads:
            return
        for n in range(self.workers):
            w = _Worker(threads_per_worker(self.workers))
            self._slots.append(w)
            t = threading.Thread(target=self._slot, args=(w,), name=f"toposcout-slot-{n}", daemon=True)
            t.start()
            self._threads.append(t)

    def submit(self, study_id: str, tasks: list[tuple[int, dict]]) -> None:
        keys = self.store.task_keys(study_id) if tasks else {}
        with self._cv:
            self._cancelled.discard(study_id)
            for i, task in tasks:
                if (study_id, i) in self._queued:
                    continue
                self._queued.add((study_id, i))
                self._queue.append(_QueuedTask(study_id, int(i), dict(task), keys.get(int(i)) or task_key(task)))
            self._cv.notify_all()

    def cancel(self, study_id: str) -> None:
        with self._cv:
            self._cancelled.add(study_id)
            keep = collections.deque()
            for item in self._queue:
                if item.study_id == study_id:
                    self._queued.discard((item.study_id, item.task_index))
                else:
                    keep.append(item)
            self._queue = keep
            for leader in self._running.values():
                leader.followers = [f for f in leader.followers if f.study_id != study_id]
            self._cv.notify_all()

    def shutdown(self) -> None:
        self._stop.set()
        with self._cv:
            self._cv.notify_all()
        for w in self._slots:  # unblocks a slot waiting on its worker
            w.stop()
        for t in self._threads:
            t.join(10)
        self._threads.clear()
        self._slots.clear()

    def pending(self, study_id: str | None = None) -> int:
        with self._cv:
            return sum(1 for s, _ in self._queued if study_id is None or s == study_id)

    def running(self) -> int:
        with self._cv:
            return len(self._running)

    def holds(self, study_id: str, task_index: int) -> bool:
        """The task is queued or running here (not yet finished or dropped)."""
        with self._cv:
            return (study_id, int(task_index)) in self._queued

    def wait_idle(self, timeout: float = 60.0) -> bool:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.pending() == 0:
                return True
            time.sleep(0.05)
        return False

    # --- the slots ------------------------------------------------------------------
    def _take(self) -> _QueuedTask | None:
        with self._cv:
            while not self._stop.is_set():
                while self._queue:
                    item = self._queue.popleft()
                    if isinstance(item, _PartItem):
                        if item.study_id in self._cancelled:
                            item.result.set_result(None)
                            continue
                        return item
                    if item.study_id in self._cancelled:
                        self._queued.discard((item.study_id, item.task_index))
                        continue
                    leader = self._running.get(item.key)
                    if leader is not None:  # the same work is running: share its row
                        leader.followers.append(item)
                        continue
                    self._running[item.key] = item
                    return item
                self._cv.wait(0.5)
        return None

    def _slot(self, worker: _Worker) -> None:
        try:
            worker.ensure()  # warm the process before the first task arrives
        except Exception as exc:  # pragma: no cover - spawn failing is an environment problem
            if not self._stop.is_set():
                log.error("worker process failed to start: %s", exc)
        while not self._stop.is_set():
            item = self._take()
            if item is None:
                return
            if isinstance(item, _PartItem):
                self._run_part(worker, item)
                continue
            try:
                self._run_item(worker, item)
            except Exception as exc:  # the store failed: leave the rows pending for a restart
                log.error("recording study %s row %s failed: %s", item.study_id, item.task_index, exc)
                self._finish(item, None)

    def _run_item(self, worker: _Worker, item: _QueuedTask) -> None:
        cached = self.store.cached_row(item.key)
        if cached is not None:
            self.store.record_row(item.study_id, item.task_index, cached, cached.get("row_seconds"), cached=True)
            self.stats["cached"] += 1
            self._finish(item, cached, shared=True)
            return
        self.store.mark_running(item.study_id)
        started = time.perf_counter()
        try:
            row = self._compute(worker, item)
        except TaskTimeout:
            self.stats["timeouts"] += 1
            row = failure_row(item.task, timeout_message(self.time_limit), "task_time_limit")
        except (WorkerDied, OSError, EOFError, AttributeError) as exc:
            if self._stop.is_set():  # shutting down: the row stays pending for the next start
                self._finish(item, None)
                return
            self.stats["worker_deaths"] += 1
            row = failure_row(item.task, str(exc) if isinstance(exc, WorkerDied)
                              else f"the worker process was lost while running the task ({exc})", "worker")
        if self._stop.is_set():
            self._finish(item, None)
            return
        seconds = time.perf_counter() - started
        if row is None:  # cancelled while running
            self.stats["stopped"] += 1
            self._finish(item, None)
            return
        row["row_seconds"] = row.get("row_seconds") or round(seconds, 4)
        if item.study_id not in self._cancelled:
            self.store.record_row(item.study_id, item.task_index, row, seconds)
        self.stats["computed"] += 1
        self._finish(item, row)

    # --- a row split into parts -------------------------------------------------------
    def _parts_for(self, item: _QueuedTask) -> int:
        """Parts for ``item``: workers // (rows running or waiting), as the CLI's pool does."""
        if not self.split_rows or item.task.get("compile_only"):
            return 1
        with self._cv:
            rows = len(self._running) + sum(1 for q in self._queue if isinstance(q, _QueuedTask))
        return row_parts(self.workers, rows)

    def _compute(self, worker: _Worker, item: _QueuedTask) -> dict | None:
        """The row of ``item``: whole, or planned, run in parts on every idle slot (this one
        included) and merged (``toposcout.compiler.parts``). None when cancelled."""
        stop = lambda: self._all_cancelled(item)  # noqa: E731
        parts = self._parts_for(item)
        if parts < 2:
            return worker.run(item.task, self.time_limit, should_stop=stop)
        plan = worker.run(("plan", item.task, parts), self.time_limit, should_stop=stop)
        if plan is None or not plan.get("parts"):
            return None if plan is None else plan["row"]
        self.stats["split"] += 1
        steps = [_PartItem(item.study_id, ("part", p)) for p in plan["parts"]]
        with self._cv:
            self._queue.extendleft(reversed(steps))
            self._cv.notify_all()
        for step in steps:  # this slot runs what no idle slot has taken yet
            with self._cv:
                mine = step in self._queue
                if mine:
                    self._queue.remove(step)
            if mine:
                self._run_part(worker, step)
        results = self._wait_parts(steps, stop)
        if results is None:
            return None
        return worker.run(("merge", plan, results), self.time_limit, should_stop=stop)

    def _run_part(self, worker: _Worker, step: _PartItem) -> None:
        try:
            step.result.set_result(worker.run(step.message, self.time_limit,
                                              should_stop=lambda: step.study_id in self._cancelled))
        except Exception as exc:  # TaskTimeout, WorkerDied: the row's coordinator raises it
            step.result.set_exception(exc)

    def _wait_parts(self, steps: list[_PartItem], stop) -> list[dict] | None:
        futures = [s.result for s in steps]
        while True:
            done, _ = wait(futures, timeout=0.5)
            if len(done) == len(futures):
                results = [f.result() for f in futures]  # raises a part's TaskTimeout / WorkerDied
                return None if any(r is None for r in results) else results
            if self._stop.is_set() or stop():
                return None

    def _all_cancelled(self, item: _QueuedTask) -> bool:
        with self._cv:
            return item.study_id in self._cancelled and all(f.study_id in self._cancelled for f in item.followers)

    def _finish(self, item: _QueuedTask, row: dict | None, shared: bool = False) -> None:
        with self._cv:
            self._running.pop(item.key, None)
            self._queued.discard((item.study_id, item.task_index))
            followers, item.followers = item.followers, []
        if not followers:
            return
        if row is None or row.get("error_field") in UNCACHEABLE_FIELDS:
            with self._cv:  # run them again themselves
                for f in followers:
                    self._queue.appendleft(f)
                    self._queued.add((f.study_id, f.task_index))
                self._cv.notify_all()
            return
        for f in followers:
            self.store.record_row(f.study_id, f.task_index, row, row.get("row_seconds"), cached=True)
            with self._cv:
                self._queued.discard((f.study_id, f.task_index))
            self.stats["shared"] += 1


class ProcessLane:
    """One worker process for synchronous requests (``POST /v1/compile``), killed on timeout.

    Calls are serialised; a call waits at most ``wait`` seconds for the lane.
    """

    def __init__(self, *, time_limit: float = 60.0):
        self.time_limit = time_limit
        self._worker = _Worker(kernel_lifeline=False)  # started from short-lived threads: the poll only
        self._lock = threading.Lock()

    def start(self) -> None:
        threading.Thread(target=self._warm, daemon=True, name="toposcout-lane-warm").start()

    def _warm(self) -> None:
        with self._lock:
            try:
                self._worker.ensure()
            except Exception as exc:  # pragma: no cover
                log.error("compile worker failed to start: %s", exc)

    def run(self, tasks: list[dict], *, wait: float = 30.0) -> list[dict]:
        """Rows of ``tasks`` in order; raises TaskTimeout when the whole call is too slow or
        the lane stays busy past ``wait`` seconds."""
        if not self._lock.acquire(timeout=wait):
            raise TaskTimeout()
        try:
            deadline = time.monotonic() + self.time_limit
            rows = []
            for t in tasks:
                left = deadline - time.monotonic()
                if left <= 0:
                    self._worker.kill()
                    raise TaskTimeout()
                try:
                    rows.append(self._worker.run(t, left))
                except WorkerDied as exc:
                    rows.append(failure_row(t, str(exc), "worker"))
            return rows
        finally:
            self._lock.release()

    def shutdown(self) -> None:
        with self._lock:
            self._worker.stop()
