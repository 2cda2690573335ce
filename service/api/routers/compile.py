"""``POST /v1/compile``: compile-only rows for a few targets, answered at once (the compile
lane's worker process does the work, never the API's threads)."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException

from toposcout.service.api import schemas as S
from toposcout.service.api.bodies import JSON_BODY
from toposcout.service.api.deps import Owner, SettingsDep, StoreDep
from toposcout.service.api.errors import ERRORS_SUBMIT, error
from toposcout.service.api.preparing import PrepareBusy, busy, prepare_request
from toposcout.service.execution.base import TaskTimeout

__all__ = ["router"]

router = APIRouter(prefix="/v1", tags=["compile"])


@router.post("/compile", response_model=S.CompileResponse, openapi_extra=JSON_BODY, responses=ERRORS_SUBMIT,
             summary="Compile-only rows for a few targets, answered at once")
async def compile_now(request: Request, owner: Owner, settings: SettingsDep, store: StoreDep):
    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if ctype != "application/json":
        raise HTTPException(415, "Content-Type must be application/json")
    body = await request.body()
    return await run_in_threadpool(_compile, body, settings, store, request.app.state.lane)


def _compile(body: bytes, settings, store, lane) -> JSONResponse:
    try:  # decoded and prepared in a preparation process, within its time and memory bounds
        prep = prepare_request("json", body, None, settings, compile_only=True,
                               max_targets=settings.max_compile_targets, keep_circuit=False)
    except PrepareBusy:
        return busy(settings)
    rows: list[dict | None] = [store.cached_row(k) for k in prep.keys]
    cached = [r is not None for r in rows]
    todo = [i for i, r in enumerate(rows) if r is None]
    if todo:
        try:
            fresh = lane.run([prep.tasks[i] for i in todo], wait=10.0)
        except TaskTimeout:
            return error(422, f"body: compiling took longer than this endpoint's limit of "
                              f"{settings.compile_time_limit_seconds:g} s (or the compile worker stayed busy); "
                              "submit it as a study (POST /v1/studies) instead", "body")
        for i, row in zip(todo, fresh):
            rows[i] = row
            store.put_result(prep.keys[i], row)
    out = [{**r, "task_index": i, "status": "failed" if r.get("error") else "done", "cached": c}
           for i, (r, c) in enumerate(zip(rows, cached))]
    return JSONResponse({"rows": out})
