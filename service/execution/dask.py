"""Run studies on a Dask distributed cluster.

:class:`DaskExecutor` sends every task (a plain dict) to the cluster as one call of
:func:`toposcout.compiler.study.run_task` — the same function the local executor runs — and writes
each row to the store as soon as it is back.

* **Keys** are deterministic: ``toposcout-{study_id}-{task_index}-{attempt}``. A server that
  restarts and resubmits the missing tasks of a study picks up a task the scheduler still
  holds under that key instead of starting it twice.
* **Bounded batches**: at most ``max_in_flight`` tasks (default: twice the cluster's worker
  threads, at least 4) are on the scheduler at once; the rest wait in this process.
* **Lost workers**: the scheduler reschedules a task whose worker died; when it gives up
  (``KilledWorker``) or the task is lost with the scheduler connection, the task is resubmitted
  under the next attempt key, up to ``max_attempts``. Exceptions (bugs) get ``retries``.
* **Exactly once**: a row is recorded once per ``(study_id, task_index)`` by this process
  (the store's ``record_row`` is an upsert on the same pair, so a resubmission after a restart
  cannot duplicate a row either).
* **Memory**: before submission a simulating task is checked against the workers' memory
  limit (budget: :data:`toposcout.compiler.simulate.MEMORY_FRACTION` of the smallest worker limit, the
  same share of memory the local path allows of this machine's RAM). The model's variables
  are a lower bound of the active qubits; a task that cannot fit is refused here with the
  same message as the local executor, and the others carry the budget to the worker, where
  :func:`toposcout.compiler.simulate.check_memory` refuses a routed circuit whose ancillas push it over
  (Aer's ``max_memory_mb`` is set from the same budget).
* **Time limit**: a task executing past ``task_time_limit_seconds`` gets its worker process
  restarted and its row fails with the local executor's message.
* **Scheduler away**: ``start`` returns at once; the background thread connects and retries
  while the scheduler is not up, and reconnects (resubmitting what was on it) when it is lost.
  A scheduler killed mid-study: the client cancels every future it held (``Client._reconnect``
  in ``distributed/client.py``) and reconnects for ``connect_timeout`` s, then gives up; either
  way each task not yet recorded goes back to the backlog under a fresh attempt key and is sent
  again once the new scheduler has workers. Such a loss does not count towards
  ``max_attempts`` (the task did nothing wrong), and the row is still recorded once.
* **One row on several workers**: when a study has fewer rows in flight than the cluster has
  worker threads, a row is sent as :func:`run_task_split` with parts = threads // rows: on
  its worker it plans the row, submits the parts (shares of the trajectories or clifford
  shots, ``toposcout.compiler.parts``) back to the cluster from a seceded ``worker_client``,
  gathers and merges them. The executor still sees one task (one key, one time limit, one
  row); rows the method cannot split come back as ``run_task`` makes them.
* Nothing here blocks an event loop: submissions and row writes happen on one background
  thread; ``submit`` and ``cancel`` only queue work.

:func:`run_worker` (``toposcout worker``) starts worker processes with toposcout importable,
one thread each, a memory limit, and ``OMP_NUM_THREADS`` set to the cores each may use.
"""

from __future__ import annotations

import collections
import logging
import os
import queue
import signal
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Mapping

from toposcout.compiler.errors import CapacityError, ToposcoutError
from toposcout.compiler.simulate import MEMORY_FRACTION, check_memory
from toposcout.compiler.study import run_task
from toposcout.service.execution.base import Executor, failure_row, row_parts, timeout_message

__all__ = ["DaskExecutor", "run_task_split", "task_key_for", "worker_memory_budget", "precheck_memory", "run_worker",
           "parse_memory"]

log = logging.getLogger("toposcout.dask")

#: modules imported by every worker at start-up, so the first task does not pay for them.
WORKER_PRELOAD = ("toposcout.compiler.study", "toposcout.compiler.metrics")


def task_key_for(study_id: str, task_index: int, attempt: int) -> str:
    """The Dask key of one attempt at one task (deterministic: a restart finds it again)."""
    return f"toposcout-{study_id}-{task_index}-{attempt}"


def worker_memory_budget(memory_limits: list[int], *, fraction: float | None = None) -> int | None:
    """Bytes one simulation may use on the smallest worker (None: no worker has a limit)."""
    limits = [int(m) for m in memory_limits if m]
    if not limits:
        return None
    return int(min(limits) * (MEMORY_FRACTION if fraction is None else fraction))


def precheck_memory(task: Mapping[str, Any], budget: int | None) -> tuple[dict | None, dict | None]:
    """``(task_to_send, None)`` or ``(None, refused_row)``.

    The task sent carries ``memory_budget_bytes = min(its own, budget)``; a task whose model
    alone (every variable is an active qubit) is over that budget is refused when it forces
    ``method`` density-matrix (other methods choose per row, see ``toposcout.compiler.methods``).
    """
    if task.get("compile_only") or budget is None:
        return dict(task), None
    own = task.get("memory_budget_bytes")
    eff = budget if own is None else min(int(own), budget)
    n = len((task.get("model") or {}).get("variables") or ())
    if task.get("method", "auto") == "density-matrix":  # other methods fit any size: the row picks one
        try:
            check_memory(n, eff, saved_qubits=n)
        except CapacityError as exc:
            return None, failure_row(task, f"method density-matrix: {exc}; use method auto, trajectories or "
                                           "clifford", exc.field)
    out = dict(task)
    out["memory_budget_bytes"] = eff
    return out, None


def run_task_split(task: Mapping[str, Any], parts: int) -> dict:
    """Run on a worker: the row of ``task`` with its noise figures computed in ``parts`` parts
    on the cluster (see the module docstring); same fields as ``run_task`` plus ``row_parts``."""
    from distributed import worker_client  # noqa: PLC0415 - runs on a Dask worker only

    from toposcout.compiler.parts import merge_parts, plan_row, run_part  # only when a row is split into parts

    plan = plan_row(task, parts)
    if not plan["parts"]:
        return plan["row"]
    with worker_client() as client:  # secedes: this worker's thread is free for a part meanwhile
        results = client.gather(client.map(run_part, plan["parts"], pure=False))
    return merge_parts(plan, results)


def executing_keys(dask_worker) -> list[str]:
    """Keys a worker is executing right now (run on the workers by the time-limit watch)."""
    return [str(k) for k, ts in dask_worker.state.tasks.items() if ts.state == "executing"]


@dataclass
class _DaskTask:
    """A task submitted to the Dask cluster, with its future, attempts and timing."""
    study_id: str
    task_index: int
    task: dict
    key: str | None = None              # the study row's cache key (store.task_keys)
    attempt: int = 0                    # the key's suffix: a fresh key per submission after the first
    failures: int = 0                   # submissions that failed on the cluster (counted against max_attempts)
    future: Any = None
    submitted_at: float = 0.0
    started_at: float | None = None     # first seen executing on a worker (time limit)
    worker: str | None = None
    causes: list = field(default_factory=list)


class DaskExecutor(Executor):
    """Executor on a Dask cluster at ``address`` (``tcp://host:8786``), rows into ``store``.

    settings: read for ``dask_address`` when ``address`` is not given.
    client: an existing ``distributed.Client`` (tests); it is not closed by shutdown.
    max_in_flight: tasks on the scheduler at once (default: 2 x worker threads, at least 4).
    retries: Dask retries of a task that raised (default 1).
    max_attempts: failed submissions of one task before its row records the failure (default 4;
        a scheduler lost mid-task does not count).
    connect_timeout: seconds of one connection attempt (default 10); retry_seconds: pause
        between attempts (default 5).
    time_limit: wall seconds a task may execute on a worker (default
        ``settings.task_time_limit_seconds``; None: no limit). Past it the worker process is
        restarted (a running simulation cannot be interrupted otherwise) and the row fails with
        the local executor's message.
    split_rows: default True; split a row across workers when fewer rows than worker threads
        are in flight (:func:`run_task_split`).
    """

    def __init__(self, settings: Any = None, store: Any = None, *, address: str | None = None,
                 client: Any = None, max_in_flight: int | None = None, retries: int = 1,
                 max_attempts: int = 4, connect_timeout: float = 10.0, poll_seconds: float = 0.5,
                 time_limit: float | None = None, retry_seconds: float = 5.0, split_rows: bool = True):
        self.address = address or getattr(settings, "dask_address", None)
        if not self.address and client is None:
            raise ToposcoutError("the Dask executor needs a scheduler address (TOPOSCOUT_DASK_ADDRESS=tcp://host:8786)",
                                 field="dask_address")
        self.store = store
        self.memory_budget = getattr(settings, "memory_budget_bytes", None)  # optional cap below the workers'
        self._own_client = client is None
        self.client = client
        self.max_in_flight = max_in_flight
        self.retries = retries
        self.max_attempts = max_attempts
        self.connect_timeout = connect_timeout
        self.poll_seconds = poll_seconds
        self.retry_seconds = retry_seconds
        self.split_rows = split_rows
        self._complained_at = -1e9
        #: why the executor cannot reach its scheduler right now (None: connected or connecting)
        self.last_error: str | None = None
        limit = time_limit if time_limit is not None else getattr(settings, "task_time_limit_seconds", None)
        self.time_limit = float(limit) if limit else None
        self._watcher: threading.Thread | None = None
        self._lock = threading.Condition()
        self._backlog: collections.deque[_DaskTask] = collections.deque()
        self._running: dict[str, _DaskTask] = {}          # key -> item on the cluster
        self._done: queue.SimpleQueue = queue.SimpleQueue()
        self._recorded: set[tuple[str, int]] = set()
        self._queued: set[tuple[str, int]] = set()    # (study, index) in backlog or on the cluster
        self._cancelled: set[str] = set()
        self._started: set[str] = set()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.stats = collections.Counter()
        self._info: tuple[float, int, int | None] | None = None
        self._warned_no_workers = False

    # --- Executor interface ---------------------------------------------------------
    def start(self) -> None:
        """Return at once; the background thread connects (retrying while the scheduler is not
        up yet: tasks wait meanwhile, and ``last_error`` / the log say why)."""
        self._stop.clear()
        self._thread = threading.Thread(target=self._run, name="toposcout-dask", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        if self.client is None and not self._connect():
            return
        if self.time_limit:
            self._watcher = threading.Thread(target=self._watch_loop, name="toposcout-dask-watch", daemon=True)
            self._watcher.start()
        self._pump()

    def _connect(self) -> bool:
        from distributed import Client  # noqa: PLC0415 - optional heavy dependency (Dask), loaded when configured

        while not self._stop.is_set():
            try:
                client = Client(self.address, timeout=self.connect_timeout, set_as_default=False)
            except (OSError, TimeoutError, ValueError) as exc:
                self.last_error = (f"cannot reach the Dask scheduler at {self.address}: {exc}; "
                                   f"retrying every {self.retry_seconds:g} s (tasks wait)")
                log.warning(self.last_error)
                self._stop.wait(self.retry_seconds)
                continue
            if self._stop.is_set():
                client.close()
                return False
            self.client, self.last_error = client, None
            log.info("connected to the Dask scheduler at %s", self.address)
            return True
        return False

    def submit(self, study_id: str, tasks: list[tuple[int, dict]]) -> None:
        keys = self.store.task_keys(study_id) if tasks and hasattr(self.store, "task_keys") else {}
        with self._lock:
            self._cancelled.discard(study_id)
            for index, task in tasks:
                k = (study_id, int(index))
                if k in self._queued or k in self._recorded:
                    continue
                self._queued.add(k)
                self._backlog.append(_DaskTask(study_id, int(index), dict(task), keys.get(int(index))))
            self._lock.notify_all()

    def cancel(self, study_id: str) -> None:
        with self._lock:
            self._cancelled.add(study_id)
            kept = collections.deque(i for i in self._backlog if i.study_id != study_id)
            for item in self._backlog:
                if item.study_id == study_id:
                    self._queued.discard((item.study_id, item.task_index))
            self._backlog = kept
            futures = [i.future for i in self._running.values() if i.study_id == study_id]
            self._lock.notify_all()
        if futures and self.client is not None:
            try:
                self.client.cancel(futures)  # a running task finishes on its worker; its row is dropped
            except Exception as exc:  # the scheduler may be gone; nothing left to stop then
                log.warning("cancelling study %s on the cluster: %s", study_id, exc)

    def shutdown(self) -> None:
        self._stop.set()
        with self._lock:
            self._lock.notify_all()
        if self._thread is not None:
            self._thread.join(timeout=30)
            self._thread = None
        if self._watcher is not None:
            self._watcher.join(timeout=35)
            self._watcher = None
        if self._own_client and self.client is not None:
            try:
                self.client.close(timeout=10)
            except Exception as exc:
                log.warning("closing the Dask client: %s", exc)
            self.client = None

    # --- introspection (tests, /metrics) -------------------------------------------
    def pending(self, study_id: str | None = None) -> int:
        """Tasks of ``study_id`` (default: all) not yet recorded: queued here or on the cluster."""
        with self._lock:
            return sum(1 for s, _ in self._queued if study_id is None or s == study_id)

    def holds(self, study_id: str, task_index: int) -> bool:
        """The task is queued here or on the cluster (not yet recorded or dropped)."""
        with self._lock:
            return (study_id, int(task_index)) in self._queued

    def wait_connected(self, timeout: float = 60.0) -> bool:
        """Block until the client is connected (tests and benchmarks)."""
        end = time.monotonic() + timeout
        while self.client is None and time.monotonic() < end:
            time.sleep(0.02)
        return self.client is not None

    def wait_idle(self, timeout: float = 60.0) -> bool:
        """Block until nothing is queued or running (tests and benchmarks; not for request handlers)."""
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.pending() == 0:
                return True
            time.sleep(0.02)
        return self.pending() == 0

    def cluster_info(self, max_age: float = 2.0) -> tuple[int, int | None]:
        """``(worker threads, memory budget per simulation)`` of the cluster, cached ``max_age`` s."""
        now = time.monotonic()
        if self._info is None or now - self._info[0] > max_age:
            workers = self.client.scheduler_info(n_workers=-1).get("workers", {}).values()
            threads = sum(int(w.get("nthreads") or 1) for w in workers)
            budget = worker_memory_budget([w.get("memory_limit") or 0 for w in workers])
            if self.memory_budget:
                budget = min(budget, int(self.memory_budget)) if budget else int(self.memory_budget)
            self._info = (now, threads, budget)
        return self._info[1], self._info[2]

    # --- the background thread -------------------------------------------------------
    def _pump(self) -> None:
        while not self._stop.is_set():
            if self._own_client and self.client is not None and self.client.status in ("closed", "closing"):
                if not self._reconnect():
                    return
            try:
                self._drain_done()
                self._fill()
            except Exception as exc:  # scheduler or store unreachable: keep the thread alive, retry
                now = time.monotonic()
                if now - self._complained_at > 30:
                    self._complained_at = now
                    log.warning("Dask executor: %s: %s (retrying; %d tasks wait)", type(exc).__name__, exc,
                                self.pending())
                self._stop.wait(self.retry_seconds)
            with self._lock:
                if self._done.empty() and not self._stop.is_set():
                    self._lock.wait(self.poll_seconds)

    def _reconnect(self) -> bool:
        """The client gave up on a lost scheduler: connect anew and resubmit what was on it."""
        log.warning("lost the Dask scheduler at %s; reconnecting", self.address)
        self._drain_done()
        with self._lock:
            orphans = list(self._running.values())
            self._running.clear()
            for item in orphans:
                item.attempt += 1           # a fresh key: the old one died with the scheduler
                item.started_at = item.worker = None
                self._backlog.appendleft(item)
        old, self.client, self._info = self.client, None, None
        try:
            old.close(timeout=5)
        except Exception:
            pass
        return self._connect()

    def _watch_loop(self) -> None:
        """Own thread: asking workers what they execute may stall on a dying worker."""
        interval = min(2.0, self.time_limit / 4)
        while not self._stop.wait(interval):
            try:
                self._watch()
            except Exception as exc:  # the cluster is changing under us; try again next round
                log.debug("time-limit watch: %s", exc)

    def _watch(self) -> None:
        """Enforce the time limit: note when each task starts executing, stop overdue ones."""
        with self._lock:
            if not self._running:
                return
            ours = set(self._running)
        hosts = [addr for addr, keys in self.client.processing().items() if ours.intersection(map(str, keys))]
        if not hosts:
            return
        running = self.client.run(executing_keys, workers=hosts, on_error="ignore")
        now = time.monotonic()
        overdue: list[_DaskTask] = []
        with self._lock:
            for addr, keys in (running or {}).items():
                for k in keys if isinstance(keys, list) else ():
                    item = self._running.get(k)
                    if item is not None and item.started_at is None:
                        item.started_at, item.worker = now, addr
            for key, item in list(self._running.items()):
                if item.started_at is not None and now - item.started_at > self.time_limit:
                    overdue.append(self._running.pop(key))
        for item in overdue:
            self.stats["timeouts"] += 1
            log.warning("task %s of study %s ran past %g s on %s: restarting that worker", item.task_index,
                        item.study_id, self.time_limit, item.worker)
            item.future.release()
            if item.study_id in self._cancelled:
                with self._lock:
                    self._queued.discard((item.study_id, item.task_index))
            else:
                self._record(item, failure_row(item.task, timeout_message(self.time_limit), "task_time_limit"))
            # the restart takes seconds (the nanny waits, then kills): not on this thread
            threading.Thread(target=self._restart_worker, args=(item.worker,), daemon=True,
                             name="toposcout-dask-restart").start()

    def _restart_worker(self, addr: str) -> None:
        try:
            self.client.restart_workers([addr], raise_for_error=False)
        except Exception as exc:  # the worker may already be gone, or the client closed
            log.warning("restarting worker %s: %s", addr, exc)

    def _on_done(self, future) -> None:  # runs on Dask's callback thread: only queue
        self._done.put(future.key)
        with self._lock:
            self._lock.notify_all()

    def _fill(self) -> None:
        if not self._backlog:
            return
        threads, budget = self.cluster_info()
        if threads == 0:  # no worker yet: the memory check needs one; hold the tasks here
            if not self._warned_no_workers:
                log.warning("no Dask workers connected to %s yet; %d tasks wait", self.address, len(self._backlog))
                self._warned_no_workers = True
            self._info = None
            return
        self._warned_no_workers = False
        cap = self.max_in_flight or max(4, 2 * threads)
        while True:
            with self._lock:
                if len(self._running) >= cap or not self._backlog:
                    return
                item = self._backlog.popleft()
                if item.study_id in self._cancelled:
                    self._queued.discard((item.study_id, item.task_index))
                    continue
            try:
                if self._from_cache(item):
                    continue
                task, refused = precheck_memory(item.task, budget)
                if refused is not None:
                    self.stats["refused"] += 1
                    self._record(item, refused)
                    continue
                self._send(item, task)
            except Exception:  # store or scheduler unreachable: keep the task for the next round
                with self._lock:
                    self._backlog.appendleft(item)
                raise

    def _from_cache(self, item: _DaskTask) -> bool:
        """Record the row another study computed meanwhile (same task key) instead of running it."""
        if item.key is None or not hasattr(self.store, "cached_row"):
            return False
        row = self.store.cached_row(item.key)
        if row is None:
            return False
        self.stats["cached"] += 1
        self._record(item, row, cached=True)
        return True

    def _send(self, item: _DaskTask, task: dict) -> None:
        key = task_key_for(item.study_id, item.task_index, item.attempt)
        item.submitted_at = time.monotonic()
        parts = self._parts(task)
        if parts > 1:
            fut = self.client.submit(run_task_split, task, parts, key=key, pure=False, retries=self.retries)
            self.stats["split"] += 1
        else:
            fut = self.client.submit(run_task, task, key=key, pure=False, retries=self.retries)
        item.future = fut
        with self._lock:
            self._running[key] = item
            first = item.study_id not in self._started
            self._started.add(item.study_id)
        self.stats["submitted"] += 1
        if first and hasattr(self.store, "mark_running"):
            try:
                self.store.mark_running(item.study_id)
            except Exception as exc:  # progress display only; the rows still get recorded
                log.warning("marking study %s running: %s", item.study_id, exc)
        fut.add_done_callback(self._on_done)

    def _parts(self, task: Mapping[str, Any]) -> int:
        """Parts for a row about to be sent: worker threads // rows in flight (this one included)."""
        if not self.split_rows or task.get("compile_only"):
            return 1
        threads, _budget = self.cluster_info()
        with self._lock:
            rows = len(self._backlog) + len(self._running) + 1
        return row_parts(threads, rows)

    def _drain_done(self) -> None:
        while True:
            try:
                key = self._done.get_nowait()
            except queue.Empty:
                return
            with self._lock:
                item = self._running.pop(key, None)
            if item is None:
                continue
            self._finish(item)

    def _finish(self, item: _DaskTask) -> None:
        fut = item.future
        status = fut.status
        if item.study_id in self._cancelled:
            with self._lock:
                self._queued.discard((item.study_id, item.task_index))
            fut.release()
            self.stats["stopped"] += 1
            return
        if status == "finished":
            try:
                row = fut.result(timeout=60)
            except Exception as exc:  # result lost between done and fetch (worker died): run again
                self._again(item, exc)
                return
            fut.release()
            self.stats["computed"] += 1
            self._record(item, row)
            return
        if status == "cancelled":  # not by us (checked above): the client lost its scheduler and cancelled
            fut.release()          # every future it held; send the task again, not counted as a failure
            self._again(item, RuntimeError("the connection to the Dask scheduler was lost"), counted=False)
            return
        exc = None
        if status == "error":
            try:
                exc = fut.exception(timeout=10)
            except Exception as e:
                exc = e
        fut.release()
        self._again(item, exc if exc is not None else RuntimeError(f"task {status} on the cluster"))

    def _again(self, item: _DaskTask, exc: BaseException, *, counted: bool = True) -> None:
        item.causes.append(f"{type(exc).__name__}: {exc}")
        if type(exc).__name__ == "KilledWorker":
            self.stats["worker_deaths"] += 1
        item.attempt += 1
        item.failures += int(counted)
        item.started_at = item.worker = None  # the time limit counts from the new submission's start
        self.stats["resubmitted" if counted else "scheduler_lost"] += 1
        if item.failures >= self.max_attempts:
            msg = (f"the task failed on the Dask cluster {item.failures} times; last: {item.causes[-1]}")
            row = failure_row(item.task, msg, "worker")  # the store does not cache executor failures
            self._record(item, row)
            return
        if counted:
            log.warning("resubmitting task %s of study %s (attempt %d): %s", item.task_index, item.study_id,
                        item.attempt, item.causes[-1])
        with self._lock:
            self._backlog.appendleft(item)

    def _record(self, item: _DaskTask, row: dict, *, cached: bool = False) -> None:
        k = (item.study_id, item.task_index)
        with self._lock:
            if k in self._recorded:
                self._queued.discard(k)
                return
        seconds = float(row.get("row_seconds") or 0.0)
        for attempt in range(3):
            try:
                if cached:
                    self.store.record_row(item.study_id, item.task_index, row, seconds, cached=True)
                else:
                    self.store.record_row(item.study_id, item.task_index, row, seconds)
                break
            except Exception as exc:  # the database hiccuped: retry, else leave it for a restart
                if attempt == 2:
                    log.error("recording row %s of study %s failed: %s", item.task_index, item.study_id, exc)
                    with self._lock:
                        self._queued.discard(k)
                    return
                time.sleep(0.5 * (attempt + 1))
        with self._lock:
            self._recorded.add(k)
            self._queued.discard(k)
        self.stats["recorded"] += 1


# --- workers -------------------------------------------------------------------------
_UNITS = {"": 1, "b": 1, "k": 10**3, "kb": 10**3, "m": 10**6, "mb": 10**6, "g": 10**9, "gb": 10**9,
          "t": 10**12, "tb": 10**12, "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}


def parse_memory(text: str) -> int:
    """``"4GiB"``, ``"2.5GB"``, ``"512MiB"`` or bytes -> bytes; a clear error otherwise."""
    s = str(text).strip().lower().replace(" ", "")
    num = s.rstrip("abcdefghijklmnopqrstuvwxyz")
    unit = s[len(num):]
    try:
        value = float(num)
    except ValueError:
        value = -1.0
    if unit not in _UNITS or value <= 0:
        raise ToposcoutError(f"memory limit must be a size like 4GiB, 2GB or 512MiB, got {text!r}",
                             field="memory_limit")
    return int(value * _UNITS[unit])


def run_worker(scheduler: str, *, nworkers: int = 1, memory_limit: str = "4GiB", threads: int | None = None,
               host: str | None = None, name: str | None = None, death_timeout: float | None = 60.0) -> int:
    """Start ``nworkers`` worker processes (one task at a time each) until interrupted.

    threads: OpenMP threads of the simulator in each process (default: cores / nworkers).
    """
    import asyncio  # noqa: PLC0415 - only the worker command runs an event loop

    from distributed import Nanny  # noqa: PLC0415 - optional heavy dependency, only for `toposcout worker`

    if not scheduler or "://" not in scheduler:
        raise ToposcoutError(f"scheduler address must look like tcp://host:8786, got {scheduler!r}",
                             field="scheduler")
    if nworkers < 1:
        raise ToposcoutError("--nworkers must be at least 1", field="nworkers")
    limit = parse_memory(memory_limit)
    omp = threads if threads else max(1, (os.cpu_count() or 1) // nworkers)
    env = {"OMP_NUM_THREADS": str(omp), "MKL_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}

    async def main() -> None:
        stop = asyncio.Event()
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGTERM, signal.SIGINT):
            try:
                loop.add_signal_handler(sig, stop.set)
            except (NotImplementedError, RuntimeError):  # not the main thread / platform
                pass
        nannies = [Nanny(scheduler, nthreads=1, memory_limit=limit, env=env, host=host,
                         name=f"{name}-{i}" if name and nworkers > 1 else name,
                         preload=list(WORKER_PRELOAD), death_timeout=death_timeout)
                   for i in range(nworkers)]
        try:
            await asyncio.gather(*nannies)
            waiters = [asyncio.ensure_future(n.finished()) for n in nannies]
            stopper = asyncio.ensure_future(stop.wait())
            await asyncio.wait([stopper, *waiters], return_when=asyncio.FIRST_COMPLETED)
            stopper.cancel()
        finally:
            await asyncio.gather(*(n.close(reason="toposcout worker stopped") for n in nannies),
                                 return_exceptions=True)

    try:
        asyncio.run(main())
    except KeyboardInterrupt:
        return 0
    except (OSError, TimeoutError, RuntimeError) as exc:
        cause = exc.__cause__ or exc
        raise ToposcoutError(f"cannot start a worker for the scheduler at {scheduler}: {cause or type(cause).__name__}"
                             f" (is the scheduler running and reachable?)", field="scheduler") from None
    return 0
