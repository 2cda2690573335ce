"""Helpers for the service tests: PostgreSQL databases, stores on both backends, a real server.

PostgreSQL: ``TOPOSCOUT_TEST_POSTGRES_URL`` (default ``postgresql+psycopg://postgres@127.0.0.1:5432/postgres``)
names an administrative database; every test gets its own fresh database
``toposcout_test_<random>``, dropped afterwards. With ``TOPOSCOUT_REQUIRE_POSTGRES=1`` (CI) an
unreachable server fails the tests instead of skipping them.
"""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import time
import uuid
from pathlib import Path

import httpx
import pytest

ROOT = Path(__file__).resolve().parent.parent
PG_DEFAULT = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"

SMALL_MODEL = {"name": "tri-chain", "variables": ["a", "b", "c", "d"], "cliques": [["a", "b", "c"], ["c", "d"]]}
K6 = {"name": "k6", "variables": [f"v{i}" for i in range(6)], "cliques": [[f"v{i}" for i in range(6)]]}


def postgres_admin_url() -> str:
    return os.environ.get("TOPOSCOUT_TEST_POSTGRES_URL", PG_DEFAULT)


def _pg_unavailable(reason: str):
    if os.environ.get("TOPOSCOUT_REQUIRE_POSTGRES") == "1":
        pytest.fail(f"PostgreSQL is required (TOPOSCOUT_REQUIRE_POSTGRES=1) but {reason}")
    pytest.skip(f"PostgreSQL not available: {reason}")


@contextlib.contextmanager
def fresh_postgres_database():
    """A new empty PostgreSQL database; yields its URL and drops it afterwards."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    admin_url = make_url(postgres_admin_url())
    engine = create_engine(admin_url, isolation_level="AUTOCOMMIT")
    try:
        conn = engine.connect()
    except Exception as exc:  # OperationalError and friends: the server is not there
        engine.dispose()
        _pg_unavailable(f"connecting to {admin_url.render_as_string(hide_password=True)} failed: {exc}")
    name = f"toposcout_test_{uuid.uuid4().hex[:12]}"
    conn.execute(text(f'CREATE DATABASE "{name}"'))
    try:
        yield admin_url.set(database=name).render_as_string(hide_password=False)
    finally:
        conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        conn.close()
        engine.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def database_url(request, tmp_path):
    """A fresh database URL, once per backend."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'store.db'}"
    else:
        with fresh_postgres_database() as url:
            yield url


@pytest.fixture
def store(database_url):
    from service.store import Store

    s = Store(database_url)
    yield s
    s.close()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    """``toposcout serve`` in a subprocess on 127.0.0.1:<free port>."""

    def __init__(self, tmp: Path, env: dict | None = None, port: int | None = None):
        self.tmp = tmp
        self.port = port or free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.env = dict(os.environ)
        self.env.pop("TOPOSCOUT_TOKENS", None)
        self.env.pop("TOPOSCOUT_DATABASE_URL", None)
        self.env.update({"TOPOSCOUT_DATA_DIR": str(tmp), "PYTHONUNBUFFERED": "1"})
        self.env.update(env or {})
        self.log_path = tmp / f"server-{self.port}.log"
        self.proc: subprocess.Popen | None = None

    def start(self, timeout: float = 60.0) -> "Server":
        self._log = open(self.log_path, "ab")
        self.proc = subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "--port", str(self.port)],
                                     cwd=ROOT, env=self.env, stdout=self._log, stderr=subprocess.STDOUT,
                                     start_new_session=True)
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.proc.poll() is not None:
                raise RuntimeError(f"server exited with {self.proc.returncode}:\n{self.log()}")
            try:
                if httpx.get(self.url + "/healthz", timeout=1.0).status_code == 200:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        raise RuntimeError(f"server did not answer within {timeout} s:\n{self.log()}")

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def kill(self) -> None:
        """SIGKILL the server and its worker processes (its whole process group)."""
        if self.proc is not None and self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait(10)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
            try:
                self.proc.wait(20)
            except subprocess.TimeoutExpired:
                pass
        if self.proc is not None and self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait(10)
        with contextlib.suppress(ProcessLookupError, PermissionError):
            if self.proc is not None:
                os.killpg(self.proc.pid, signal.SIGKILL)  # leftover workers of the group
        if getattr(self, "_log", None):
            self._log.close()

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()


def wait_study(client: httpx.Client, study_id: str, timeout: float = 120.0, states=("done", "failed", "cancelled")):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        r = client.get(f"/v1/studies/{study_id}")
        assert r.status_code == 200, r.text
        body = r.json()
        if body["status"] in states:
            return body
        time.sleep(0.1)
    raise AssertionError(f"study {study_id} not finished within {timeout} s: {body['status']} {body['progress']}")


#: row fields that are wall-clock measurements (differ between two runs of the same task).
TIMING_FIELDS = {"compile_seconds", "row_seconds", "simulate_seconds", "threshold_seconds"}


def comparable(row: dict) -> dict:
    return {k: v for k, v in row.items()
            if k not in TIMING_FIELDS and k not in ("task_index", "status", "cached", "circuit_qpy_b64")}
