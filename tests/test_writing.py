"""SQLite's shared writer (service/store/writing.py): the FIFO + flock write lock and group commit."""

from __future__ import annotations

import contextlib
import subprocess
import sys
import threading
import time

import pytest
from sqlalchemy import Column, ForeignKey, Integer, MetaData, Table, create_engine, select

from toposcout.service.store.writing import GroupWriter, WriteLock


class _Session:
    """What GroupWriter needs of a session: savepoints (``begin_nested``), counted."""

    def __init__(self, log: list):
        self.log = log

    @contextlib.contextmanager
    def begin_nested(self):
        self.log.append("savepoint")
        try:
            yield
        except Exception:
            self.log.append("rollback to savepoint")
            raise


def _transactions(log: list, gate: threading.Event | None = None):
    @contextlib.contextmanager
    def transaction():
        if gate is not None:
            gate.wait(10)
        log.append("begin")
        yield _Session(log)
        log.append("commit")
    return transaction


def test_group_writer_commits_what_arrived_meanwhile_in_one_transaction():
    log: list = []
    gate = threading.Event()
    writer = GroupWriter(_transactions(log, gate))
    try:
        first = writer.submit(lambda s: "first", may_fail=False)
        time.sleep(0.2)  # the writer thread now waits at the gate with the first job
        rest = [writer.submit(lambda s, i=i: i, may_fail=False) for i in range(5)]
        gate.set()
        assert first.result(10) == "first" and [f.result(10) for f in rest] == list(range(5))
        assert log == ["begin", "commit", "begin", "commit"]  # the five shared one transaction
    finally:
        writer.close()


def test_a_refused_write_undoes_only_itself():
    log: list = []
    gate = threading.Event()
    writer = GroupWriter(_transactions(log, gate))

    def refuse(s):
        raise LookupError("over the cap")

    try:
        jobs = [writer.submit(lambda s: "a"), writer.submit(refuse), writer.submit(lambda s: "c")]
        gate.set()
        assert jobs[0].result(10) == "a" and jobs[2].result(10) == "c"
        with pytest.raises(LookupError, match="over the cap"):
            jobs[1].result(10)
        assert log.count("rollback to savepoint") == 1 and log[-1] == "commit"
    finally:
        writer.close()


def test_a_failed_transaction_fails_its_whole_group():
    @contextlib.contextmanager
    def broken():
        yield _Session([])
        raise OSError("disk full")

    writer = GroupWriter(broken)
    try:
        with pytest.raises(OSError, match="disk full"):
            writer.write(lambda s: 1, may_fail=False)
        with pytest.raises(OSError):  # the writer thread survives and serves the next group
            writer.write(lambda s: 2)
    finally:
        writer.close()


def test_plain_inserts_of_a_group_go_in_one_statement_per_table_parents_first(tmp_path):
    meta = MetaData()
    parent = Table("parent", meta, Column("id", Integer, primary_key=True))
    child = Table("child", meta, Column("id", Integer, primary_key=True), Column("parent", ForeignKey("parent.id")))
    engine = create_engine(f"sqlite:///{tmp_path / 'group.db'}")
    meta.create_all(engine)
    statements: list[str] = []
    gate = threading.Event()

    @contextlib.contextmanager
    def transaction():
        gate.wait(10)
        with engine.begin() as conn:
            yield _Connected(conn, statements)

    writer = GroupWriter(transaction)
    try:
        jobs = [writer.submit(inserts=[(parent, [{"id": i}]), (child, [{"id": 10 * i + j, "parent": i}
                                                                      for j in range(2)])]) for i in range(4)]
        gate.set()
        assert [f.result(10) for f in jobs] == [None] * 4
    finally:
        writer.close()
    with engine.connect() as conn:
        assert conn.execute(select(child.c.parent)).scalars().all() == [0, 0, 1, 1, 2, 2, 3, 3]
    # the first job may have gone alone; the rest shared one statement per table, parents first
    assert statements[-2:] == ["parent", "child"] and len(statements) in (2, 4)


class _Connected(_Session):
    def __init__(self, conn, statements: list):
        super().__init__([])
        self.conn, self.statements = conn, statements

    def connection(self):
        outer = self

        class _Recording:
            def execute(self, stmt, rows):
                outer.statements.append(stmt.table.name)
                return outer.conn.execute(stmt, rows)
        return _Recording()


def test_write_lock_serves_threads_in_arrival_order(tmp_path):
    lock = WriteLock(str(tmp_path / "db-writelock"))
    order: list[int] = []
    lock.__enter__()
    threads = []
    for i in range(6):
        t = threading.Thread(target=lambda i=i: (lock.__enter__(), order.append(i), lock.__exit__()))
        t.start()
        threads.append(t)
        time.sleep(0.05)  # each has queued before the next starts
    lock.__exit__()
    for t in threads:
        t.join(10)
    assert order == list(range(6))
    lock.close()


_HOLDER = """
import sys, time
from toposcout.service.store.writing import WriteLock
lock = WriteLock(sys.argv[1])
with lock:
    print("held", flush=True)
    time.sleep(float(sys.argv[2]))
"""


@pytest.mark.skipif(sys.platform == "win32", reason="flock is POSIX; Windows writers wait in SQLite's busy handler")
def test_write_lock_excludes_other_processes(tmp_path):
    path = str(tmp_path / "db-writelock")
    holder = subprocess.Popen([sys.executable, "-c", _HOLDER, path, "0.8"], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        t0 = time.monotonic()
        with WriteLock(path):
            waited = time.monotonic() - t0
        assert 0.4 < waited < 10  # it waited for the other process to let go, and no longer
    finally:
        holder.wait(10)
