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
    return JSONResponse({"status": "ok", "version": __version__, "database": store.dialect,
                         "executor": type(request.app.state.executor).__name__})


@router.get("/metrics", responses=ERRORS_READ | {200: {"content": {"text/plain": {"schema": {"type": "string"}}}}},
            summary="Prometheus text format: studies by status, task durations, queue length")
def metrics(request: Request, owner: Owner, store: StoreDep):
    return PlainTextResponse(metrics_text(store, request.app.state.executor),
                             media_type="text/plain; version=0.0.4; charset=utf-8")


def metrics_text(store: Store, ex) -> str:
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
