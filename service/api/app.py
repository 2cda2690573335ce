"""The app factory: it only wires things (settings, store, executor, routers, middleware).

``create_app(settings)`` builds the app (tests hand it their own :class:`Settings`);
``toposcout serve`` runs it under uvicorn (:mod:`toposcout.service.api.server`). Every error is
``{"detail": message, "field": name-or-null}`` (:mod:`toposcout.service.api.errors`).

====================================  ==========================================================
``POST /v1/studies``                  JSON body or multipart upload → 202, ``Location`` header
``GET /v1/studies/{id}``              status, progress, request, rows as they complete
``GET /v1/studies``                   paged summaries (``status``, ``owner``, ``limit``, ``offset``)
``DELETE /v1/studies/{id}``           cancel (owner only); the record stays, ``cancelled``
``GET /v1/studies/{id}/rows.json|csv``  the rows as a document / as CSV
``GET /v1/studies/{id}/circuits/{i}.qpy|qasm``  a row's compiled circuit (QPY / OpenQASM 3)
``POST /v1/compile``                  compile-only rows for a few targets, synchronously
``GET /v1/connectivities|profiles|schema/model``, ``/healthz``, ``/metrics`` (Prometheus text)
====================================  ==========================================================

Nothing here runs a task: a study is stored and its pending rows are the queue, which queue
worker processes take tasks from (:mod:`toposcout.service.execution.queue`; with
``run_workers`` the app starts one of its own, ``toposcout serve`` starts it once for all its API
processes); ``/v1/compile`` goes to one dedicated worker process. So the event loop answers
within milliseconds, several API processes can share one store, and a crash of the API
takes no running work with it.
"""

from __future__ import annotations

import asyncio
import collections
import gc
import importlib
import logging
import os
import threading
from contextlib import asynccontextmanager

from fastapi import FastAPI

from toposcout.compiler.version import __version__
from toposcout.service.api import preparing
from toposcout.service.api.errors import error, install_error_handlers
from toposcout.service.api.routers import catalogue, compile as compile_router, operations, studies
from toposcout.service.execution.lifeline import die_with_parent
from toposcout.service.execution.local import ProcessLane
from toposcout.service.execution.queue import spawn_queue_worker, stop_process
from toposcout.service.settings import Settings
from toposcout.service.store import Store
from toposcout.service.web import dashboard

__all__ = ["create_app", "app_from_environment", "SUPERVISOR_PID_VARIABLE"]

#: set by ``toposcout serve --workers N`` for its API processes: the pid they die with
SUPERVISOR_PID_VARIABLE = "TOPOSCOUT_API_SUPERVISOR_PID"

log = logging.getLogger("toposcout.api")


class _DeclaredSizeLimit:
    """Answer 413 (our error shape) when Content-Length already says the body is too large;
    bodies without a length are cut by FastAPI's own limit while they are read."""

    def __init__(self, app, limit: int):
        self.app = app
        self.limit = limit

    async def __call__(self, scope, receive, send):
        if scope["type"] == "http":
            for name, value in scope.get("headers", ()):
                if name == b"content-length":
                    try:
                        too_big = int(value) > self.limit
                    except ValueError:
                        too_big = False
                    if too_big:
                        resp = error(413, f"body: the request body is over this server's limit of {self.limit} "
                                           "bytes (max_body_bytes)", "body", {"Connection": "close"})
                        await resp(scope, receive, send)
                        return
                    break
        await self.app(scope, receive, send)


class _LRU:
    """A small thread-safe LRU of bytes."""

    def __init__(self, size: int):
        self.size = size
        self._d: "collections.OrderedDict[str, bytes]" = collections.OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: str) -> bytes | None:
        with self._lock:
            v = self._d.get(key)
            if v is not None:
                self._d.move_to_end(key)
            return v

    def put(self, key: str, value: bytes) -> None:
        with self._lock:
            self._d[key] = value
            self._d.move_to_end(key)
            while len(self._d) > self.size:
                self._d.popitem(last=False)


class _App(FastAPI):
    """FastAPI with :class:`_DeclaredSizeLimit` outermost (before FastAPI's own body limit,
    which answers a declared over-size body in plain text)."""

    def build_middleware_stack(self):
        return _DeclaredSizeLimit(super().build_middleware_stack(), self.max_body_size)


def _freeze_startup_heap() -> None:
    """Load what the request path imports lazily, then move every object alive now out of the
    collector's reach (``gc.freeze``): a full collection, which stops every thread and the event
    loop with it, then walks only what requests allocated, not the few hundred thousand objects of
    qiskit, SQLAlchemy and friends (measured: a full collection under load went from ~0.6-0.9 s to
    ~10 ms; /healthz stops stalling while large requests are parsed)."""

    import jsonschema  # model validation

    from toposcout.compiler.model import model_schema  # imported here to warm it before the first request

    importlib.import_module("networkx")  # node-link models, connectivities

    jsonschema.Draft202012Validator(model_schema())
    gc.collect()
    gc.freeze()


@asynccontextmanager
async def _lifespan(app: FastAPI):
    settings: Settings = app.state.settings
    url = settings.resolved_database_url()
    store = Store(url)  # migrates before the queue worker opens it
    worker = spawn_queue_worker(url, slots=settings.workers) if settings.run_workers else None
    lane = ProcessLane(time_limit=settings.compile_time_limit_seconds)
    lane.start()
    app.state.store, app.state.lane = store, lane
    # requests are read and prepared there, not in this process: ready before the first request
    await asyncio.to_thread(preparing.pool(settings).warm, settings)
    _freeze_startup_heap()
    try:
        yield
    finally:
        stop_process(worker)  # its unfinished tasks stay pending in the store for the next start
        lane.shutdown()
        store.close()


def create_app(settings: Settings | None = None) -> FastAPI:
    """The toposcout API for ``settings`` (default: from ``TOPOSCOUT_*`` environment variables)."""
    settings = settings or Settings()
    app = _App(title="toposcout", version=__version__, lifespan=_lifespan, max_body_size=settings.max_body_bytes,
               openapi_url=None, docs_url=None, redoc_url=None,
               description="Where does a graph-structured circuit fit, and what survives noise? Figures are a "
                           "simulation under a stated noise model, not a promise about a device.")
    app.state.settings = settings
    app.state.tokens = settings.token_table()
    app.state.finished_cache = _LRU(2048)  # serialised finished studies (they do not change any more)
    install_error_handlers(app, settings.max_body_bytes)
    app.openapi = lambda: operations.openapi_document(app)  # type: ignore[method-assign]
    for router in (studies.router, compile_router.router, catalogue.router, operations.router, dashboard.router):
        app.include_router(router)
    return app


def app_from_environment() -> FastAPI:
    """The app of one API process under ``toposcout serve --workers N`` (uvicorn's factory):
    settings from the environment, and the process dies with its supervisor."""
    parent = os.environ.get(SUPERVISOR_PID_VARIABLE)
    if parent:
        die_with_parent(int(parent))
    return create_app(Settings())
