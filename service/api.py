"""The REST API (v1): studies over HTTP, persisted, cached, guarded.

``create_app(settings)`` builds the app (tests hand it their own :class:`Settings`);
``toposcout serve`` runs it under uvicorn. Every error is ``{"detail": message, "field":
name-or-null}``: the message names the problem, ``field`` the request field it is about.

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

Nothing here runs a task: studies go to the executor (worker processes), ``/v1/compile`` to
one dedicated worker process, so the event loop answers within milliseconds.
"""

from __future__ import annotations

import importlib.util
import io
import json
import logging
from contextlib import asynccontextmanager
from typing import Annotated, Any

from fastapi import Depends, FastAPI, Header, Path, Query, Request
from fastapi.exceptions import RequestValidationError
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.openapi.utils import get_openapi
from fastapi.responses import HTMLResponse, JSONResponse, PlainTextResponse, Response
from pydantic import ValidationError
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException

from compiler.errors import ToposcoutError
from compiler.version import __version__
from service import schemas as S
from service.auth import request_owner
from service.settings import Settings
from service.store import Store, StudyConflict, TooManyActive, best_connectivity

__all__ = ["create_app", "best_connectivity"]

log = logging.getLogger("toposcout.api")

Owner = Annotated[str, Depends(request_owner)]
StudyId = Annotated[str, Path(min_length=1, max_length=64, description="the study id")]
TaskIndex = Annotated[int, Path(ge=0, le=1_000_000, description="row index in the study")]

_E = {"model": S.ErrorBody}
ERRORS_READ = {401: _E | {"description": "no or unknown bearer token"},
               403: _E | {"description": "not allowed (non-loopback client without tokens configured)"},
               422: _E | {"description": "a malformed parameter; detail and field name it"}}
ERRORS_STUDY = ERRORS_READ | {404: _E | {"description": "no such study"}}
ERRORS_SUBMIT = ERRORS_READ | {
    409: _E | {"description": "Idempotency-Key reused with a different request"},
    413: _E | {"description": "request body over the size limit"},
    415: _E | {"description": "Content-Type is neither application/json nor multipart/form-data"},
    429: _E | {"description": "too many unfinished studies for this token; see Retry-After",
               "headers": {"Retry-After": {"schema": {"type": "integer"}, "description": "seconds"}}},
}

_FORM_SCHEMA = {
    "type": "object",
    "required": ["file"],
    "properties": {
        "file": {"type": "string", "format": "binary", "description": "the model file (JSON, UAI or node-link)"},
        "connectivities": {"type": "array", "items": {"type": "string"}},
        "noise_scales": {"type": "array", "items": {"type": "string"}},
        **{k: {"type": "string"} for k in ("model_format", "gate_set", "strategy", "profile", "compile_only", "seeds",
                                           "family", "layers", "seed", "max_order", "fidelity_target")},
    },
}
_BODY = {"requestBody": {"required": True, "content": {
    "application/json": {"schema": {"$ref": "#/components/schemas/StudyRequest"}},
    "multipart/form-data": {"schema": _FORM_SCHEMA}}}}
_JSON_BODY = {"requestBody": {"required": True, "content": {
    "application/json": {"schema": {"$ref": "#/components/schemas/StudyRequest"}}}}}


# --------------------------------------------------------------------------- helpers
def _error(status: int, detail: str, field: str | None = None, headers: dict | None = None) -> JSONResponse:
    return JSONResponse({"detail": detail, "field": field}, status_code=status, headers=headers)


_TAGS = {"str", "int", "float", "bool", "list", "dict", "none", "ConnectivitySpec", "tuple"}


def _loc(loc: tuple) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        elif isinstance(part, str) and (part in _TAGS or "[" in part or part[:1].isupper()):
            continue
        else:
            out += f".{part}" if out else part
    return out or "body"


def _validation_detail(errors: list[dict], *, strip_source: bool) -> tuple[str, str]:
    # in a union (``"line"`` or an object) the branch of the wrong type reports "should be a
    # valid string"; the other branch's error says what is really wrong
    e = ([x for x in errors if not str(x.get("type", "")).endswith("_type")] or errors)[0]
    loc = tuple(e.get("loc", ()))
    if strip_source and loc and loc[0] in ("body", "query", "path", "header", "cookie"):
        loc = loc[1:]
    field = _loc(loc)
    msg = e.get("msg", "invalid value")
    value = e.get("input")
    if isinstance(value, (str, int, float, bool)) or value is None:
        got = repr(value)
        msg += f" (got {got[:60]}{'...' if len(got) > 60 else ''})"
    more = f"; and {len(errors) - 1} more problem(s)" if len(errors) > 1 else ""
    return f"{field}: {msg}{more}", field


def _reject_constant(token: str):
    raise ValueError(f"{token} is not a number in JSON; give a finite value")


def _parse_json(body: bytes) -> dict:
    try:
        text = body.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ToposcoutError(f"body: the request body is not UTF-8 text (byte {exc.start})", field="body") from None
    if not text.strip():
        raise ToposcoutError("body: the request body is empty; send a JSON object with at least 'model'", field="body")
    try:
        obj = json.loads(text, parse_constant=_reject_constant)
    except json.JSONDecodeError as exc:
        raise ToposcoutError(f"body: not valid JSON at line {exc.lineno} column {exc.colno} ({exc.msg})",
                             field="body") from None
    except RecursionError:
        raise ToposcoutError("body: the JSON is nested too deeply", field="body") from None
    except ValueError as exc:  # NaN/Infinity, or an integer with thousands of digits
        raise ToposcoutError(f"body: {exc}", field="body") from None
    if not isinstance(obj, dict):
        raise ToposcoutError(f"body: expected a JSON object, got {type(obj).__name__}", field="body")
    return obj


def _validate(data: dict) -> S.StudyRequest:
    try:
        return S.StudyRequest.model_validate(data)
    except ValidationError as exc:
        detail, field = _validation_detail(exc.errors(include_url=False), strip_source=False)
        raise ToposcoutError(detail, field=field) from None
    except RecursionError:
        raise ToposcoutError("body: the JSON is nested too deeply", field="body") from None


async def _read_request(request: Request, settings: Settings) -> tuple[dict, str | None]:
    from service.studies import form_to_request, safe_filename

    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if ctype == "application/json" or ctype.endswith("+json"):
        return _parse_json(await request.body()), None
    if ctype != "multipart/form-data":
        raise HTTPException(415, "Content-Type must be application/json or multipart/form-data")
    try:
        form = await request.form(max_files=1, max_fields=64, max_part_size=settings.max_body_bytes)
    except HTTPException as exc:
        if exc.status_code == 413:
            raise
        raise ToposcoutError(f"body: malformed multipart form ({exc.detail})", field="body") from None
    try:
        fields: dict[str, list[str]] = {}
        upload = None
        text_model = None
        for key, value in form.multi_items():
            if hasattr(value, "read"):
                if key != "file" or upload is not None:
                    raise ToposcoutError(f"{key[:40]}: only one file field, named 'file', is accepted", field=key[:40])
                upload = value
            elif key == "model":
                text_model = value
            else:
                fields.setdefault(key, []).append(value)
        if (upload is None) == (text_model is None):
            raise ToposcoutError("file: send the model as one file field named 'file' (or a 'model' text field)",
                                 field="file")
        filename = None
        if upload is not None:
            filename = safe_filename(upload.filename)
            raw = await upload.read()
            try:
                text_model = raw.decode("utf-8")
            except UnicodeDecodeError:
                raise ToposcoutError("file: the model file is not UTF-8 text", field="file") from None
        data = form_to_request(fields)
        data["model"] = text_model
        return data, filename
    finally:
        await form.close()


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
                        resp = _error(413, f"body: the request body is over this server's limit of {self.limit} "
                                           "bytes (max_body_bytes)", "body", {"Connection": "close"})
                        await resp(scope, receive, send)
                        return
                    break
        await self.app(scope, receive, send)


class _LRU:
    """A small thread-safe LRU of bytes."""

    def __init__(self, size: int):
        import collections
        import threading

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


# --------------------------------------------------------------------------- the app
def create_app(settings: Settings | None = None) -> FastAPI:
    """The toposcout API for ``settings`` (default: from ``TOPOSCOUT_*`` environment variables)."""
    settings = settings or Settings()
    tokens = settings.token_table()

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        from service.executor import ProcessLane, make_executor

        store = Store(settings.resolved_database_url())
        executor = make_executor(settings, store)
        executor.start()
        lane = ProcessLane(time_limit=settings.compile_time_limit_seconds)
        lane.start()
        app.state.store, app.state.executor, app.state.lane = store, executor, lane
        if settings.recover_on_start:
            for study_id, pending in store.unfinished():
                if pending:
                    log.info("resuming study %s: %d tasks", study_id, len(pending))
                    executor.submit(study_id, pending)
        try:
            yield
        finally:
            executor.shutdown()
            lane.shutdown()
            store.close()

    app = _App(title="toposcout", version=__version__, lifespan=lifespan, max_body_size=settings.max_body_bytes,
                  openapi_url=None, docs_url=None, redoc_url=None,
                  description="Where does a graph-structured circuit fit, and what survives noise? Figures are a "
                              "simulation under a stated noise model, not a promise about a device.")
    app.state.settings = settings
    app.state.tokens = tokens
    finished = _LRU(2048)  # serialised finished studies (they do not change any more)
    app.state.finished_cache = finished

    # --- errors: one shape everywhere
    @app.exception_handler(ToposcoutError)
    async def _toposcout_error(request: Request, exc: ToposcoutError):
        return _error(422, str(exc), exc.field)

    @app.exception_handler(StudyConflict)
    async def _conflict(request: Request, exc: StudyConflict):
        return _error(409, str(exc), "Idempotency-Key")

    @app.exception_handler(RequestValidationError)
    async def _request_validation(request: Request, exc: RequestValidationError):
        detail, field = _validation_detail(list(exc.errors()), strip_source=True)
        return _error(422, detail, field)

    @app.exception_handler(HTTPException)
    async def _http_error(request: Request, exc: HTTPException):
        if exc.status_code == 413:
            return _error(413, f"body: the request body is over this server's limit of {settings.max_body_bytes} "
                               "bytes (max_body_bytes)", "body")
        detail = exc.detail if isinstance(exc.detail, str) else json.dumps(exc.detail)
        return _error(exc.status_code, detail, None, getattr(exc, "headers", None))

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception):
        log.exception("unexpected error on %s %s", request.method, request.url.path)
        return _error(500, "internal server error; it was logged and nothing stored was changed", None)

    # --- documents
    def _openapi() -> dict:
        if app.openapi_schema:
            return app.openapi_schema
        doc = get_openapi(title=app.title, version=app.version, description=app.description, routes=app.routes)
        comps = doc.setdefault("components", {}).setdefault("schemas", {})
        extra = S.StudyRequest.model_json_schema(ref_template="#/components/schemas/{model}")
        for name, sch in extra.pop("$defs", {}).items():
            comps.setdefault(name, sch)
        comps["StudyRequest"] = extra
        doc["components"].setdefault("securitySchemes", {})["bearer"] = {"type": "http", "scheme": "bearer"}
        doc["security"] = [{"bearer": []}, {}]
        app.openapi_schema = doc
        return doc

    app.openapi = _openapi  # type: ignore[method-assign]

    @app.get("/openapi.json", include_in_schema=False)
    def openapi_json(owner: Owner):
        return JSONResponse(app.openapi())

    @app.get("/docs", include_in_schema=False)
    def docs(owner: Owner):
        return get_swagger_ui_html(openapi_url="/openapi.json", title="toposcout API")

    # --- studies
    @app.post("/v1/studies", status_code=202, response_model=S.StudyCreated, tags=["studies"],
              responses=ERRORS_SUBMIT | {202: {"headers": {"Location": {"schema": {"type": "string"}}}}},
              openapi_extra=_BODY, summary="Submit a study (JSON body or a model file upload)")
    async def submit_study(request: Request, owner: Owner,
                           idempotency_key: Annotated[str | None, Header(
                               alias="Idempotency-Key", min_length=1, max_length=200, pattern=r"^[\x21-\x7e]+$",
                               description="retry with the same key to get the same study back")] = None):
        data, filename = await _read_request(request, settings)
        return await run_in_threadpool(_submit, data, filename, owner, idempotency_key)

    def _submit(data: dict, filename: str | None, owner: str, idempotency_key: str | None) -> JSONResponse:
        from service.studies import prepare

        req = _validate(data)
        prep = prepare(req, settings, filename=filename)
        store: Store = app.state.store
        try:
            summary, created, pending = store.create_study(
                owner=owner, request=prep.request, model_name=prep.model.name, tasks=prep.tasks, keys=prep.keys,
                idempotency_key=idempotency_key, max_active=settings.max_active_studies_per_owner)
        except TooManyActive as exc:
            return _error(429, f"owner {owner} already has {exc.active} studies queued or running (cap "
                               f"max_active_studies_per_owner={settings.max_active_studies_per_owner}); wait for one "
                               "to finish or cancel one, then retry", None, {"Retry-After": "5"})
        if pending:
            app.state.executor.submit(summary["id"], pending)
        url = f"/v1/studies/{summary['id']}"
        body = {"id": summary["id"], "url": url, "status": summary["status"], "progress": summary["progress"]}
        return JSONResponse(body, status_code=202, headers={"Location": url})

    @app.get("/v1/studies/{study_id}", response_model=S.Study, responses=ERRORS_STUDY, tags=["studies"],
             summary="A study: status, progress, request and rows")
    async def get_study(study_id: StudyId, owner: Owner):
        cached = finished.get(study_id)
        if cached is not None:
            return Response(cached, media_type="application/json")
        study = await run_in_threadpool(app.state.store.get_study, study_id)
        if study is None:
            return _error(404, f"no study with id {study_id[:64]!r}", "study_id")
        study["best_connectivity"] = best_connectivity(study["rows"])
        body = json.dumps(study, separators=(",", ":")).encode()
        if study["status"] in ("done", "failed", "cancelled"):
            finished.put(study_id, body)  # a finished study no longer changes
        return Response(body, media_type="application/json")

    @app.get("/v1/studies", response_model=S.StudyList, responses=ERRORS_READ, tags=["studies"],
             summary="Studies, newest first")
    def list_studies(owner: Owner, status: Annotated[S.StudyStatus | None, Query()] = None,
                     owner_filter: Annotated[str | None, Query(alias="owner", min_length=1, max_length=64)] = None,
                     limit: Annotated[int, Query(ge=1, le=100)] = 20,
                     offset: Annotated[int, Query(ge=0, le=10**9)] = 0):
        items, total = app.state.store.list_studies(status=status, owner=owner_filter, limit=limit, offset=offset)
        return JSONResponse({"items": items, "total": total, "limit": limit, "offset": offset})

    @app.delete("/v1/studies/{study_id}", response_model=S.StudySummary, tags=["studies"],
                responses=ERRORS_STUDY | {403: _E | {"description": "only the owner may cancel a study"},
                                          409: _E | {"description": "the study already finished"}},
                summary="Cancel a study (the record stays, marked cancelled)")
    def cancel_study(study_id: StudyId, owner: Owner):
        store: Store = app.state.store
        study_owner = store.study_owner(study_id)
        if study_owner is None:
            return _error(404, f"no study with id {study_id[:64]!r}", "study_id")
        if study_owner != owner:
            return _error(403, f"study {study_id} belongs to {study_owner}; only its owner may cancel it",
                          "study_id")
        summary = store.cancel(study_id)
        if summary["status"] in ("done", "failed"):
            return _error(409, f"study {study_id} already finished ({summary['status']}); nothing to cancel",
                          "study_id")
        app.state.executor.cancel(study_id)
        return JSONResponse(summary)

    def _study_or_404(study_id: str) -> dict | JSONResponse:
        study = app.state.store.get_study(study_id)
        if study is None:
            return _error(404, f"no study with id {study_id[:64]!r}", "study_id")
        return study

    @app.get("/v1/studies/{study_id}/rows.json", response_model=S.RowsDocument, responses=ERRORS_STUDY,
             tags=["studies"], summary="The rows of a study as a JSON document")
    def rows_json(study_id: StudyId, owner: Owner):
        study = _study_or_404(study_id)
        if isinstance(study, JSONResponse):
            return study
        return JSONResponse({"id": study["id"], "model_name": study["model_name"], "status": study["status"],
                             "rows": study["rows"]})

    @app.get("/v1/studies/{study_id}/rows.csv", tags=["studies"],
             responses=ERRORS_STUDY | {200: {"content": {"text/csv": {"schema": {"type": "string"}}}}},
             summary="The rows of a study as CSV")
    def rows_csv(study_id: StudyId, owner: Owner):
        from service.cli import write_csv

        study = _study_or_404(study_id)
        if isinstance(study, JSONResponse):
            return study
        buf = io.StringIO()
        write_csv(study["rows"], buf)
        return Response(buf.getvalue(), media_type="text/csv",
                        headers={"Content-Disposition": f'attachment; filename="{study["id"]}.csv"'})

    def _circuit(study_id: str, task_index: int) -> bytes | JSONResponse:
        data = app.state.store.circuit(study_id, task_index)
        if data is None:
            return _error(404, f"study {study_id[:64]!r} has no finished row {task_index} with a circuit",
                          "task_index")
        return data

    @app.get("/v1/studies/{study_id}/circuits/{task_index}.qpy", tags=["circuits"],
             responses=ERRORS_STUDY | {200: {"content": {"application/octet-stream": {
                 "schema": {"type": "string", "format": "binary"}}}}},
             summary="A row's compiled circuit as QPY")
    def circuit_qpy(study_id: StudyId, task_index: TaskIndex, owner: Owner):
        data = _circuit(study_id, task_index)
        if isinstance(data, JSONResponse):
            return data
        return Response(data, media_type="application/octet-stream",
                        headers={"Content-Disposition": f'attachment; filename="{study_id}-{task_index}.qpy"'})

    @app.get("/v1/studies/{study_id}/circuits/{task_index}.qasm", tags=["circuits"], responses=ERRORS_STUDY | {200: {"content": {"text/plain": {
                 "schema": {"type": "string"}}}}},
             summary="A row's compiled circuit as OpenQASM 3")
    def circuit_qasm(study_id: StudyId, task_index: TaskIndex, owner: Owner):
        from qiskit import qasm3

        from compiler.compile import load_qpy

        data = _circuit(study_id, task_index)
        if isinstance(data, JSONResponse):
            return data
        return PlainTextResponse(qasm3.dumps(load_qpy(data)))

    # --- synchronous compile
    @app.post("/v1/compile", response_model=S.CompileResponse, tags=["compile"], openapi_extra=_JSON_BODY,
              responses=ERRORS_SUBMIT, summary="Compile-only rows for a few targets, answered at once")
    async def compile_now(request: Request, owner: Owner):
        ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
        if ctype != "application/json":
            raise HTTPException(415, "Content-Type must be application/json")
        data = _parse_json(await request.body())
        return await run_in_threadpool(_compile, data)

    def _compile(data: dict) -> JSONResponse:
        from service.executor import TaskTimeout
        from service.studies import prepare

        req = _validate(data)
        prep = prepare(req, settings, compile_only=True, max_targets=settings.max_compile_targets,
                       keep_circuit=False)
        store: Store = app.state.store
        rows: list[dict | None] = [store.cached_row(k) for k in prep.keys]
        cached = [r is not None for r in rows]
        todo = [i for i, r in enumerate(rows) if r is None]
        if todo:
            try:
                fresh = app.state.lane.run([prep.tasks[i] for i in todo], wait=10.0)
            except TaskTimeout:
                return _error(422, f"body: compiling took longer than this endpoint's limit of "
                                   f"{settings.compile_time_limit_seconds:g} s (or the compile worker stayed busy); "
                                   "submit it as a study (POST /v1/studies) instead", "body")
            for i, row in zip(todo, fresh):
                rows[i] = row
                store.put_result(prep.keys[i], row)
        out = [{**r, "task_index": i, "status": "failed" if r.get("error") else "done", "cached": c}
               for i, (r, c) in enumerate(zip(rows, cached))]
        return JSONResponse({"rows": out})

    # --- catalogues
    @app.get("/v1/connectivities", response_model=S.ConnectivityList, responses=ERRORS_READ, tags=["catalogue"],
             summary="Connectivity families and gate sets")
    def connectivities(owner: Owner):
        from compiler.targets import connectivity_catalogue, gate_set_catalogue

        conns = [{"name": k, "description": v["description"], "sizing": v["sizing"], "size": v["size"]}
                 for k, v in connectivity_catalogue().items()]
        gates = [{"name": k, "description": v["description"]} for k, v in gate_set_catalogue().items()]
        return JSONResponse({"connectivities": conns, "gate_sets": gates})

    @app.get("/v1/profiles", response_model=S.ProfileList, responses=ERRORS_READ, tags=["catalogue"],
             summary="Built-in device profiles (invented classes, typical values from memory)")
    def profiles(owner: Owner):
        from compiler.profiles import DEFAULT_PROFILE, profile_catalogue

        items = [{"name": k, "description": v} for k, v in profile_catalogue().items()]
        return JSONResponse({"default": DEFAULT_PROFILE, "profiles": items})

    @app.get("/v1/schema/model", responses=ERRORS_READ, tags=["catalogue"],
             response_model=dict[str, Any], summary="The JSON Schema of the model format")
    def schema_model(owner: Owner):
        from compiler.model import model_schema

        return JSONResponse(model_schema())

    # --- operations
    @app.get("/healthz", response_model=S.Health, tags=["operations"], summary="Liveness (no token needed)")
    def healthz():
        store: Store = app.state.store
        return JSONResponse({"status": "ok", "version": __version__, "database": store.dialect,
                             "executor": type(app.state.executor).__name__})

    @app.get("/metrics", tags=["operations"],
             responses=ERRORS_READ | {200: {"content": {"text/plain": {"schema": {"type": "string"}}}}},
             summary="Prometheus text format: studies by status, task durations, queue length")
    def metrics(owner: Owner):
        return PlainTextResponse(_metrics_text(app), media_type="text/plain; version=0.0.4; charset=utf-8")

    if importlib.util.find_spec("service.dashboard") is not None:
        from service import dashboard

        app.include_router(dashboard.router)
    return app


TASK_BUCKETS = (0.1, 0.5, 1.0, 5.0, 10.0, 30.0, 60.0, 300.0, 900.0)


def _metrics_text(app: FastAPI) -> str:
    store: Store = app.state.store
    ex = app.state.executor
    lines = ["# HELP toposcout_build_info The toposcout version serving.", "# TYPE toposcout_build_info gauge",
             f'toposcout_build_info{{version="{__version__}"}} 1',
             "# HELP toposcout_studies Studies in the store by status.", "# TYPE toposcout_studies gauge"]
    for status, n in store.counts_by_status().items():
        lines.append(f'toposcout_studies{{status="{status}"}} {n}')
    lines += ["# HELP toposcout_queue_length Tasks queued or running in the executor.",
              "# TYPE toposcout_queue_length gauge", f"toposcout_queue_length {ex.pending()}"]
    counts, total, seconds = store.task_seconds_histogram(TASK_BUCKETS)
    lines += ["# HELP toposcout_task_duration_seconds Wall time of computed tasks (cache hits excluded).",
              "# TYPE toposcout_task_duration_seconds histogram"]
    for b, c in zip(TASK_BUCKETS, counts):
        lines.append(f'toposcout_task_duration_seconds_bucket{{le="{b:g}"}} {c}')
    lines += [f'toposcout_task_duration_seconds_bucket{{le="+Inf"}} {total}',
              f"toposcout_task_duration_seconds_sum {seconds:.6f}", f"toposcout_task_duration_seconds_count {total}"]
    stats = getattr(ex, "stats", None)
    if stats is not None:
        lines += ["# HELP toposcout_executor_events_total Executor events since start-up (computed, cached, "
                  "shared, timeouts, worker_deaths, stopped).", "# TYPE toposcout_executor_events_total counter"]
        for event in ("computed", "cached", "shared", "timeouts", "worker_deaths", "stopped"):
            lines.append(f'toposcout_executor_events_total{{event="{event}"}} {int(stats.get(event, 0))}')
    return "\n".join(lines) + "\n"


class _RedactTokens(logging.Filter):
    """Removes ``token=...`` query values from log records (uvicorn's access log)."""

    def filter(self, record: logging.LogRecord) -> bool:
        from service.auth import redact

        if isinstance(record.msg, str):
            record.msg = redact(record.msg)
        if isinstance(record.args, tuple):
            record.args = tuple(redact(a) if isinstance(a, str) else a for a in record.args)
        return True


def log_config() -> dict:
    """uvicorn's logging configuration with token redaction on every handler."""
    import copy

    from uvicorn.config import LOGGING_CONFIG

    cfg = copy.deepcopy(LOGGING_CONFIG)
    cfg.setdefault("filters", {})["redact"] = {"()": _RedactTokens}
    for handler in cfg.get("handlers", {}).values():
        handler.setdefault("filters", []).append("redact")
    cfg.setdefault("loggers", {})["toposcout"] = {"handlers": ["default"], "level": "INFO", "propagate": False}
    return cfg


def serve(*, host: str | None = None, port: int | None = None, allow_remote: bool | None = None, err=None) -> int:
    """Run the server under uvicorn (``toposcout serve``); returns the exit code.

    Without tokens the server refuses a non-loopback address unless ``allow_remote``.
    """
    import sys

    import uvicorn

    from service.auth import is_loopback

    err = err or sys.stderr
    overrides = {k: v for k, v in {"host": host, "port": port, "allow_remote": allow_remote}.items() if v is not None}
    settings = Settings(**overrides)
    if not settings.token_table() and not settings.allow_remote and not is_loopback(settings.host):
        err.write(f"toposcout: error [host]: no tokens are configured, so the server listens on loopback only, not "
                  f"{settings.host}; set TOPOSCOUT_TOKENS / TOPOSCOUT_TOKENS_FILE, or pass --allow-remote\n")
        return 2
    app = create_app(settings)
    config = uvicorn.Config(app, host=settings.host, port=settings.port, log_config=log_config(),
                            proxy_headers=False, timeout_keep_alive=30)
    uvicorn.Server(config).run()
    return 0
