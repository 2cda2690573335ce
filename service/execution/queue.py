"""The queue worker: takes tasks from the store with a lease and runs them on an executor.

The API only stores a study (its pending rows are the queue); queue workers do the work, in
processes of their own: ``toposcout serve`` starts one for the embedded default, and
``toposcout worker DATABASE_URL`` starts more, on any machine that reaches the database.

* :class:`QueueWorker` claims one task at a time (:meth:`Store.claim_task`: round-robin across
  owners and studies, a lease of ``lease_seconds``) while its executor has a free slot, and hands
  it to that executor: :class:`~.local.LocalExecutor` (compute processes of its own, time
  limits, cancel) or :class:`~.dask.DaskExecutor` (a Dask cluster) when ``dask_address`` is set.
* The executor writes rows through :class:`LeasedStore`, so every row write is conditional on
  still holding the lease: a worker that was paused or cut off past its lease cannot overwrite
  the row another worker took over, and a killed worker's task is simply taken again once its
  lease expires. No row is lost, none is written twice.
* Leases are renewed every ``lease_seconds / 3``; leases of dead workers of the same host (their
  pid is gone: a killed server) are given back at once, other hosts' when they run out; held studies are checked for cancellation
  twice a second (a cancelled study's running task is stopped); a task taken more than
  ``max_attempts`` times (its workers keep dying: out of memory, killed) gets a failure row.
* :func:`run_queue_worker` is the process's main (``toposcout worker URL``); :func:`spawn_queue_worker`
  starts one as a child process that dies with its parent (:mod:`.lifeline`).
"""

from __future__ import annotations

import logging
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import uuid
from typing import Any, Mapping

from toposcout.service.execution.base import Executor, failure_row
from toposcout.service.execution.factory import make_executor
from toposcout.service.execution.lifeline import die_with_parent
from toposcout.service.settings import Settings
from toposcout.service.store import Store

__all__ = ["QueueWorker", "LeasedStore", "run_queue_worker", "spawn_queue_worker", "stop_process",
           "worker_id", "is_database_url"]

log = logging.getLogger("toposcout.queue")


def worker_id() -> str:
    """A unique lease-owner name: host, pid and a random part (at most 64 characters)."""
    return f"{socket.gethostname()[:40]}-{os.getpid()}-{uuid.uuid4().hex[:8]}"


def _dead_local_worker(owner: str, host: str) -> bool:
    """``owner`` (a :func:`worker_id`) names a worker of this host whose process no longer exists."""
    parts = owner.rsplit("-", 2)
    if len(parts) != 3 or parts[0] != host or not parts[1].isdigit():
        return False
    pid = int(parts[1])
    if pid == os.getpid():
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:  # a live process of another user
        return False
    return False


def is_database_url(address: str) -> bool:
    """A SQLAlchemy URL of a store toposcout supports (SQLite, PostgreSQL), not a Dask address."""
    scheme = address.split("://", 1)[0].split("+", 1)[0].lower() if "://" in address else ""
    return scheme in ("sqlite", "postgresql", "postgres")


class LeasedStore:
    """The store as an executor sees it, with every row write conditional on this worker's lease."""

    def __init__(self, store: Any, worker: str, queue: "QueueWorker"):
        self.store, self.worker, self._queue = store, worker, queue

    def task_keys(self, study_id: str) -> dict[int, str]:
        return self._queue.keys_of(study_id)

    def cached_row(self, key: str) -> dict | None:
        return self.store.cached_row(key)

    def mark_running(self, study_id: str) -> None:
        self.store.mark_running(study_id)

    def record_row(self, study_id: str, task_index: int, row: Mapping[str, Any], seconds: float | None = None,
                   *, key: str | None = None, cached: bool = False) -> bool:
        ok = self.store.record_row(study_id, task_index, row, seconds, key=key, cached=cached,
                                   lease_owner=self.worker)
        if not ok:
            log.info("row %s of study %s not written: the lease is no longer ours or the row is finished",
                     task_index, study_id)
        self._queue.finished(study_id, task_index)
        return ok


class QueueWorker:
    """Claims tasks from ``store`` and runs them on the executor ``make_executor(leased_store)``.

    lease_seconds: how long a claim holds without renewal (default 15); poll_seconds: pause
    when the queue is empty (default 0.2); max_attempts: claims of one task before its row fails
    (default 4); capacity: tasks held at once (default: the executor's slots).
    """

    def __init__(self, store: Any, make_executor, *, lease_seconds: float = 15.0, poll_seconds: float = 0.2,
                 max_attempts: int = 4, capacity: int | None = None, worker: str | None = None):
        self.store = store
        self.worker = worker or worker_id()
        self.lease_seconds = float(lease_seconds)
        self.poll_seconds = float(poll_seconds)
        self.max_attempts = int(max_attempts)
        self._capacity = capacity
        self._lock = threading.Lock()
        self._held: dict[tuple[str, int], dict] = {}
        self._stop = threading.Event()
        self.executor: Executor = make_executor(LeasedStore(store, self.worker, self))

    # --- bookkeeping the leased store reports to -------------------------------------
    def keys_of(self, study_id: str) -> dict[int, str]:
        with self._lock:
            return {i: c["task_key"] for (s, i), c in self._held.items() if s == study_id}

    def finished(self, study_id: str, task_index: int) -> None:
        with self._lock:
            self._held.pop((study_id, int(task_index)), None)

    def held(self) -> int:
        with self._lock:
            return len(self._held)

    def capacity(self) -> int:
        if self._capacity is not None:
            return self._capacity
        ex = self.executor
        if hasattr(ex, "cluster_info"):  # Dask: what the cluster can run, once connected
            if getattr(ex, "client", None) is None:
                return 0
            threads, _ = ex.cluster_info()
            return 0 if threads == 0 else (ex.max_in_flight or max(4, 2 * threads))
        return int(getattr(ex, "workers", 1))

    # --- the loop ------------------------------------------------------------------
    def stop(self) -> None:
        self._stop.set()

    def run(self) -> None:
        """Claim and run until :meth:`stop`; then stop the executor and give back the leases."""
        self.executor.start()
        renew_at = check_at = 0.0
        try:
            while not self._stop.is_set():
                now = time.monotonic()
                try:
                    if now >= renew_at:
                        self._renew()
                        renew_at = now + self.lease_seconds / 3
                    if now >= check_at:
                        self._check_cancelled()
                        check_at = now + 0.5
                    took = self._fill()
                except Exception as exc:  # the database is away: keep the process, try again
                    log.warning("queue worker %s: %s: %s", self.worker, type(exc).__name__, exc)
                    took = False
                    self._stop.wait(2.0)
                self._stop.wait(0.01 if took else self.poll_seconds)
        finally:
            self.executor.shutdown()
            try:
                self.store.release_leases(self.worker)
            except Exception as exc:  # they expire on their own
                log.warning("giving back the leases of %s: %s", self.worker, exc)

    def _fill(self) -> bool:
        took = False
        while not self._stop.is_set() and self.held() < self.capacity():
            claim = self.store.claim_task(self.worker, self.lease_seconds)
            if claim is None:
                return took
            took = True
            sid, idx = claim["study_id"], claim["task_index"]
            if claim["attempts"] > self.max_attempts:
                row = failure_row(claim["task"], f"the task was taken {claim['attempts'] - 1} times and no worker "
                                                 "finished it (each worker died or was killed while running it, "
                                                 "for example out of memory); use a smaller model or fewer seeds",
                                  "worker")
                self.store.record_row(sid, idx, row, 0.0, lease_owner=self.worker)
                continue
            with self._lock:
                self._held[(sid, idx)] = claim
            self.executor.submit(sid, [(idx, claim["task"])])
        return took

    def _reclaim_dead(self) -> None:
        """Give back the leases of workers of this host whose process is gone (a killed server):
        their tasks are taken again now instead of when the leases run out. A pid reused by
        another process only means waiting for the lease, as for a worker on another host."""
        host = socket.gethostname()[:40]
        for owner in self.store.lease_owners():
            if owner != self.worker and _dead_local_worker(owner, host):
                n = self.store.release_leases(owner, count_attempt=True)
                if n:
                    log.info("took back %d tasks of the dead worker %s", n, owner)

    def _renew(self) -> None:
        self._reclaim_dead()
        still = self.store.renew_leases(self.worker, self.lease_seconds)
        with self._lock:
            mine = list(self._held)
        for k in mine:
            if k not in still:  # written, cancelled, or taken over after our lease lapsed
                self.finished(*k)
            elif not self.executor.holds(*k):  # the executor dropped it unwritten: let it be taken again
                self.finished(*k)
                self.store.release_leases(self.worker, rows=[k])

    def _check_cancelled(self) -> None:
        with self._lock:
            studies = {s for s, _ in self._held}
        for sid, status in self.store.statuses(studies).items():
            if status == "cancelled":
                self.executor.cancel(sid)
                with self._lock:
                    for k in [k for k in self._held if k[0] == sid]:
                        self._held.pop(k)


def run_queue_worker(database_url: str, *, slots: int | None = None, parent_pid: int | None = None,
                     settings: Any = None) -> int:
    """``toposcout worker DATABASE_URL``: a queue worker until SIGTERM / SIGINT; returns the exit code.

    slots: compute processes (default ``settings.workers``); parent_pid: die with that process."""
    settings = settings or Settings(database_url=database_url)
    if parent_pid is not None:
        die_with_parent(parent_pid)
    store = Store(database_url)
    qw = QueueWorker(store, lambda leased: make_executor(settings, leased, workers=slots), lease_seconds=settings.lease_seconds,
                     max_attempts=settings.max_task_attempts)

    def on_signal(signum, _frame):
        qw.stop()

    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGTERM, on_signal)
        signal.signal(signal.SIGINT, on_signal)
    log.info("queue worker %s on %s: %s", qw.worker, store.dialect, type(qw.executor).__name__)
    try:
        qw.run()
    finally:
        store.close()
    return 0


def spawn_queue_worker(database_url: str, *, slots: int | None = None, env: Mapping[str, str] | None = None,
                       log_file: Any = None) -> subprocess.Popen:
    """Start ``toposcout worker DATABASE_URL`` as a child that dies with this process."""
    argv = [sys.executable, "-m", "toposcout.service.cli", "worker", database_url, "--parent-pid", str(os.getpid())]
    if slots:
        argv += ["--nworkers", str(slots)]
    return subprocess.Popen(argv, env=dict(env) if env is not None else None, stdout=log_file, stderr=log_file)


def stop_process(proc: subprocess.Popen | None, timeout: float = 15.0) -> None:
    """SIGTERM, then SIGKILL after ``timeout`` s."""
    if proc is None or proc.poll() is not None:
        return
    proc.terminate()
    try:
        proc.wait(timeout)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5)
