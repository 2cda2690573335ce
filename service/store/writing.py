"""SQLite's one writer, shared well: a write lock that is queued on rather than polled for, and
group commit of new studies (several studies' inserts in one transaction).

SQLite lets one connection write at a time, whichever process it is in. Its own busy handler makes
a writer that finds the lock taken sleep 1, 2, 5, 10, ... up to 100 ms between tries
(``sqliteDefaultBusyCallback`` in SQLite's ``main.c``), while the writers of the process that holds it
keep taking it; and every transaction pays its ``BEGIN`` and ``COMMIT`` (a WAL append, now and then a
checkpoint). Measured with two API processes and 20 clients each resubmitting a cached study, a
1.5 ms transaction waited p50 14 ms, p99 130 ms for the lock. So:

* :class:`WriteLock`: the threads of one process take the lock in the order they asked, then the
  processes sharing the file take ``flock`` on a lock file beside it, where the kernel wakes a waiter
  as soon as the holder lets go (``flock(2)``); ``BEGIN IMMEDIATE`` then finds SQLite's lock free.
* :class:`GroupWriter`: one thread per store writes the new studies that arrived while the previous
  transaction ran, all in the next one (group commit, as named by DeWitt et al., "Implementation
  techniques for main memory database systems", SIGMOD 1984; from memory), each in a savepoint of
  its own when it can fail (a cap, an Idempotency-Key), so one study's refusal does not undo the others.

PostgreSQL needs no lock of ours (it runs concurrent writers itself; the caps take advisory locks),
but its commits wait for the WAL to be flushed, so new studies that no cap or key can refuse (every
task cached) are group-committed there too; the others keep a transaction each, whose advisory locks
could otherwise be taken in different orders by two groups.
"""

from __future__ import annotations

import collections
import concurrent.futures
import os
import queue
import threading
from typing import Any, Callable

from sqlalchemy import insert

try:
    import fcntl
except ImportError:  # Windows: writers of other processes then wait in SQLite's busy handler
    fcntl = None  # type: ignore[assignment]

__all__ = ["WriteLock", "GroupWriter", "MAX_GROUP"]

#: the most studies one group transaction writes
MAX_GROUP = 64


class WriteLock:
    """The write lock of one SQLite file (module text): FIFO among this process's threads, then
    ``flock`` of ``path`` among processes (no file: this process only)."""

    def __init__(self, path: str | None):
        self._path = path if fcntl is not None else None
        self._fd: int | None = None
        self._mutex = threading.Lock()
        self._waiting: collections.deque = collections.deque()
        self._held = False

    def __enter__(self) -> None:
        with self._mutex:
            turn = None
            if self._held:
                turn = threading.Lock()
                turn.acquire()
                self._waiting.append(turn)
            self._held = True
        if turn is not None:
            turn.acquire()  # released by the holder's _pass_on: the lock passes straight to this thread
        try:
            if self._path is not None:
                if self._fd is None:  # opened at the first write: a store that only reads makes no file
                    self._fd = os.open(self._path, os.O_RDWR | os.O_CREAT, 0o600)
                fcntl.flock(self._fd, fcntl.LOCK_EX)
        except BaseException:
            self._pass_on()
            raise

    def __exit__(self, *exc: Any) -> None:
        if self._fd is not None:
            fcntl.flock(self._fd, fcntl.LOCK_UN)
        self._pass_on()

    def _pass_on(self) -> None:
        with self._mutex:
            if self._waiting:
                self._waiting.popleft().release()
            else:
                self._held = False

    def close(self) -> None:
        with self._mutex:
            if self._fd is not None and not self._held:
                os.close(self._fd)
                self._fd = None


class _Job:
    __slots__ = ("write", "may_fail", "inserts", "future")

    def __init__(self, write: Callable[[Any], Any] | None, may_fail: bool, inserts: list | None):
        self.write, self.may_fail, self.inserts = write, may_fail, inserts
        self.future: concurrent.futures.Future = concurrent.futures.Future()


class GroupWriter:
    """Runs the writes of many threads in shared transactions (module text).

    ``transaction()`` is a context manager giving a session in a write transaction (the store's
    ``_writing``). A job is either ``write(session)``, which may raise (it then runs in a savepoint of
    its own unless ``may_fail`` is False), or plain ``inserts`` (``[(table, rows), ...]``) that cannot
    fail: those of the whole group go in one statement per table, after the calls, tables in the order
    first named (so a parent table named before its children stays before them)."""

    def __init__(self, transaction: Callable[[], Any], max_group: int = MAX_GROUP):
        self._transaction = transaction
        self._max_group = max_group
        self._queue: queue.SimpleQueue = queue.SimpleQueue()
        self._thread: threading.Thread | None = None
        self._start = threading.Lock()

    def write(self, write: Callable[[Any], Any], *, may_fail: bool = True) -> Any:
        """Blocks until the transaction holding ``write`` committed; its result, or its exception (or
        the commit's)."""
        return self.submit(write, may_fail=may_fail).result()

    def submit(self, write: Callable[[Any], Any] | None = None, *, may_fail: bool = True,
               inserts: list[tuple[Any, list[dict]]] | None = None) -> concurrent.futures.Future:
        """:meth:`write` without waiting (or plain ``inserts``): the future of its result."""
        if (write is None) == (inserts is None):
            raise ValueError("give write or inserts")
        job = _Job(write, may_fail and write is not None, inserts)
        self._ensure_thread()
        self._queue.put(job)
        return job.future

    def _ensure_thread(self) -> None:
        if self._thread is not None and self._thread.is_alive():
            return
        with self._start:
            if self._thread is None or not self._thread.is_alive():
                self._thread = threading.Thread(target=self._run, name="toposcout-group-writer", daemon=True)
                self._thread.start()

    def close(self, timeout: float = 10.0) -> None:
        thread = self._thread
        if thread is not None and thread.is_alive():
            self._queue.put(None)
            thread.join(timeout)

    def _run(self) -> None:
        while True:
            job = self._queue.get()
            if job is None:
                return
            group = [job]
            stop = False
            while len(group) < self._max_group:
                try:
                    more = self._queue.get_nowait()
                except queue.Empty:
                    break
                if more is None:
                    stop = True
                    break
                group.append(more)
            self._commit(group)
            if stop:
                return

    def _commit(self, group: list[_Job]) -> None:
        outcome: list[tuple[_Job, bool, Any]] = []
        try:
            with self._transaction() as s:
                for job in group:
                    if job.write is None:
                        continue
                    if not job.may_fail:
                        outcome.append((job, True, job.write(s)))
                        continue
                    try:
                        with s.begin_nested():
                            outcome.append((job, True, job.write(s)))
                    except Exception as exc:  # this job only: its savepoint is rolled back
                        outcome.append((job, False, exc))
                _insert_together(s, [job for job in group if job.inserts is not None])
        except BaseException as exc:  # the transaction itself failed: nothing of the group was written
            for job in group:
                job.future.set_exception(exc)
            if not isinstance(exc, Exception):
                raise
            return
        for job, ok, value in outcome:
            if ok:
                job.future.set_result(value)
            else:
                job.future.set_exception(value)
        for job in group:
            if job.inserts is not None:
                job.future.set_result(None)


def _insert_together(s: Any, jobs: list[_Job]) -> None:
    """The plain inserts of ``jobs``: one executemany per table."""
    by_table: dict[Any, list[dict]] = {}
    for job in jobs:
        for table, rows in job.inserts:
            by_table.setdefault(table, []).extend(rows)
    if by_table:
        conn = s.connection()
        for table, rows in by_table.items():
            if rows:
                conn.execute(insert(table), rows)
