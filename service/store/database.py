"""The store: studies, their rows and the result cache, in SQLite (default) or PostgreSQL.

Three tables (schema by the alembic migrations in ``service/store/migrations``, applied when a
:class:`Store` opens the database):

* ``studies``: one per submission (owner, status, the normalised request, progress);
  ``(owner, idempotency_key)`` is unique, so a retried POST finds its study.
* ``study_rows``: one per task of a study: the task, its cache key, its status
  (``pending`` | ``done`` | ``failed`` | ``cancelled``), whether it came from the cache, the row.
* ``results``: the cache, one per task key: the row as ``run_task`` returned it and the
  compiled circuit (QPY) kept apart from the row.

Everything is written as it happens (one transaction per finished row), so a killed server
loses nothing: :meth:`Store.unfinished` lists what still has to run. All methods take and
return plain dicts; timestamps are UTC.

The store is also the work queue (migration 0003): a pending row is a queued task.
:meth:`Store.claim_task` hands one to a queue worker with a lease that expires (round-robin
across owners, then across studies), :meth:`Store.renew_leases` keeps it, and
:meth:`Store.record_row` with ``lease_owner`` writes the row only while that lease is held, so a
task whose worker was killed is taken again and its row is still written exactly once.

Atomic steps: every write is one transaction that holds the write lock from its start (SQLite:
``BEGIN IMMEDIATE``, so processes sharing the file queue on the lock instead of failing on a
stale snapshot; they queue first on :class:`~toposcout.service.store.writing.WriteLock`, and new
studies are written several per transaction by a :class:`~toposcout.service.store.writing.GroupWriter`,
each study in a savepoint when a cap or an Idempotency-Key can refuse it; on PostgreSQL only the studies
nothing can refuse are grouped); on PostgreSQL the caps and the claim take ``pg_advisory_xact_lock`` (per owner,
for the queue, for claims), so a count and the insert that depends on it cannot interleave.
"""

from __future__ import annotations

import base64
import concurrent.futures
import contextlib
import datetime as dt
import hashlib
import json
import math
import threading
import uuid
from pathlib import Path
from typing import Any, Iterable, Mapping

from sqlalchemy import (JSON, Boolean, DateTime, Float, ForeignKey, Integer, LargeBinary, String,
                        UniqueConstraint, case, create_engine, event, exists, func, insert, or_, select, text,
                        update)
from sqlalchemy.engine import Engine
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import DeclarativeBase, Mapped, Session, mapped_column, sessionmaker
from sqlalchemy.types import TypeDecorator

from toposcout.service.store.writing import GroupWriter, WriteLock

__all__ = ["Store", "Base", "StudyConflict", "TooManyActive", "QueueFull", "best_connectivity", "STUDY_STATES", "FINISHED_STATES",
           "UNFINISHED", "ROW_STATES", "UNCACHEABLE_FIELDS", "utcnow", "request_summary",
           "new_study_id"]

STUDY_STATES = ("queued", "running", "done", "failed", "cancelled")
ROW_STATES = ("pending", "done", "failed", "cancelled")
UNFINISHED = ("queued", "running")
FINISHED_STATES = ("done", "failed", "cancelled")
#: rows failed by the executor (not by the task itself) are not cached: a retry may succeed.
# Failures that depend on the machine, not on the task: never answered from the cache.
UNCACHEABLE_FIELDS = frozenset({"task_time_limit", "worker", "executor", "memory_budget_bytes"})


def utcnow() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc)


def new_study_id() -> str:
    return uuid.uuid4().hex


class UTCDateTime(TypeDecorator):
    """Stores naive UTC, returns aware UTC (SQLite drops time zones)."""

    impl = DateTime
    cache_ok = True

    def process_bind_param(self, value, dialect):
        if value is not None and value.tzinfo is not None:
            value = value.astimezone(dt.timezone.utc).replace(tzinfo=None)
        return value

    def process_result_value(self, value, dialect):
        return value.replace(tzinfo=dt.timezone.utc) if value is not None else None


class Base(DeclarativeBase):
    pass


class StudyRecord(Base):
    __tablename__ = "studies"
    __table_args__ = (UniqueConstraint("owner", "idempotency_key", name="uq_studies_owner_idempotency"),)

    id: Mapped[str] = mapped_column(String(32), primary_key=True)
    owner: Mapped[str] = mapped_column(String(64), index=True)
    status: Mapped[str] = mapped_column(String(16), index=True)
    model_name: Mapped[str] = mapped_column(String(200))
    request: Mapped[dict] = mapped_column(JSON)
    request_hash: Mapped[str] = mapped_column(String(64))
    idempotency_key: Mapped[str | None] = mapped_column(String(200), nullable=True)
    total: Mapped[int] = mapped_column(Integer)
    done: Mapped[int] = mapped_column(Integer, default=0)
    best_connectivity: Mapped[str | None] = mapped_column(String(200), nullable=True)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime, index=True)
    claimed_at: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, nullable=True)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)


class RowRecord(Base):
    __tablename__ = "study_rows"

    study_id: Mapped[str] = mapped_column(String(32), ForeignKey("studies.id", ondelete="CASCADE"),
                                          primary_key=True)
    task_index: Mapped[int] = mapped_column(Integer, primary_key=True)
    status: Mapped[str] = mapped_column(String(16), index=True)
    cached: Mapped[bool] = mapped_column(Boolean, default=False)
    task_key: Mapped[str] = mapped_column(String(64), index=True)
    task: Mapped[dict] = mapped_column(JSON)
    row: Mapped[dict | None] = mapped_column(JSON, nullable=True)
    seconds: Mapped[float | None] = mapped_column(Float, nullable=True)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)
    lease_owner: Mapped[str | None] = mapped_column(String(64), nullable=True)
    lease_until: Mapped[dt.datetime | None] = mapped_column(UTCDateTime, nullable=True)
    attempts: Mapped[int] = mapped_column(Integer, default=0)


class ResultRecord(Base):
    __tablename__ = "results"

    task_key: Mapped[str] = mapped_column(String(64), primary_key=True)
    row: Mapped[dict] = mapped_column(JSON)
    circuit: Mapped[bytes | None] = mapped_column(LargeBinary, nullable=True)
    seconds: Mapped[float] = mapped_column(Float)
    created_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)


class StudyConflict(Exception):
    """An Idempotency-Key was reused with a different request."""


class TooManyActive(Exception):
    """The owner already has the allowed number of unfinished studies."""

    def __init__(self, active: int):
        super().__init__(f"{active} studies queued or running")
        self.active = active


class QueueFull(Exception):
    """The whole service already has the allowed number of queued tasks."""

    def __init__(self, queued: int):
        super().__init__(f"{queued} tasks queued")
        self.queued = queued


#: pg_advisory_xact_lock keys of the queue-wide steps (per-owner keys come from :func:`_lock_key`)
_QUEUE_LOCK, _CLAIM_LOCK = 0x746F706F01, 0x746F706F02


def _lock_key(owner: str) -> int:
    """A signed 64-bit advisory-lock key for ``owner``."""
    return int.from_bytes(hashlib.sha256(b"owner:" + owner.encode()).digest()[:8], "big", signed=True)


def _json_safe(value: Any) -> Any:
    """Non-finite floats become None (JSON and PostgreSQL's json type have no NaN)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    return value


def request_hash(request: Mapping[str, Any]) -> str:
    return hashlib.sha256(json.dumps(request, sort_keys=True, separators=(",", ":"),
                                     default=str).encode()).hexdigest()


class JSONText(str):
    """A value already serialised as JSON: bound as it is into a JSON column (see :func:`_json_dumps`),
    so a text made outside a write transaction is not made again inside it."""


def _json_dumps(value: Any) -> str:
    """The engines' JSON serialiser: :class:`JSONText` as it is, anything else by ``json.dumps``."""
    return value if type(value) is JSONText else json.dumps(value)


def json_text(value: Any) -> JSONText:
    """``value`` as JSON text, non-finite floats as null (:func:`_json_safe`)."""
    try:
        return JSONText(json.dumps(value, allow_nan=False))
    except ValueError:  # a NaN or infinity somewhere: the slow walk that replaces them
        return JSONText(json.dumps(_json_safe(value)))


def _iso(t: dt.datetime) -> str:
    return t.astimezone(dt.timezone.utc).isoformat().replace("+00:00", "Z")


def make_engine(url: str) -> Engine:
    """An engine for ``url``; SQLite files get WAL mode, foreign keys and a busy timeout."""
    if url.startswith("sqlite"):
        engine = create_engine(url, connect_args={"check_same_thread": False, "timeout": 30},
                               pool_size=20, max_overflow=20, json_serializer=_json_dumps)

        @event.listens_for(engine, "connect")
        def _sqlite_pragmas(dbapi_conn, _record):  # pragma: no cover - exercised by every SQLite test
            dbapi_conn.isolation_level = None  # SQLAlchemy's "begin" below emits BEGIN itself
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute("PRAGMA busy_timeout=30000")
            cur.close()

        @event.listens_for(engine, "begin")
        def _sqlite_begin(conn):  # pragma: no cover - exercised by every SQLite test
            # writes take the write lock at BEGIN: a deferred transaction that reads and then
            # writes fails at once (SQLITE_BUSY_SNAPSHOT) when another process wrote in between
            conn.exec_driver_sql("BEGIN IMMEDIATE" if conn.get_execution_options().get("toposcout_write")
                                 else "BEGIN")

        return engine
    return create_engine(url, pool_pre_ping=True, pool_size=20, max_overflow=20, json_serializer=_json_dumps)


def migrate(engine: Engine) -> None:
    """Bring the schema to the newest migration (alembic, scripts shipped in the package)."""
    from alembic import command  # alembic only when migrating
    from alembic.config import Config  # alembic only when migrating

    cfg = Config()
    cfg.set_main_option("script_location", str(Path(__file__).resolve().parent / "migrations"))
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "head")


def _sqlite_file(engine: Engine) -> str | None:
    """The database file of a SQLite engine (None in memory)."""
    db = engine.url.database
    return None if not db or db == ":memory:" or db.startswith("file:") else db


class _Memo:
    """A small thread-safe LRU (plain dict order: a hit moves to the end)."""

    def __init__(self, size: int):
        self.size, self._d, self._lock = size, {}, threading.Lock()

    def get(self, key: str) -> Any:
        with self._lock:
            value = self._d.pop(key, None)
            if value is not None:
                self._d[key] = value
            return value

    def put(self, key: str, value: Any) -> None:
        with self._lock:
            self._d.pop(key, None)
            self._d[key] = value
            while len(self._d) > self.size:
                del self._d[next(iter(self._d))]


class _NewStudy:
    """A new study as rows to insert (``study``, ``rows``) and its pending ``(task_index, task)``; rows
    whose key is in ``cached`` are done at once. :meth:`write` inserts them in a write transaction
    (after the caps when the study has tasks to run), :meth:`result` is what create_study returns."""

    def __init__(self, store: "Store", sid: str, owner: str, req: dict, rhash: str, model_name: str,
                 tasks: list[dict], keys: list[str], idempotency_key: str | None, cached: Mapping[str, dict],
                 max_active: int | None, max_queued: int | None):
        now = utcnow()
        self.store, self.owner, self.req, self.max_active, self.max_queued = store, owner, req, max_active, max_queued
        self.pending, self.rows = [], []
        done = 0
        any_ok = False
        for i, (task, key) in enumerate(zip(tasks, keys)):
            hit = cached.get(key)
            row = {"study_id": sid, "task_index": i, "task_key": key, "task": json_text(task), "updated_at": now,
                   "lease_owner": None, "lease_until": None, "attempts": 0}
            if hit is not None:
                done += 1
                any_ok = any_ok or hit["row"].get("error") is None
                row.update(status=_row_status(hit["row"]), cached=True, row=hit["text"], seconds=hit["seconds"])
            else:
                self.pending.append((i, task))
                row.update(status="pending", cached=False, row=None, seconds=None)
            self.rows.append(row)
        status = ("done" if any_ok else "failed") if tasks and done == len(tasks) else "queued"
        best = (best_connectivity([{**cached[k]["row"], "status": r["status"]} for r, k in zip(self.rows, keys)
                                   if k in cached]) if status != "queued" else None)
        self.study = {"id": sid, "owner": owner, "status": status, "model_name": model_name[:200],
                      "request": json_text(req), "request_hash": rhash, "idempotency_key": idempotency_key,
                      "total": len(tasks), "done": done, "best_connectivity": best, "created_at": now,
                      "updated_at": now, "claimed_at": None}
        self.capped = bool(self.pending) and (max_active is not None or max_queued is not None)
        #: a refusal (a cap) or a conflict (the Idempotency-Key) can undo this study alone
        self.may_fail = self.capped or idempotency_key is not None

    def job(self) -> dict:
        """The group writer's job for this study: plain inserts when nothing can refuse it."""
        if self.may_fail:
            return {"write": self.write, "may_fail": True}
        return {"inserts": [(StudyRecord.__table__, [self.study]), (RowRecord.__table__, self.rows)]}

    def write(self, s: Session) -> None:
        if self.capped:
            self.store._check_caps(s, self.owner, len(self.pending), self.max_active, self.max_queued)
        conn = s.connection()
        conn.execute(insert(StudyRecord.__table__), [self.study])
        if self.rows:
            conn.execute(insert(RowRecord.__table__), self.rows)

    def result(self) -> tuple[dict, bool, list[tuple[int, dict]]]:
        return self.store._summary(StudyRecord(**{**self.study, "request": self.req})), True, self.pending


class Store:
    """Studies and the cache behind a SQLAlchemy engine.

    url: a SQLAlchemy URL (``sqlite:///path.db``, ``postgresql+psycopg://...``).
    run_migrations: default True; apply the alembic migrations on open.
    """

    def __init__(self, url: str, *, run_migrations: bool = True):
        self.url = url
        self.engine = make_engine(url)
        if run_migrations:
            migrate(self.engine)
        self._session = sessionmaker(self.engine, expire_on_commit=False)
        self._write_session = sessionmaker(self.engine.execution_options(toposcout_write=True),
                                           expire_on_commit=False)
        # SQLite allows one writer: writers queue on WriteLock (then BEGIN IMMEDIATE finds it free); new
        # studies are written several per transaction (store/writing.py; on PostgreSQL the uncapped ones)
        sqlite = self.engine.dialect.name == "sqlite"
        path = _sqlite_file(self.engine) if sqlite else None
        self._write_lock = WriteLock(path and path + "-writelock") if sqlite else contextlib.nullcontext()
        self._group = GroupWriter(self._writing)
        self._hits = _Memo(4096)  # task key -> cached row and seconds (see _cached_hits)

    @contextlib.contextmanager
    def _writing(self):
        """One write transaction holding the write lock from its start (see the module text)."""
        with self._write_lock, self._write_session.begin() as s:
            yield s

    def _advisory(self, s: Session, *keys: int) -> None:
        """PostgreSQL: take these transaction-scoped advisory locks (in the given order)."""
        if self.dialect == "postgresql":
            for k in keys:
                s.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": k})

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    def close(self) -> None:
        self._group.close()
        self.engine.dispose()
        if isinstance(self._write_lock, WriteLock):
            self._write_lock.close()

    # --- studies ------------------------------------------------------------------
    def create_study(self, *, owner: str, request: Mapping[str, Any], model_name: str,
                     tasks: list[dict], keys: list[str], idempotency_key: str | None = None,
                     study_id: str | None = None, max_active: int | None = None,
                     max_queued: int | None = None) -> tuple[dict, bool, list[tuple[int, dict]]]:
        """Store a study and one pending row per task; rows whose key is cached are done at once.

        Returns ``(summary, created, pending)``: ``created`` is False when ``(owner,
        idempotency_key)`` already named a study (that one is returned, ``pending`` empty);
        ``pending`` lists the ``(task_index, task)`` still to run. Raises :class:`StudyConflict`
        when that study was made from a different request, and :class:`TooManyActive` when the
        study would have to run and ``owner`` already has ``max_active`` unfinished studies, and
        :class:`QueueFull` when its tasks would take the pending tasks of all studies past
        ``max_queued``. The counts and the insert are one atomic step (see the module text).
        """
        req = _json_safe(dict(request))
        rhash = request_hash(req)
        if idempotency_key is not None:
            found = self._by_idempotency(owner, idempotency_key, rhash)
            if found is not None:
                return found, False, []
        # results are only ever added, never changed or removed: read before the write transaction,
        # so the write lock (SQLite: one writer for every process) is held only for the inserts
        new = _NewStudy(self, study_id or new_study_id(), owner, req, rhash, model_name, tasks, keys,
                        idempotency_key, self._cached_hits(set(keys)), max_active, max_queued)
        try:
            if self._grouped(new):
                self._group.submit(**new.job()).result()
            else:
                with self._writing() as s:
                    new.write(s)
        except IntegrityError:
            if idempotency_key is None:
                raise
            found = self._by_idempotency(owner, idempotency_key, rhash)
            if found is None:  # pragma: no cover - the conflicting row vanished again
                raise
            return found, False, []
        return new.result()

    def create_study_nowait(self, *, owner: str, request: Mapping[str, Any], model_name: str,
                            tasks: list[dict], keys: list[str], max_active: int | None = None,
                            max_queued: int | None = None) -> concurrent.futures.Future | None:
        """:meth:`create_study` without an Idempotency-Key, for an event loop: when it needs no read
        (every key is one this process already knows as cached: a resubmission) the study is built
        here and its inserts handed to the group writer; the future gives ``(summary, True,
        pending)`` or raises what create_study raises. None when it would have to read first: then call
        :meth:`create_study` in a thread."""
        cached = {k: hit for k in set(keys) if (hit := self._hits.get(k)) is not None}
        if len(cached) < len(set(keys)):
            return None
        req = _json_safe(dict(request))
        new = _NewStudy(self, new_study_id(), owner, req, request_hash(req), model_name, tasks, keys, None, cached,
                        max_active, max_queued)
        if not self._grouped(new):  # pragma: no cover - every key cached and no Idempotency-Key: never refused
            return None
        out: concurrent.futures.Future = concurrent.futures.Future()

        def done(f: concurrent.futures.Future) -> None:
            exc = f.exception()
            if exc is not None:
                out.set_exception(exc)
            else:
                out.set_result(new.result())
        self._group.submit(**new.job()).add_done_callback(done)
        return out

    def _grouped(self, new: "_NewStudy") -> bool:
        """Whether ``new`` goes to the group writer: always on SQLite; on PostgreSQL when nothing can
        refuse it (writing.py's module text)."""
        return self.dialect == "sqlite" or not new.may_fail

    def _check_caps(self, s: Session, owner: str, must_run: int, max_active: int | None,
                    max_queued: int | None) -> None:
        """Raise TooManyActive / QueueFull inside the creating transaction (locks held to its end)."""
        if not must_run or (max_active is None and max_queued is None):
            return
        self._advisory(s, _lock_key(owner), _QUEUE_LOCK)  # always in this order: no lock cycle
        if max_active is not None:
            active = s.scalar(select(func.count()).select_from(StudyRecord)
                              .where(StudyRecord.owner == owner, StudyRecord.status.in_(UNFINISHED))) or 0
            if active >= max_active:
                raise TooManyActive(int(active))
        if max_queued is not None:
            queued = int(s.scalar(select(func.count()).select_from(RowRecord)
                                  .where(RowRecord.status == "pending")) or 0)
            if queued + must_run > max_queued:
                raise QueueFull(queued)

    def _by_idempotency(self, owner: str, key: str, rhash: str) -> dict | None:
        with self._session() as s:
            rec = s.scalars(select(StudyRecord).where(StudyRecord.owner == owner,
                                                      StudyRecord.idempotency_key == key)).first()
            if rec is None:
                return None
            if rec.request_hash != rhash:
                raise StudyConflict("Idempotency-Key was already used for a different request; "
                                    "use a new key for a new study")
            return self._summary(rec)

    def _cached(self, s: Session, keys: set[str]) -> dict[str, dict]:
        if not keys:
            return {}
        out = {}
        for key, row, seconds in s.execute(select(ResultRecord.task_key, ResultRecord.row, ResultRecord.seconds)
                                           .where(ResultRecord.task_key.in_(keys))):
            out[key] = {"row": row, "seconds": seconds}
        return out

    def _cached_hits(self, keys: set[str]) -> dict[str, dict]:
        """:meth:`_cached` in a read transaction of its own, through a per-process memo of hits (a
        result never changes once stored; misses are not kept, the key may be stored later)."""
        out = {k: hit for k in keys if (hit := self._hits.get(k)) is not None}
        missing = keys - out.keys()
        if missing:
            with self._session() as s:
                found = self._cached(s, missing)
            for k, hit in found.items():
                hit["text"] = json_text(hit["row"])  # written into every study that reuses it
                self._hits.put(k, hit)
            out.update(found)
        return out

    def put_result(self, key: str, row: Mapping[str, Any], seconds: float | None = None) -> None:
        """Cache a row computed outside a study (``POST /v1/compile``)."""
        row = dict(row)
        qpy_b64 = row.pop("circuit_qpy_b64", None)
        if row.get("error_field") in UNCACHEABLE_FIELDS:
            return
        row = _json_safe(row)
        try:
            with self._writing() as s:
                if s.get(ResultRecord, key) is None:
                    s.add(ResultRecord(task_key=key, row=row, circuit=base64.b64decode(qpy_b64) if qpy_b64 else None,
                                       seconds=float(seconds if seconds is not None else row.get("row_seconds") or 0),
                                       created_at=utcnow()))
        except IntegrityError:
            pass  # stored concurrently: same content

    def cached_row(self, key: str) -> dict | None:
        """The cached row of a task key, or None."""
        with self._session() as s:
            hit = self._cached(s, {key})
        return hit[key]["row"] if key in hit else None

    def get_study(self, study_id: str, *, rows: bool = True) -> dict | None:
        """The study with its request and (by default) its rows in task order; None if unknown."""
        with self._session() as s:
            rec = s.get(StudyRecord, study_id)
            if rec is None:
                return None
            out = self._summary(rec)
            out["request"] = rec.request
            if rows:
                recs = s.scalars(select(RowRecord).where(RowRecord.study_id == study_id)
                                 .order_by(RowRecord.task_index)).all()
                out["rows"] = [_api_row(r) for r in recs]
        return out

    def study_owner(self, study_id: str) -> str | None:
        with self._session() as s:
            return s.scalar(select(StudyRecord.owner).where(StudyRecord.id == study_id))

    def list_studies(self, *, status: str | None = None, owner: str | None = None, limit: int = 20,
                     offset: int = 0, model: str | None = None, label: str | None = None) -> tuple[list[dict], int]:
        """Summaries, newest first, and the total matching the filters (``model``: the model's
        name; ``label``: the request's label, both exact)."""
        q = select(StudyRecord)
        c = select(func.count()).select_from(StudyRecord)
        if model is not None:
            q, c = q.where(StudyRecord.model_name == model), c.where(StudyRecord.model_name == model)
        if label is not None:
            cond = StudyRecord.request["label"].as_string() == label
            q, c = q.where(cond), c.where(cond)
        if status is not None:
            q, c = q.where(StudyRecord.status == status), c.where(StudyRecord.status == status)
        if owner is not None:
            q, c = q.where(StudyRecord.owner == owner), c.where(StudyRecord.owner == owner)
        with self._session() as s:
            total = s.scalar(c) or 0
            recs = s.scalars(q.order_by(StudyRecord.created_at.desc(), StudyRecord.id).limit(limit)
                             .offset(offset)).all()
            return [self._summary(r) for r in recs], int(total)

    def active_count(self, owner: str) -> int:
        with self._session() as s:
            return int(s.scalar(select(func.count()).select_from(StudyRecord)
                                .where(StudyRecord.owner == owner, StudyRecord.status.in_(UNFINISHED))) or 0)

    def counts_by_status(self) -> dict[str, int]:
        out = {k: 0 for k in STUDY_STATES}
        with self._session() as s:
            for status, n in s.execute(select(StudyRecord.status, func.count()).group_by(StudyRecord.status)):
                out[status] = int(n)
        return out

    def mark_running(self, study_id: str) -> None:
        """queued → running (the executor started a task of the study)."""
        with self._writing() as s:
            s.execute(update(StudyRecord).where(StudyRecord.id == study_id, StudyRecord.status == "queued")
                      .values(status="running", updated_at=utcnow()))

    def record_row(self, study_id: str, task_index: int, row: Mapping[str, Any], seconds: float | None = None,
                   *, key: str | None = None, cached: bool = False, lease_owner: str | None = None) -> bool:
        """Store the finished row of a task: in the cache (unless the executor failed it) and,
        if the row was still pending, in the study (progress + status). Idempotent: a second
        call for the same row changes nothing and returns False. ``cached``: the row came
        from the cache (or from another study's identical task), not from a computation.
        ``lease_owner``: a queue worker's id; the row is written only while that worker holds
        the row's lease (:meth:`claim_task`), else nothing changes and False is returned."""
        row = dict(row)
        qpy_b64 = row.pop("circuit_qpy_b64", None)
        circuit = base64.b64decode(qpy_b64) if qpy_b64 else None
        row = _json_safe(row)
        secs = float(seconds if seconds is not None else row.get("row_seconds") or 0.0)
        now = utcnow()
        with self._writing() as s:
            rec = s.get(RowRecord, (study_id, task_index))
            if rec is None:
                return False
            key = key or rec.task_key
            if not cached and row.get("error_field") not in UNCACHEABLE_FIELDS and s.get(ResultRecord, key) is None:
                try:
                    with s.begin_nested():
                        s.add(ResultRecord(task_key=key, row=row, circuit=circuit, seconds=secs, created_at=now))
                except IntegrityError:
                    pass  # another study stored the same key first: same content
            cond = [RowRecord.study_id == study_id, RowRecord.task_index == task_index, RowRecord.status == "pending"]
            if lease_owner is not None:
                cond.append(RowRecord.lease_owner == lease_owner)
            changed = s.execute(update(RowRecord).where(*cond)
                                .values(status=_row_status(row), row=row, seconds=secs, cached=cached,
                                        updated_at=now, lease_owner=None, lease_until=None)).rowcount
            if not changed:
                return False
            s.execute(update(StudyRecord).where(StudyRecord.id == study_id)
                      .values(done=StudyRecord.done + 1, updated_at=now))
            st = s.get(StudyRecord, study_id, populate_existing=True)
            if st.done >= st.total and st.status in UNFINISHED:
                ok = s.scalar(select(func.count()).select_from(RowRecord)
                              .where(RowRecord.study_id == study_id, RowRecord.status == "done"))
                st.status = "done" if ok else "failed"
                recs = s.scalars(select(RowRecord).where(RowRecord.study_id == study_id)).all()
                st.best_connectivity = best_connectivity([_api_row(r) for r in recs])
            elif st.status == "queued":
                st.status = "running"
        return True

    def cancel(self, study_id: str) -> dict | None:
        """Mark an unfinished study and its pending rows cancelled; returns the summary."""
        now = utcnow()
        with self._writing() as s:
            rec = s.get(StudyRecord, study_id, with_for_update=True)
            if rec is None:
                return None
            if rec.status in UNFINISHED:
                rec.status = "cancelled"
                rec.updated_at = now
                s.execute(update(RowRecord).where(RowRecord.study_id == study_id, RowRecord.status == "pending")
                          .values(status="cancelled", updated_at=now))
            return self._summary(rec)

    # --- the queue ------------------------------------------------------------------
    def claim_task(self, worker: str, lease_seconds: float) -> dict | None:
        """Take one pending task whose lease is free or has expired, for ``lease_seconds``.

        Round-robin: the owner whose last claim is oldest goes first (owners never served
        before first), then that owner's study whose last claim is oldest (oldest study first
        among equals), then that study's lowest pending row. Returns ``{"study_id",
        "task_index", "task", "task_key", "attempts"}`` (``attempts`` counts this one) or None.
        """
        now = utcnow()
        free = or_(RowRecord.lease_until.is_(None), RowRecord.lease_until < now)
        with self._session() as s:  # an idle queue costs a read, not the write lock
            if s.scalar(select(RowRecord.task_index).where(RowRecord.status == "pending", free).limit(1)) is None:
                return None
        with self._writing() as s:
            self._advisory(s, _CLAIM_LOCK)
            cands = s.execute(select(StudyRecord.id, StudyRecord.owner, StudyRecord.claimed_at, StudyRecord.created_at)
                              .where(StudyRecord.status.in_(UNFINISHED),
                                     exists().where(RowRecord.study_id == StudyRecord.id,
                                                    RowRecord.status == "pending", free))).all()
            if not cands:
                return None
            owners = set(c.owner for c in cands)
            last = dict(s.execute(select(StudyRecord.owner, func.max(StudyRecord.claimed_at))
                                  .where(StudyRecord.status.in_(UNFINISHED), StudyRecord.owner.in_(owners))
                                  .group_by(StudyRecord.owner)).all())
            never = dt.datetime.min.replace(tzinfo=dt.timezone.utc)
            first_created = {}
            for c in cands:
                first_created[c.owner] = min(first_created.get(c.owner, c.created_at), c.created_at)
            owner = min(owners, key=lambda o: (_aware(last.get(o)) or never, first_created[o], o))
            study = min((c for c in cands if c.owner == owner),
                        key=lambda c: (_aware(c.claimed_at) or never, c.created_at, c.id))
            rec = s.scalars(select(RowRecord).where(RowRecord.study_id == study.id, RowRecord.status == "pending",
                                                    free).order_by(RowRecord.task_index).limit(1)).first()
            if rec is None:  # pragma: no cover - the candidate query just saw it
                return None
            rec.lease_owner, rec.lease_until = worker, now + dt.timedelta(seconds=lease_seconds)
            rec.attempts = (rec.attempts or 0) + 1
            s.execute(update(StudyRecord).where(StudyRecord.id == study.id)
                      .values(claimed_at=now, status=case((StudyRecord.status == "queued", "running"),
                                                          else_=StudyRecord.status)))
            return {"study_id": rec.study_id, "task_index": int(rec.task_index), "task": dict(rec.task),
                    "task_key": rec.task_key, "attempts": int(rec.attempts)}

    def renew_leases(self, worker: str, lease_seconds: float) -> set[tuple[str, int]]:
        """Extend every lease ``worker`` holds; returns the ``(study_id, task_index)`` it still holds
        (a row that was cancelled, written, or taken by another worker after expiry is missing)."""
        until = utcnow() + dt.timedelta(seconds=lease_seconds)
        mine = (RowRecord.lease_owner == worker, RowRecord.status == "pending")
        with self._writing() as s:
            s.execute(update(RowRecord).where(*mine).values(lease_until=until))
            return {(sid, int(i)) for sid, i in s.execute(select(RowRecord.study_id, RowRecord.task_index)
                                                          .where(*mine))}

    def release_leases(self, worker: str, rows: Iterable[tuple[str, int]] | None = None, *,
                       count_attempt: bool = False) -> int:
        """Give back the leases of ``worker`` (all, or those of ``rows``): the rows can be taken
        again at once; the attempt is not counted unless ``count_attempt`` (the worker died).
        Returns how many."""
        cond = [RowRecord.lease_owner == worker, RowRecord.status == "pending"]
        if rows is not None:
            rows = list(rows)
            if not rows:
                return 0
            cond.append(or_(*[(RowRecord.study_id == sid) & (RowRecord.task_index == int(i)) for sid, i in rows]))
        with self._writing() as s:
            return s.execute(update(RowRecord).where(*cond)
                             .values(lease_owner=None, lease_until=None,
                                     attempts=RowRecord.attempts if count_attempt else
                                     case((RowRecord.attempts > 0, RowRecord.attempts - 1), else_=0))).rowcount

    def lease_owners(self) -> set[str]:
        """Workers holding a lease on a pending row now or before (expired leases included)."""
        with self._session() as s:
            return set(s.scalars(select(RowRecord.lease_owner).where(RowRecord.status == "pending",
                                                                      RowRecord.lease_owner.is_not(None))
                                 .distinct()).all())

    def statuses(self, study_ids: Iterable[str]) -> dict[str, str]:
        """study id -> status, for the given ids (unknown ids left out)."""
        ids = list(set(study_ids))
        if not ids:
            return {}
        with self._session() as s:
            return dict(s.execute(select(StudyRecord.id, StudyRecord.status).where(StudyRecord.id.in_(ids))).all())

    def queue_counts(self) -> dict[str, int]:
        """``{"pending": rows waiting or running, "leased": of them held by a worker now}``."""
        now = utcnow()
        with self._session() as s:
            pending = s.scalar(select(func.count()).select_from(RowRecord).where(RowRecord.status == "pending")) or 0
            leased = s.scalar(select(func.count()).select_from(RowRecord)
                              .where(RowRecord.status == "pending", RowRecord.lease_until >= now)) or 0
        return {"pending": int(pending), "leased": int(leased)}

    def unfinished(self) -> list[tuple[str, list[tuple[int, dict]]]]:
        """Queued and running studies (oldest first) with their pending (task_index, task)."""
        out = []
        with self._session() as s:
            ids = s.scalars(select(StudyRecord.id).where(StudyRecord.status.in_(UNFINISHED))
                            .order_by(StudyRecord.created_at)).all()
            for sid in ids:
                rows = s.execute(select(RowRecord.task_index, RowRecord.task)
                                 .where(RowRecord.study_id == sid, RowRecord.status == "pending")
                                 .order_by(RowRecord.task_index)).all()
                out.append((sid, [(int(i), dict(t)) for i, t in rows]))
        return out

    def task_keys(self, study_id: str) -> dict[int, str]:
        with self._session() as s:
            return {int(i): k for i, k in s.execute(select(RowRecord.task_index, RowRecord.task_key)
                                                    .where(RowRecord.study_id == study_id))}

    def circuit(self, study_id: str, task_index: int) -> bytes | None:
        """QPY bytes of a row's compiled circuit, or None (unknown row, not done, or failed)."""
        with self._session() as s:
            key = s.scalar(select(RowRecord.task_key).where(RowRecord.study_id == study_id,
                                                            RowRecord.task_index == task_index,
                                                            RowRecord.status == "done"))
            if key is None:
                return None
            return s.scalar(select(ResultRecord.circuit).where(ResultRecord.task_key == key))

    def task_seconds_histogram(self, buckets: Iterable[float]) -> tuple[list[int], int, float]:
        """Computed (not cached) task durations: cumulative counts per bucket bound, count, sum."""
        bounds = list(buckets)
        cols = [func.sum(case((ResultRecord.seconds <= b, 1), else_=0)) for b in bounds]
        with self._session() as s:
            res = s.execute(select(func.count(), func.sum(ResultRecord.seconds), *cols)).one()
        return [int(x or 0) for x in res[2:]], int(res[0] or 0), float(res[1] or 0.0)

    # --- helpers ------------------------------------------------------------------
    @staticmethod
    def _summary(rec: StudyRecord) -> dict:
        return {"id": rec.id, "status": rec.status, "owner": rec.owner, "model_name": rec.model_name,
                "created_at": _iso(rec.created_at), "updated_at": _iso(rec.updated_at),
                "progress": {"done": rec.done, "total": rec.total},
                "best_connectivity": rec.best_connectivity, **request_summary(rec.request)}


def request_summary(request: Mapping[str, Any] | None) -> dict:
    """What the study list shows of a stored request: label, connectivities, profiles, scales."""
    req = request or {}
    conns = []
    for c in req.get("connectivities") or []:
        if isinstance(c, Mapping):
            conns.append(str(c.get("name") or c.get("family")) + (f":{c['size']}" if c.get("size") else ""))
        else:
            conns.append(str(c))
    prof = req.get("profile")
    profs = prof if isinstance(prof, list) else ([] if prof is None and req.get("compile_only") else [prof])
    names = [p.get("name", "custom") if isinstance(p, Mapping) else (p or "default") for p in profs]
    return {"label": req.get("label"), "connectivities": conns or ["every built-in family"],
            "profiles": [str(n) for n in names], "noise_scales": [float(s) for s in req.get("noise_scales") or []]}


def best_connectivity(rows: list[dict]) -> str | None:
    """The connectivity of the best finished row: highest state fidelity when simulated,
    else fewest two-qubit gates (then depth)."""
    ok = [r for r in rows if r.get("status") == "done" and not r.get("error") and r.get("connectivity")]
    if not ok:
        return None
    noisy = [r for r in ok if isinstance(r.get("state_fidelity"), (int, float))]
    if noisy:
        return max(noisy, key=lambda r: (r["state_fidelity"], -(r.get("two_qubit_gates") or 0)))["connectivity"]
    return min(ok, key=lambda r: (r.get("two_qubit_gates") or 0, r.get("depth") or 0))["connectivity"]


def _aware(t: dt.datetime | None) -> dt.datetime | None:
    return t.replace(tzinfo=dt.timezone.utc) if t is not None and t.tzinfo is None else t


def _row_status(row: Mapping[str, Any]) -> str:
    return "failed" if row.get("error") else "done"


def _api_row(r: RowRecord) -> dict:
    out: dict[str, Any] = {"task_index": r.task_index, "status": r.status, "cached": bool(r.cached)}
    if r.row is not None:
        out.update(r.row)
    else:
        spec = (r.task or {}).get("connectivity") or {}
        out["connectivity"] = spec.get("family") if isinstance(spec, dict) else None
        out["noise_scale"] = (r.task or {}).get("noise_scale")
    out["task_index"], out["status"], out["cached"] = r.task_index, r.status, bool(r.cached)
    return out
