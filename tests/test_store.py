"""The store on SQLite and on PostgreSQL (every test runs on both; fixtures in conftest)."""

from __future__ import annotations

import base64
import datetime as dt
import threading

import pytest
from sqlalchemy import inspect, text

from toposcout.service.store import Store, StudyConflict, TooManyActive


def _tasks(n: int, tag: str = "t") -> tuple[list[dict], list[str]]:
    tasks = [{"connectivity": {"family": "line", "size": None, "edges": None}, "model": {"name": tag}, "i": i}
             for i in range(n)]
    return tasks, [f"{tag}-key-{i}" for i in range(n)]


def _new(store: Store, n: int = 3, *, owner: str = "alice", tag: str = "t", **kw):
    tasks, keys = _tasks(n, tag)
    return store.create_study(owner=owner, request={"tag": tag, **kw.pop("request", {})}, model_name=tag,
                              tasks=tasks, keys=keys, **kw)


def test_migrations_build_the_schema_and_are_idempotent(store, database_url):
    names = set(inspect(store.engine).get_table_names())
    assert {"studies", "study_rows", "results", "alembic_version"} <= names
    again = Store(database_url)  # a second start applies nothing and keeps the data
    with again.engine.connect() as c:
        assert c.execute(text("select version_num from alembic_version")).scalar() == "0003"
    again.close()
    assert "best_connectivity" in {col["name"] for col in inspect(store.engine).get_columns("studies")}
    if store.dialect == "sqlite":
        with store.engine.connect() as c:
            assert c.execute(text("pragma journal_mode")).scalar() == "wal"
            assert c.execute(text("pragma foreign_keys")).scalar() == 1
    else:
        assert store.dialect == "postgresql"


def test_create_get_and_list(store):
    s1, created, pending = _new(store, 3, tag="one")
    s2, _, _ = _new(store, 2, tag="two", owner="bob")
    assert created and [i for i, _ in pending] == [0, 1, 2]
    assert s1["status"] == "queued" and s1["progress"] == {"done": 0, "total": 3}
    got = store.get_study(s1["id"])
    assert got["request"] == {"tag": "one"} and [r["status"] for r in got["rows"]] == ["pending"] * 3
    assert got["rows"][0]["connectivity"] == "line"
    created_at = dt.datetime.fromisoformat(got["created_at"].replace("Z", "+00:00"))
    assert created_at.tzinfo is not None and abs(created_at - dt.datetime.now(dt.timezone.utc)).total_seconds() < 60
    items, total = store.list_studies()
    assert total == 2 and [i["id"] for i in items] == [s2["id"], s1["id"]]  # newest first
    items, total = store.list_studies(owner="bob")
    assert total == 1 and items[0]["owner"] == "bob"
    items, total = store.list_studies(limit=1, offset=1)
    assert total == 2 and [i["id"] for i in items] == [s1["id"]]
    assert store.list_studies(status="done") == ([], 0)
    assert store.get_study("0" * 32) is None


def test_idempotency_key(store):
    a, created_a, _ = _new(store, 2, idempotency_key="k-1")
    b, created_b, pending_b = _new(store, 2, idempotency_key="k-1")
    assert created_a and not created_b and a["id"] == b["id"] and pending_b == []
    c, created_c, _ = _new(store, 2, idempotency_key="k-1", owner="bob")  # keys are per owner
    assert created_c and c["id"] != a["id"]
    with pytest.raises(StudyConflict):
        _new(store, 2, idempotency_key="k-1", request={"other": True})
    assert store.list_studies()[1] == 2


def test_idempotency_key_under_concurrent_creation(store):
    ids, errors = [], []

    def go():
        try:
            ids.append(_new(store, 2, idempotency_key="race")[0]["id"])
        except Exception as exc:  # pragma: no cover - reported below
            errors.append(exc)

    threads = [threading.Thread(target=go) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert not errors and len(ids) == 8 and len(set(ids)) == 1
    assert store.list_studies()[1] == 1


def test_record_row_progress_status_and_idempotence(store):
    s, _, _ = _new(store, 3)
    sid = s["id"]
    assert store.record_row(sid, 0, {"error": None, "two_qubit_gates": 4, "x": float("nan")}, 0.5)
    assert not store.record_row(sid, 0, {"error": None, "two_qubit_gates": 99}, 0.5)  # second call: no change
    got = store.get_study(sid)
    assert got["status"] == "running" and got["progress"]["done"] == 1
    assert got["rows"][0]["two_qubit_gates"] == 4 and got["rows"][0]["x"] is None  # NaN stored as null
    store.record_row(sid, 1, {"error": "does not fit", "error_field": "connectivity"}, 0.1)
    assert store.list_studies(owner="alice")[0][0]["best_connectivity"] is None  # not finished yet
    store.record_row(sid, 2, {"error": None, "two_qubit_gates": 6, "connectivity": "ring-3"}, 0.2)
    got = store.get_study(sid)
    assert got["status"] == "done" and got["progress"] == {"done": 3, "total": 3}
    # the finished study's best connectivity is kept for the list (fewest two-qubit gates here;
    # row 0 names no connectivity, row 1 failed)
    assert store.list_studies(owner="alice")[0][0]["best_connectivity"] == "ring-3"
    assert [r["status"] for r in got["rows"]] == ["done", "failed", "done"]
    assert got["rows"][1]["error"] == "does not fit"  # a failed row keeps the others


def test_all_rows_failed_means_failed(store):
    s, _, _ = _new(store, 2)
    for i in range(2):
        store.record_row(s["id"], i, {"error": "boom", "error_field": "model"}, 0.0)
    assert store.get_study(s["id"])["status"] == "failed"


def test_cache_answers_later_studies_and_keeps_circuits_apart(store):
    s, _, _ = _new(store, 2, tag="c")
    qpy = b"QISKIT-fake-bytes"
    store.record_row(s["id"], 0, {"error": None, "depth": 7, "circuit_qpy_b64": base64.b64encode(qpy).decode()}, 1.0)
    store.record_row(s["id"], 1, {"error": "ran past the time limit", "error_field": "task_time_limit"}, 9.0)
    assert store.circuit(s["id"], 0) == qpy and store.circuit(s["id"], 1) is None
    assert "circuit_qpy_b64" not in store.get_study(s["id"])["rows"][0]
    assert store.cached_row("c-key-0")["depth"] == 7
    assert store.cached_row("c-key-1") is None  # executor failures are not cached
    again, created, pending = _new(store, 2, tag="c", request={"again": 1})
    assert created and [i for i, _ in pending] == [1]
    rows = store.get_study(again["id"])["rows"]
    assert rows[0]["cached"] is True and rows[0]["status"] == "done" and rows[0]["depth"] == 7
    assert rows[1]["cached"] is False and rows[1]["status"] == "pending"
    assert store.circuit(again["id"], 0) == qpy  # the cached row's circuit is served too


def test_fully_cached_study_is_done_at_once(store):
    s, _, _ = _new(store, 2, tag="f")
    for i in range(2):
        store.record_row(s["id"], i, {"error": None, "depth": i, "two_qubit_gates": 5 - i,
                                      "connectivity": f"line-{i + 3}"}, 0.1)
    again, _, pending = _new(store, 2, tag="f", request={"n": 2})
    assert pending == [] and again["status"] == "done" and again["progress"] == {"done": 2, "total": 2}
    assert again["best_connectivity"] == "line-4"


def test_cancel_marks_pending_rows_and_keeps_the_record(store):
    s, _, _ = _new(store, 3)
    store.record_row(s["id"], 0, {"error": None, "depth": 1}, 0.1)
    out = store.cancel(s["id"])
    assert out["status"] == "cancelled"
    store.record_row(s["id"], 1, {"error": None, "depth": 2}, 0.1)  # a running task finishing late
    got = store.get_study(s["id"])
    assert got["status"] == "cancelled" and [r["status"] for r in got["rows"]] == ["done", "cancelled", "cancelled"]
    assert store.cached_row("t-key-1")["depth"] == 2  # its work still lands in the cache
    assert store.unfinished() == []
    assert store.cancel("f" * 32) is None


def test_unfinished_lists_pending_tasks_oldest_first(store):
    a, _, _ = _new(store, 3, tag="a")
    b, _, _ = _new(store, 1, tag="b")
    done, _, _ = _new(store, 1, tag="d")
    store.record_row(a["id"], 1, {"error": None}, 0.1)
    store.record_row(done["id"], 0, {"error": None}, 0.1)
    out = store.unfinished()
    assert [sid for sid, _ in out] == [a["id"], b["id"]]
    assert [i for i, _ in out[0][1]] == [0, 2] and out[0][1][0][1]["i"] == 0


def test_active_cap_per_owner(store):
    for n in range(2):
        _new(store, 1, tag=f"cap{n}", max_active=2)
    with pytest.raises(TooManyActive):
        _new(store, 1, tag="cap9", max_active=2)
    _new(store, 1, tag="cap9", owner="bob", max_active=2)  # another owner is not affected
    store.record_row(store.list_studies(owner="alice")[0][0]["id"], 0, {"error": None}, 0.0)
    _new(store, 1, tag="cap9", max_active=2)  # one finished: room again
    assert store.active_count("alice") == 2


def test_concurrent_row_writes_count_exactly(store):
    s, _, _ = _new(store, 16)

    def write(i):
        store.record_row(s["id"], i, {"error": None, "i": i}, 0.01)
        store.record_row(s["id"], i, {"error": None, "i": -1}, 0.01)  # duplicate: ignored

    threads = [threading.Thread(target=write, args=(i,)) for i in range(16)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    got = store.get_study(s["id"])
    assert got["progress"] == {"done": 16, "total": 16} and got["status"] == "done"
    assert [r["i"] for r in got["rows"]] == list(range(16))
    assert store.counts_by_status()["done"] == 1


def test_task_duration_histogram(store):
    s, _, _ = _new(store, 3, tag="h")
    for i, secs in enumerate((0.05, 0.7, 20.0)):
        store.record_row(s["id"], i, {"error": None}, secs)
    counts, total, seconds = store.task_seconds_histogram([0.1, 1.0, 10.0])
    assert counts == [1, 2, 2] and total == 3 and seconds == pytest.approx(20.75)


def test_cap_holds_under_concurrent_creation(store):
    # 20 threads at once, one owner, cap 5: exactly 5 studies; on SQLite they share group transactions,
    # where each capped study is a savepoint of its own (service/store/writing.py)
    barrier = threading.Barrier(20)
    outcomes: list[str] = []

    def submit(i: int) -> None:
        barrier.wait()
        try:
            _new(store, 1, tag=f"burst{i}", max_active=5)
            outcomes.append("created")
        except TooManyActive:
            outcomes.append("refused")

    threads = [threading.Thread(target=submit, args=(i,)) for i in range(20)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert outcomes.count("created") == 5 and outcomes.count("refused") == 15
    assert store.active_count("alice") == 5 and store.list_studies(owner="alice")[1] == 5


def test_resubmission_from_an_event_loop(store):
    first, _, _ = _new(store, 2, tag="r")
    assert store.create_study_nowait(owner="alice", request={"tag": "r"}, model_name="r",
                                     tasks=_tasks(2, "r")[0], keys=_tasks(2, "r")[1]) is None  # nothing cached yet
    for i in range(2):
        store.record_row(first["id"], i, {"error": None, "depth": i, "two_qubit_gates": 5 - i,
                                          "connectivity": f"line-{i + 3}"}, 0.1)
    threaded, _, _ = _new(store, 2, tag="r")  # reads the cache, so this process now knows both keys
    tasks, keys = _tasks(2, "r")
    future = store.create_study_nowait(owner="alice", request={"tag": "r"}, model_name="r", tasks=tasks, keys=keys)
    summary, created, pending = future.result(timeout=30)
    assert created and pending == [] and summary["id"] not in (first["id"], threaded["id"])
    same = {k: summary[k] for k in ("status", "progress", "best_connectivity", "model_name", "owner", "label")}
    assert same == {k: threaded[k] for k in same} and same["status"] == "done"
    got = store.get_study(summary["id"])
    assert [(r["status"], r["cached"], r["depth"]) for r in got["rows"]] == [("done", True, 0), ("done", True, 1)]
    assert got["request"] == {"tag": "r"}


def test_non_finite_numbers_are_stored_as_null(store):
    tasks, keys = _tasks(1, "nan")
    tasks[0]["x"] = float("nan")
    s, _, _ = store.create_study(owner="alice", request={"tag": "nan", "scale": float("inf")}, model_name="nan",
                                 tasks=tasks, keys=keys)
    got = store.get_study(s["id"])
    assert got["request"] == {"tag": "nan", "scale": None}
    assert store.unfinished()[0][1][0][1]["x"] is None
