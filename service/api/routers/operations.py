"""Operations: liveness (``/healthz``), Prometheus metrics (``/metrics``), the OpenAPI document
and its interactive page (``/openapi.json``, ``/docs``)."""

from __future__ import annotations

from fastapi import APIRouter, FastAPI, Request
from fastapi.openapi.docs import get_swagger_ui_html
from fastapi.openapi.utils import get_openapi
from fastapi.responses import JSONResponse, PlainTextResponse

from toposcout.compiler.version import __version__
from toposcout.service.api import schemas as S
from toposcout.service.api.deps import Owner, StoreDep
from toposcout.service.api.errors import ERRORS_READ
from toposcout.service.store import Store

__all__ = ["router", "openapi_document", "metrics_text", "TASK_BUCKETS"]

router = APIRouter(tags=["operations"])

TASK_BUCKETS = (0.1, 0.5, 1.0, 5.0, 10.0, 30.0, 60.0, 300.0, 900.0)


def openapi_document(app: FastAPI) -> dict:
    """The OpenAPI document, with the study request schema (a multipart or JSON body) and bearer auth."""
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


@router.get("/openapi.json", include_in_schema=False)
def openapi_json(request: Request, owner: Owner):
    return JSONResponse(request.app.openapi())


@router.get("/docs", include_in_schema=False)
def docs(owner: Owner):
    # the assets come from the package (service/web/static), not a content network: /docs works offline
    return get_swagger_ui_html(openapi_url="/openapi.json", title="toposcout API",
                               swagger_js_url="/static/swagger-ui-bundle.js", swagger_css_url="/static/swagger-ui.css",
                               swagger_favicon_url="/static/favicon.svg")


@router.get("/healthz", response_model=S.Health, summary="Liveness (no token needed)")
async def healthz(request: Request):
    store: Store = request.app.state.store
    settings = request.app.state.settings
    return JSONResponse({"status": "ok", "version": __version__, "database": store.dialect,
                         "executor": "DaskExecutor" if settings.dask_address else "LocalExecutor"})


@router.get("/metrics", responses=ERRORS_READ | {200: {"content": {"text/plain": {"schema": {"type": "string"}}}}},
            summary="Prometheus text format: studies by status, task durations, queue length")
def metrics(request: Request, owner: Owner, store: StoreDep):
    return PlainTextResponse(metrics_text(store),
                             media_type="text/plain; version=0.0.4; charset=utf-8")


def metrics_text(store: Store) -> str:
    lines = ["# HELP toposcout_build_info The toposcout version serving.", "# TYPE toposcout_build_info gauge",
             f'toposcout_build_info{{version="{__version__}"}} 1',
             "# HELP toposcout_studies Studies in the store by status.", "# TYPE toposcout_studies gauge"]
    for status, n in store.counts_by_status().items():
        lines.append(f'toposcout_studies{{status="{status}"}} {n}')
    queue = store.queue_counts()
    lines += ["# HELP toposcout_queue_length Tasks queued or running (pending rows of all studies).",
              "# TYPE toposcout_queue_length gauge", f"toposcout_queue_length {queue['pending']}",
              "# HELP toposcout_tasks_leased Pending tasks a queue worker holds a live lease on (running).",
              "# TYPE toposcout_tasks_leased gauge", f"toposcout_tasks_leased {queue['leased']}"]
    counts, total, seconds = store.task_seconds_histogram(TASK_BUCKETS)
    lines += ["# HELP toposcout_task_duration_seconds Wall time of computed tasks (cache hits excluded).",
              "# TYPE toposcout_task_duration_seconds histogram"]
    for b, c in zip(TASK_BUCKETS, counts):
        lines.append(f'toposcout_task_duration_seconds_bucket{{le="{b:g}"}} {c}')
    lines += [f'toposcout_task_duration_seconds_bucket{{le="+Inf"}} {total}',
              f"toposcout_task_duration_seconds_sum {seconds:.6f}", f"toposcout_task_duration_seconds_count {total}"]
    return "\n".join(lines) + "\n"
