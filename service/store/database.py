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
"""

from __future__ import annotations

import base64
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
                        UniqueConstraint, case, create_engine, event, func, insert, select, update)
from sqlalchemy.engine import Engine
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import DeclarativeBase, Mapped, Session, mapped_column, sessionmaker
from sqlalchemy.types import TypeDecorator

__all__ = ["Store", "Base", "StudyConflict", "TooManyActive", "best_connectivity", "STUDY_STATES", "FINISHED_STATES",
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
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)


class RowRecord(Base):
    __tablename__ = "study_rows"

    study_id: Mapped[str] = mapped_column(String(32), ForeignKey("studies.id", ondelete="CASCADE"),
                                          primary_key=True)
    task_index: Mapped[int] = mapped_column(Integer, primary_key=True)
    status: Mapped[str] = mapped_column(String(16))
    cached: Mapped[bool] = mapped_column(Boolean, default=False)
    task_key: Mapped[str] = mapped_column(String(64), index=True)
    task: Mapped[dict] = mapped_column(JSON)
    row: Mapped[dict | None] = mapped_column(JSON, nullable=True)
    seconds: Mapped[float | None] = mapped_column(Float, nullable=True)
    updated_at: Mapped[dt.datetime] = mapped_column(UTCDateTime)


_STUDY_COLUMNS = ("id", "owner", "status", "model_name", "request", "request_hash", "idempotency_key", "total",
                  "done", "best_connectivity", "created_at", "updated_at")


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


def _iso(t: dt.datetime) -> str:
    return t.astimezone(dt.timezone.utc).isoformat().replace("+00:00", "Z")


def make_engine(url: str) -> Engine:
    """An engine for ``url``; SQLite files get WAL mode, foreign keys and a busy timeout."""
    if url.startswith("sqlite"):
        engine = create_engine(url, connect_args={"check_same_thread": False, "timeout": 30},
                               pool_size=20, max_overflow=20)

        @event.listens_for(engine, "connect")
        def _sqlite_pragmas(dbapi_conn, _record):  # pragma: no cover - exercised by every SQLite test
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute("PRAGMA busy_timeout=30000")
            cur.close()

        return engine
    return create_engine(url, pool_pre_ping=True, pool_size=20, max_overflow=20)


def migrate(engine: Engine) -> None:
    """Bring the schema to the newest migration (alembic, scripts shipped in the package)."""
    from alembic import command
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(Path(__file__).resolve().parent / "migrations"))
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.upgrade(cfg, "head")


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
        # SQLite allows one writer; its busy handler sleeps up to 100 ms per retry, so writers of
        # this process queue on a lock instead (every write of a server comes from its process)
        self._write_lock = threading.Lock() if self.engine.dialect.name == "sqlite" else contextlib.nullcontext()

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    def close(self) -> None:
        self.engine.dispose()

    # --- studies ------------------------------------------------------------------
    def create_study(self, *, owner: str, request: Mapping[str, Any], model_name: str,
                     tasks: list[dict], keys: list[str], idempotency_key: str | None = None,
                     study_id: str | None = None, max_active: int | None = None
                     ) -> tuple[dict, bool, list[tuple[int, dict]]]:
        """Store a study and one pending row per task; rows whose key is cached are done at once.

        Returns ``(summary, created, pending)``: ``created`` is False when ``(owner,
        idempotency_key)`` already named a study (that one is returned, ``pending`` empty);
        ``pending`` lists the ``(task_index, task)`` still to run. Raises :class:`StudyConflict`
        when that study was made from a different request, and :class:`TooManyActive` when the
        study would have to run and ``owner`` already has ``max_active`` unfinished studies.
        """
        req = _json_safe(dict(request))
        rhash = request_hash(req)
        if idempotency_key is not None:
            found = self._by_idempotency(owner, idempotency_key, rhash)
            if found is not None:
                return found, False, []
        now = utcnow()
        sid = study_id or new_study_id()
        try:
            with self._write_lock, self._session.begin() as s:
                cached = self._cached(s, set(keys))
                if max_active is not None and any(k not in cached for k in keys):
                    active = s.scalar(select(func.count()).select_from(StudyRecord)
                                      .where(StudyRecord.owner == owner, StudyRecord.status.in_(UNFINISHED))) or 0
                    if active >= max_active:
                        raise TooManyActive(int(active))
                pending = []
                rows = []
                done = 0
                any_ok = False
                for i, (task, key) in enumerate(zip(tasks, keys)):
                    hit = cached.get(key)
                    row = {"study_id": sid, "task_index": i, "task_key": key, "task": _json_safe(task),
                           "updated_at": now}
                    if hit is not None:
                        done += 1
                        any_ok = any_ok or hit["row"].get("error") is None
                        row.update(status=_row_status(hit["row"]), cached=True, row=hit["row"], seconds=hit["seconds"])
                    else:
                        pending.append((i, task))
                        row.update(status="pending", cached=False, row=None, seconds=None)
                    rows.append(row)
                status = ("done" if any_ok else "failed") if tasks and done == len(tasks) else "queued"
                best = (best_connectivity([{**(r["row"] or {}), "status": r["status"]} for r in rows])
                        if status != "queued" else None)
                rec = StudyRecord(id=sid, owner=owner, status=status, model_name=model_name[:200], request=req,
                                  request_hash=rhash, idempotency_key=idempotency_key, total=len(tasks), done=done,
                                  best_connectivity=best, created_at=now, updated_at=now)
                s.execute(insert(StudyRecord), [{c: getattr(rec, c) for c in _STUDY_COLUMNS}])
                if rows:
                    s.execute(insert(RowRecord), rows)
                summary = self._summary(rec)
        except IntegrityError:
            if idempotency_key is None:
                raise
            found = self._by_idempotency(owner, idempotency_key, rhash)
            if found is None:  # pragma: no cover - the conflicting row vanished again
                raise
            return found, False, []
        return summary, True, pending

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

    def put_result(self, key: str, row: Mapping[str, Any], seconds: float | None = None) -> None:
        """Cache a row computed outside a study (``POST /v1/compile``)."""
        row = dict(row)
        qpy_b64 = row.pop("circuit_qpy_b64", None)
        if row.get("error_field") in UNCACHEABLE_FIELDS:
            return
        row = _json_safe(row)
        try:
            with self._write_lock, self._session.begin() as s:
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
        with self._write_lock, self._session.begin() as s:
            s.execute(update(StudyRecord).where(StudyRecord.id == study_id, StudyRecord.status == "queued")
                      .values(status="running", updated_at=utcnow()))

    def record_row(self, study_id: str, task_index: int, row: Mapping[str, Any], seconds: float | None = None,
                   *, key: str | None = None, cached: bool = False) -> bool:
        """Store the finished row of a task: in the cache (unless the executor failed it) and,
        if the row was still pending, in the study (progress + status). Idempotent: a second
        call for the same row changes nothing and returns False. ``cached``: the row came
        from the cache (or from another study's identical task), not from a computation."""
        row = dict(row)
        qpy_b64 = row.pop("circuit_qpy_b64", None)
        circuit = base64.b64decode(qpy_b64) if qpy_b64 else None
        row = _json_safe(row)
        secs = float(seconds if seconds is not None else row.get("row_seconds") or 0.0)
        now = utcnow()
        with self._write_lock, self._session.begin() as s:
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
            changed = s.execute(update(RowRecord).where(RowRecord.study_id == study_id,
                                                        RowRecord.task_index == task_index,
                                                        RowRecord.status == "pending")
                                .values(status=_row_status(row), row=row, seconds=secs, cached=cached,
                                        updated_at=now)).rowcount
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
        with self._write_lock, self._session.begin() as s:
            rec = s.get(StudyRecord, study_id, with_for_update=True)
            if rec is None:
                return None
            if rec.status in UNFINISHED:
                rec.status = "cancelled"
                rec.updated_at = now
                s.execute(update(RowRecord).where(RowRecord.study_id == study_id, RowRecord.status == "pending")
                          .values(status="cancelled", updated_at=now))
            return self._summary(rec)

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
