"""Shared fixtures: example models, small models, databases on both stores, a real server.

Every test that needs one of these asks for the fixture; no test imports another test module.

PostgreSQL: ``TOPOSCOUT_TEST_POSTGRES_URL`` (default ``postgresql+psycopg://postgres@127.0.0.1:5432/postgres``)
names an administrative database; each use gets its own fresh database ``toposcout_test_<random>``,
dropped afterwards. With ``TOPOSCOUT_REQUIRE_POSTGRES=1`` (CI) an unreachable server fails the
tests instead of skipping them.
"""

from __future__ import annotations

import contextlib
import threading
from collections import Counter
import os
import signal
import socket
import subprocess
import sys
import time
import uuid
from pathlib import Path
from typing import Any, Callable, Iterator

import httpx
import numpy as np
import pytest
from qiskit.quantum_info import Statevector

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"
EXAMPLE_FILES = sorted(p for p in EXAMPLES.iterdir() if p.suffix in (".json", ".uai"))
PG_DEFAULT = "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
FINISHED = ("done", "failed", "cancelled")
#: row fields that are wall-clock measurements or bookkeeping (differ between two runs of one task)
NOT_COMPARED = {"compile_seconds", "row_seconds", "simulate_seconds", "threshold_seconds", "task_index", "status",
                "cached", "circuit_qpy_b64", "_seconds", "trajectory_seconds", "clifford_seconds",
                # the reason quotes this process's memory budget and the time estimate is a wall-time guess
                "method_reason", "time_estimate_seconds"}


# ---------------------------------------------------------------------------------------------- models

def _variables(path: Path) -> int:
    from toposcout.compiler.model import load_model

    return load_model(path).num_variables


#: examples small enough for an exact simulation in a test (the large ones are for benchmarks)
SMALL_EXAMPLE_FILES = [p for p in EXAMPLE_FILES if _variables(p) <= 12]


@pytest.fixture(params=[p.name for p in SMALL_EXAMPLE_FILES])
def example_path(request) -> Path:
    """Each example model small enough for an exact simulation (at most 12 variables)."""
    return EXAMPLES / request.param


@pytest.fixture(params=[p.name for p in EXAMPLE_FILES])
def any_example_path(request) -> Path:
    """Each example model, the large ones included."""
    return EXAMPLES / request.param


def _make_model(*cliques: str | list[str], name: str | None = None) -> dict:
    """A model dict from its cliques: ``make_model("abc", "cd")`` (one letter a variable) or lists of names.

    With no cliques: the four-variable tri-chain a-b-c, c-d every service test uses."""
    if not cliques:
        cliques = ("abc", "cd")
    groups = [list(c) for c in cliques]
    variables = list(dict.fromkeys(v for g in groups for v in g))
    return {"name": name or "-".join("".join(g) if all(len(v) == 1 for v in g) else "_".join(g) for g in groups),
            "variables": variables, "cliques": groups}


@pytest.fixture(scope="session")
def make_model() -> Callable[..., dict]:
    return _make_model


@pytest.fixture
def small_model() -> dict:
    """Four variables, cliques {a, b, c} and {c, d}: compiles in well under a second everywhere."""
    return _make_model("abc", "cd", name="tri-chain")


@pytest.fixture
def k6_model() -> dict:
    """One clique of six variables: 63 terms, a noise study of a few seconds (a 'slow' study in tests)."""
    return _make_model([f"v{i}" for i in range(6)], name="k6")


@pytest.fixture(scope="session")
def chain_model() -> Callable[[int], dict]:
    """``chain_model(n, name=None)``: n variables x0..x{n-1} joined in a line of pairs."""
    def chain(n: int, name: str | None = None) -> dict:
        v = [f"x{i}" for i in range(n)]
        return {"name": name or f"chain{n}", "variables": v, "cliques": [[v[i], v[i + 1]] for i in range(n - 1)]}
    return chain


# ------------------------------------------------------------------------------------ reference helpers

def _logical_distribution(ansatz) -> np.ndarray:
    """Ideal output distribution of the logical circuit (little-endian over variables)."""
    return Statevector(ansatz.circuit(measure=False)).probabilities()


def _compiled_distribution(compiled) -> np.ndarray:
    """Ideal output distribution of a compiled circuit over the model's variables.

    Bit i of the result is the physical qubit measured into clbit i.
    """
    from qiskit.converters import circuit_to_dag, dag_to_circuit

    qc = compiled.circuit.remove_final_measurements(inplace=False)
    # Drop the wires no gate touches (a heavy-hex instance has many): they stay |0> and do
    # not change the marginal over the measured qubits.
    dag = circuit_to_dag(qc)
    keep = [qc.find_bit(q).index for q in dag.qubits if q not in set(dag.idle_wires())]
    dag.remove_qubits(*[w for w in dag.idle_wires() if w in dag.qubits])
    small = dag_to_circuit(dag)
    pos = {p: i for i, p in enumerate(keep)}
    return Statevector(small).probabilities(qargs=[pos[p] for p in compiled.final_layout])


@pytest.fixture(scope="session")
def logical_distribution() -> Callable:
    """``logical_distribution(ansatz)``: the logical circuit's ideal distribution (qiskit Statevector)."""
    return _logical_distribution


@pytest.fixture(scope="session")
def compiled_distribution() -> Callable:
    """``compiled_distribution(compiled)``: a compiled circuit's ideal distribution over the variables."""
    return _compiled_distribution


@pytest.fixture(scope="session")
def comparable() -> Callable[[dict], dict]:
    """A row without its timings and bookkeeping, to compare two runs of the same task."""
    return lambda row: {k: v for k, v in row.items() if k not in NOT_COMPARED}


@pytest.fixture(scope="session")
def wait_until() -> Callable[..., bool]:
    """``wait_until(predicate, timeout=90, step=0.05)``: poll until true; returns the last answer."""
    def wait(pred: Callable[[], Any], timeout: float = 90.0, step: float = 0.05) -> bool:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if pred():
                return True
            time.sleep(step)
        return bool(pred())
    return wait


def _wait_study(source, study_id: str, timeout: float = 120.0, states=FINISHED, headers=None) -> dict:
    """Poll a study until its status is one of ``states``; source is an HTTP client or a Store."""
    end = time.monotonic() + timeout
    while True:
        if hasattr(source, "get_study"):
            body = source.get_study(study_id)
        else:
            r = source.get(f"/v1/studies/{study_id}", headers=headers)
            assert r.status_code == 200, r.text
            body = r.json()
        if body["status"] in states:
            return body
        if time.monotonic() > end:
            raise AssertionError(f"study {study_id} not finished within {timeout} s: {body['status']} "
                                 f"{body.get('progress')}")
        time.sleep(0.05)


@pytest.fixture(scope="session")
def wait_study() -> Callable[..., dict]:
    """``wait_study(client_or_store, study_id, timeout=120, states=FINISHED, headers=None)``."""
    return _wait_study


# --------------------------------------------------------------------------------------------- stores

class MemoryStore:
    """Stands in for the database: record_row is an upsert on (study_id, task_index)."""

    def __init__(self):
        self.rows: dict[tuple[str, int], dict] = {}
        self.calls: Counter = Counter()
        self.lock = threading.Lock()

    def record_row(self, study_id, task_index, row, seconds, cached=False):
        with self.lock:
            self.calls[(study_id, task_index)] += 1
            self.rows[(study_id, task_index)] = dict(row, _seconds=seconds)

    def study_rows(self, study_id):
        return {i: r for (s, i), r in self.rows.items() if s == study_id}


@pytest.fixture(scope="session")
def memory_store_class() -> type[MemoryStore]:
    """A stand-in for the database where only the executor's calls matter (``MemoryStore()``)."""
    return MemoryStore


@pytest.fixture
def memory_store() -> MemoryStore:
    return MemoryStore()


def _pg_unavailable(reason: str):
    if os.environ.get("TOPOSCOUT_REQUIRE_POSTGRES") == "1":
        pytest.fail(f"PostgreSQL is required (TOPOSCOUT_REQUIRE_POSTGRES=1) but {reason}")
    pytest.skip(f"PostgreSQL not available: {reason}")


@contextlib.contextmanager
def _fresh_postgres_database() -> Iterator[str]:
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    admin_url = make_url(os.environ.get("TOPOSCOUT_TEST_POSTGRES_URL", PG_DEFAULT))
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


@pytest.fixture(scope="session")
def postgres_database() -> Callable[[], contextlib.AbstractContextManager[str]]:
    """``with postgres_database() as url:`` a new empty PostgreSQL database, dropped afterwards."""
    return _fresh_postgres_database


@pytest.fixture(params=["sqlite", "postgresql"])
def database_url(request, tmp_path) -> Iterator[str]:
    """A fresh database URL, once per store."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'store.db'}"
    else:
        with _fresh_postgres_database() as url:
            yield url


@pytest.fixture
def store(database_url):
    from toposcout.service.store import Store

    s = Store(database_url)
    yield s
    s.close()


# --------------------------------------------------------------------------------------------- server

def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="session")
def free_port() -> Callable[[], int]:
    """``free_port()``: a TCP port on 127.0.0.1 nobody listens on now."""
    return _free_port


class Server:
    """``toposcout serve`` in a child process of its own group on 127.0.0.1, as a user starts it.

    folder: the data folder (SQLite store unless ``database_url``); tokens: ``TOPOSCOUT_TOKENS``;
    env: more ``TOPOSCOUT_*`` settings; args: more ``serve`` options. Each start logs to its own ``server-PORT.log``."""

    def __init__(self, folder: Path, *, tokens: str | None = None, workers: int = 2, env: dict | None = None,
                 port: int | None = None, database_url: str | None = None, args: list[str] | None = None):
        folder.mkdir(parents=True, exist_ok=True)
        self.args = list(args or ())  # more `toposcout serve` options, e.g. ["--workers", "2"]
        self.folder = folder
        self.port = port or _free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.database_url = database_url or f"sqlite:///{folder / 'toposcout.db'}"
        self.env = {k: v for k, v in os.environ.items() if not k.startswith("TOPOSCOUT_")}
        self.env.update(TOPOSCOUT_DATA_DIR=str(folder), TOPOSCOUT_DATABASE_URL=self.database_url,
                        TOPOSCOUT_WORKERS=str(workers), PYTHONUNBUFFERED="1")
        if tokens:
            self.env["TOPOSCOUT_TOKENS"] = tokens
        self.env.update(env or {})
        self.log_path = folder / f"server-{self.port}.log"
        self.proc: subprocess.Popen | None = None

    def start(self, timeout: float = 90.0) -> "Server":
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen([sys.executable, "-m", "toposcout.service.cli", "serve", "--port",
                                          str(self.port), *self.args], cwd=self.folder, env=self.env, stdout=log,
                                         stderr=subprocess.STDOUT, start_new_session=True)
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.proc.poll() is not None:
                raise RuntimeError(f"the test server exited with {self.proc.returncode}:\n{self.log()}")
            try:
                if httpx.get(self.url + "/healthz", timeout=2).status_code == 200:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        self.kill()
        raise RuntimeError(f"the test server did not answer within {timeout} s:\n{self.log()}")

    def restarted(self, timeout: float = 90.0) -> "Server":
        """A new server on the same folder, port, store and settings (after a stop or a kill)."""
        again = Server.__new__(Server)
        again.__dict__.update(self.__dict__, proc=None, log_path=self.folder / f"server-{self.port}-again.log")
        return again.start(timeout)

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def kill(self) -> None:
        """SIGKILL the server and every process of its group (its workers): no shutdown at all."""
        if self.proc is not None and self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait(10)

    def stop(self) -> None:
        """Ctrl-C as a user would; SIGKILL what is left of the group after 20 s."""
        if self.proc is None:
            return
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
            with contextlib.suppress(subprocess.TimeoutExpired):
                self.proc.wait(20)
        with contextlib.suppress(ProcessLookupError, PermissionError):
            os.killpg(self.proc.pid, signal.SIGKILL)  # a stuck shutdown, or workers left behind
        with contextlib.suppress(subprocess.TimeoutExpired):
            self.proc.wait(10)

    def __enter__(self) -> "Server":
        return self if self.proc is not None else self.start()

    def __exit__(self, *exc) -> None:
        self.stop()


@pytest.fixture(scope="session")
def start_server() -> Iterator[Callable[..., Server]]:
    """``start_server(folder, tokens=..., workers=2, env=..., port=..., database_url=..., args=...)``: a running
    :class:`Server`; stop it yourself (``with start_server(...) as srv``) or it stops at the end."""
    started: list[Server] = []

    def start(folder: Path, **kwargs: Any) -> Server:
        srv = Server(folder, **kwargs).start()
        started.append(srv)
        return srv

    yield start
    for srv in started:
        srv.stop()


class DaskProcesses:
    """A Dask scheduler and ``toposcout worker`` processes, each a child process of its own, on a fixed
    loopback address: a test can SIGKILL the scheduler and start a new one on the same address."""

    def __init__(self, folder: Path, port: int | None = None):
        folder.mkdir(parents=True, exist_ok=True)
        self.folder, self.port = folder, port or _free_port()
        self.address = f"tcp://127.0.0.1:{self.port}"
        self.env = {k: v for k, v in os.environ.items() if not k.startswith("TOPOSCOUT_")}
        self.scheduler: subprocess.Popen | None = None
        self.workers: list[subprocess.Popen] = []
        self._starts = 0

    def _log(self, what: str):
        self._starts += 1
        return open(self.folder / f"{what}-{self._starts}.log", "ab")

    def start_scheduler(self, timeout: float = 60.0) -> "DaskProcesses":
        with self._log("scheduler") as log:
            self.scheduler = subprocess.Popen(
                [sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port",
                 str(self.port), "--no-dashboard"], env=self.env, stdout=log, stderr=subprocess.STDOUT,
                start_new_session=True)
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if self.scheduler.poll() is not None:
                raise RuntimeError(f"the Dask scheduler exited with {self.scheduler.returncode}:\n{self.logs()}")
            with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", self.port), timeout=1):
                return self
            time.sleep(0.1)
        raise RuntimeError(f"the Dask scheduler did not listen within {timeout} s:\n{self.logs()}")

    def kill_scheduler(self) -> None:
        """SIGKILL: the scheduler dies with every task it held, no shutdown at all."""
        if self.scheduler is not None and self.scheduler.poll() is None:
            self.scheduler.kill()
            self.scheduler.wait(10)

    def start_workers(self, n: int = 2) -> "DaskProcesses":
        """``toposcout worker ADDRESS --nworkers n`` (one thread each, 2 GiB each), as a user starts them."""
        with self._log("workers") as log:
            self.workers.append(subprocess.Popen(
                [sys.executable, "-m", "toposcout.service.cli", "worker", self.address, "--nworkers", str(n),
                 "--memory-limit", "2GiB", "--threads", "1"], env=self.env, stdout=log, stderr=subprocess.STDOUT,
                start_new_session=True))
        return self

    def logs(self) -> str:
        return "\n".join(f"--- {p.name}\n{p.read_text(errors='replace')[-3000:]}" for p in sorted(self.folder.glob("*.log")))

    def stop(self) -> None:
        for proc in self.workers:
            if proc.poll() is None:
                with contextlib.suppress(ProcessLookupError):
                    os.killpg(proc.pid, signal.SIGTERM)
                try:
                    proc.wait(20)
                except subprocess.TimeoutExpired:
                    with contextlib.suppress(ProcessLookupError):
                        os.killpg(proc.pid, signal.SIGKILL)
                    proc.wait(10)
        self.kill_scheduler()


@pytest.fixture
def dask_processes(tmp_path) -> Iterator[DaskProcesses]:
    """A :class:`DaskProcesses` (nothing started yet); everything it started is stopped afterwards."""
    procs = DaskProcesses(tmp_path / "dask")
    try:
        yield procs
    finally:
        procs.stop()
