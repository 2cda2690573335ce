"""Parsing a request and preparing its tasks in processes of their own, each call with a wall-clock
and a memory bound, so that no request is ever parsed unbounded in the API's event loop.

Why a process and not a thread of the API: decoding the JSON, the schema check, reading the model
(jsonschema, networkx) and building the tasks are Python code that holds the GIL. In a thread of the
API process that code takes turns with the event loop for the GIL, and every wake-up of the loop
waits for its turn (measured with the hostile suite's worst cases in flight, three at once:
``/healthz`` p99 71 ms, max 65-105 ms, while asyncio's slow-callback log, set to 15 ms, stayed
empty: no callback of the loop itself was slow). In a child process it only competes for a core
(``benchmarks/bench_hostile.py --worst-clients 3``: max 33-76 ms at load average 5-6, median 3-4.5
ms, against 40-336 ms and 7-10 ms in threads). And a process can be stopped: a thread cannot.

* :class:`PreparePool`: ``settings.prepare_processes`` spawned children (started on first use,
  shared by every app of the process, dying with it: :mod:`toposcout.service.execution.lifeline`).
  One call holds one child; a request waits for a free child at most ``prepare_seconds``
  (then 429 with ``Retry-After``).
* **Time**: a call that has not answered after ``settings.prepare_seconds`` gets its child
  killed (a new one is started for the next call) and the request a 422 naming the cap.
* **Memory**: each child caps its own data segment (``RLIMIT_DATA``, Linux counts private
  writable mappings, i.e. the heap and numpy's buffers; setrlimit(2)) at what it uses after
  start-up plus ``settings.prepare_memory_bytes``; a call that needs more gets a MemoryError
  there (or the child dies) and the request a 422 naming that cap.
* **CPU**: the children run at niceness :data:`PREPARE_NICENESS`, below the API process.
* Errors come back as they were raised (the same ToposcoutError class, message and field), so
  the answer is the one an in-process preparation gives.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import queue
import threading
import time
from typing import Any

from toposcout.compiler import errors as E
from toposcout.service.api.bodies import parse_json, validate_request
from toposcout.service.api.errors import error
from toposcout.service.api.planning import Prepared, prepare
from toposcout.service.execution.lifeline import die_with_parent

__all__ = ["PreparePool", "PrepareBusy", "prepare_request", "pool", "busy"]

log = logging.getLogger("toposcout.api")


#: the preparation processes' niceness (setpriority(2)): on a busy machine the kernel runs the API
#: process, which only waits for them, before them
PREPARE_NICENESS = 10


class PrepareBusy(Exception):
    """Every preparation process stayed busy for ``prepare_seconds`` (the API answers 429)."""


def busy(settings: Any):
    """The 429 answer when every preparation process stayed busy (see :class:`PrepareBusy`)."""
    return error(429, f"the server's {settings.prepare_processes} preparation processes stayed busy for "
                      f"prepare_seconds={settings.prepare_seconds:g}; retry in a moment", None, {"Retry-After": "2"})


def _data_bytes() -> int | None:
    """This process's data segment in bytes (``/proc/self/statm`` field 6: data + stack, proc(5)); None off Linux."""
    try:
        with open("/proc/self/statm") as f:
            return int(f.read().split()[5]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        return None


def _cap_memory(extra: int | None) -> None:
    """RLIMIT_DATA at the current data segment plus ``extra`` bytes (no cap off Linux or without extra)."""
    import resource  # noqa: PLC0415 - POSIX only; the child sets its own limit once

    now = _data_bytes()
    if not extra or now is None:
        return
    soft = now + int(extra)
    _, hard = resource.getrlimit(resource.RLIMIT_DATA)
    if hard != resource.RLIM_INFINITY:
        soft = min(soft, hard)
    resource.setrlimit(resource.RLIMIT_DATA, (soft, hard))


def _run(kind: str, payload: Any, filename: str | None, settings: Any, options: dict) -> Prepared:
    """What a child does for one call: decode (``kind`` "json": raw bytes), validate, prepare."""
    data = parse_json(payload, max_containers=settings.max_json_containers) if kind == "json" else payload
    return prepare(validate_request(data), settings, filename=filename, **options)


def _child_main(conn, parent_pid: int, memory_bytes: int | None, settings: Any) -> None:  # pragma: no cover
    die_with_parent(parent_pid, kernel=False)  # started from a request thread: the poll, not PR_SET_PDEATHSIG
    try:  # the event loop's process goes first when a preparation and a request want the same core
        os.nice(PREPARE_NICENESS)
    except OSError:
        pass
    _warm(settings)
    _cap_memory(memory_bytes)
    conn.send(("ready", None))
    while True:
        try:
            call = conn.recv()
        except (EOFError, OSError):
            return
        if call is None:
            return
        try:
            answer = ("ok", _run(*call))
        except E.ToposcoutError as exc:
            answer = ("error", (type(exc).__name__, str(exc), exc.field))
        except MemoryError:
            answer = ("memory", None)
        except Exception as exc:  # a bug: the API answers 500 as it would in process
            answer = ("bug", f"{type(exc).__name__}: {exc}")
        try:
            conn.send(answer)
        except MemoryError:
            conn.send(("memory", None))
        except (BrokenPipeError, OSError):
            return


#: prepared once by a new process, so that what a first preparation imports lazily (the schema
#: validator, networkx, the simulator's memory estimate) is loaded before the memory cap is measured
#: and is not counted against the first request's time
_WARM_UP = (b'{"model": {"variables": ["a", "b"], "cliques": [["a", "b"]]}, "connectivities": ["line"]}',
            b'{"model": {"directed": false, "multigraph": false, "graph": {}, "nodes": [{"id": 0}, {"id": 1}], '
            b'"links": [{"source": 0, "target": 1}]}, "compile_only": true}')


def _warm(settings: Any) -> None:
    for body in _WARM_UP:
        try:
            _run("json", body, None, settings, {})
        except E.ToposcoutError:  # a server whose caps refuse even these: the imports are done all the same
            pass


class _Child:
    """One spawned preparation process, killable at any time."""

    def __init__(self) -> None:
        self.proc = None
        self.conn = None
        self.memory_bytes: int | None = None
        self.lock = threading.Lock()  # a start-up by warm() and a call's ensure() do not race

    def ensure(self, settings: Any) -> None:
        memory_bytes = settings.prepare_memory_bytes
        with self.lock:
            if self.proc is not None and self.proc.is_alive() and self.memory_bytes == memory_bytes:
                return
            self._start(settings)

    def _start(self, settings: Any) -> None:
        self.kill()
        memory_bytes = settings.prepare_memory_bytes
        ctx = multiprocessing.get_context("spawn")
        parent, child = ctx.Pipe()
        self.proc = ctx.Process(target=_child_main, args=(child, os.getpid(), memory_bytes, settings), daemon=True,
                                name="toposcout-prepare")
        self.proc.start()
        child.close()
        self.conn, self.memory_bytes = parent, memory_bytes
        if not self.conn.poll(120):
            self.kill()
            raise RuntimeError("the preparation process did not start within 120 s")
        try:
            self.conn.recv()
        except (EOFError, OSError):
            self.kill()
            raise RuntimeError("the preparation process exited while starting") from None

    def kill(self) -> None:
        if self.proc is not None:
            if self.proc.is_alive():
                self.proc.kill()
            self.proc.join(5)
        if self.conn is not None:
            try:
                self.conn.close()
            except OSError:
                pass
        self.proc = self.conn = None


def _seconds_error(settings: Any) -> E.CapacityError:
    s = settings.prepare_seconds
    return E.CapacityError(
        f"body: preparing this request (reading the model, checking it and building its tasks) took longer than "
        f"this server's cap of prepare_seconds={s:g} and was stopped; send a smaller model (fewer variables, "
        "cliques, factors or links), fewer connectivities or noise scales, or ask the operator for a larger "
        "TOPOSCOUT_PREPARE_SECONDS", field="body")


def _memory_error(settings: Any) -> E.CapacityError:
    m = settings.prepare_memory_bytes
    return E.CapacityError(
        f"body: preparing this request needed more memory than this server's cap of prepare_memory_bytes={m} "
        f"({m / 2**20:.0f} MiB) and was stopped; send a smaller model, fewer connectivities or noise scales, or "
        "ask the operator for a larger TOPOSCOUT_PREPARE_MEMORY_BYTES", field="body")


class PreparePool:
    """``size`` preparation processes; :meth:`run` blocks (call it from a thread, not the event loop)."""

    def __init__(self, size: int):
        self.size = size
        self._free: queue.LifoQueue[_Child] = queue.LifoQueue()
        for _ in range(size):
            self._free.put(_Child())
        self._children = list(self._free.queue)
        self.stats = {"calls": 0, "timeouts": 0, "memory": 0}

    def warm(self, settings: Any, timeout: float = 120.0) -> None:
        """Start the processes (side by side) and wait for them, so the first requests find them ready;
        a process that fails to start is started again by the first call that needs it."""
        def start(child: _Child) -> None:
            try:
                child.ensure(settings)
            except Exception as exc:  # the first call tries again and reports it
                log.warning("starting a preparation process: %s", exc)

        threads = [threading.Thread(target=start, args=(c,), daemon=True, name="toposcout-prepare-start")
                   for c in self._children]
        for t in threads:
            t.start()
        end = time.monotonic() + timeout
        for t in threads:
            t.join(max(0.0, end - time.monotonic()))

    def run(self, kind: str, payload: Any, filename: str | None, settings: Any, **options: Any) -> Prepared:
        try:
            child = self._free.get(timeout=settings.prepare_seconds)
        except queue.Empty:
            raise PrepareBusy() from None
        try:
            child.ensure(settings)  # a start-up is not counted against the call's time
            return self._call(child, (kind, payload, filename, settings, options), settings)
        finally:
            self._free.put(child)

    def _call(self, child: _Child, call: tuple, settings: Any) -> Prepared:
        self.stats["calls"] += 1
        child.conn.send(call)
        deadline = time.monotonic() + settings.prepare_seconds
        while not child.conn.poll(min(0.05, max(0.0, deadline - time.monotonic()))):
            if not child.proc.is_alive():  # killed by the kernel (out of memory) or crashed in C code
                child.kill()
                self.stats["memory"] += 1
                raise _memory_error(settings)
            if time.monotonic() >= deadline:
                child.kill()
                self.stats["timeouts"] += 1
                log.warning("a request's preparation ran past prepare_seconds=%g: its process was stopped",
                            settings.prepare_seconds)
                raise _seconds_error(settings)
        try:
            status, value = child.conn.recv()
        except (EOFError, OSError):
            child.kill()
            self.stats["memory"] += 1
            raise _memory_error(settings) from None
        if status == "ok":
            return value
        if status == "error":
            name, message, field = value
            cls = getattr(E, name, E.ToposcoutError)
            raise (cls if isinstance(cls, type) and issubclass(cls, E.ToposcoutError) else E.ToposcoutError)(
                message, field=field)
        if status == "memory":
            child.kill()  # its heap may be fragmented at the cap: start afresh
            self.stats["memory"] += 1
            raise _memory_error(settings)
        raise RuntimeError(f"preparing the request failed: {value}")


_pool: PreparePool | None = None
_pool_lock = threading.Lock()


def pool(settings: Any) -> PreparePool:
    """The process's pool (one for every app in it), made on first use with ``settings.prepare_processes``."""
    global _pool
    with _pool_lock:
        if _pool is None:
            _pool = PreparePool(settings.prepare_processes)
        return _pool


def prepare_request(kind: str, payload: Any, filename: str | None, settings: Any, **options: Any) -> Prepared:
    """The request's :class:`Prepared`, made in a preparation process within the server's bounds
    (``kind`` "json": ``payload`` is the raw body; "data": the request dict of a form)."""
    return pool(settings).run(kind, payload, filename, settings, **options)
