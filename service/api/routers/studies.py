"""``/v1/studies``: submit, read, list, cancel; rows as JSON or CSV; a row's compiled circuit."""

from __future__ import annotations

import asyncio
import collections
import io
import json
import threading
from typing import Annotated

from fastapi import APIRouter, Header, Query, Request
from fastapi.responses import JSONResponse, PlainTextResponse, Response
from qiskit import qasm3
from starlette.concurrency import run_in_threadpool

from toposcout.compiler.compile import load_qpy
from toposcout.service.api import schemas as S
from toposcout.service.api.bodies import FORM_BODY, read_request
from toposcout.service.api.deps import FinishedCache, Owner, SettingsDep, StoreDep, StudyId, TaskIndex
from toposcout.service.api.errors import ERROR_BODY, ERRORS_READ, ERRORS_STUDY, ERRORS_SUBMIT, error
from toposcout.service.api.planning import Prepared
from toposcout.service.api.preparing import PrepareBusy, busy, prepare_request
from toposcout.service.output import write_csv
from toposcout.service.store import FINISHED_STATES, QueueFull, Store, TooManyActive, best_connectivity

__all__ = ["router"]

router = APIRouter(prefix="/v1/studies", tags=["studies"])

IDEMPOTENCY_KEY = Header(alias="Idempotency-Key", min_length=1, max_length=200, pattern=r"^[\x21-\x7e]+$",
                         description="retry with the same key to get the same study back")


@router.post("", status_code=202, response_model=S.StudyCreated,
             responses=ERRORS_SUBMIT | {202: {"headers": {"Location": {"schema": {"type": "string"}}}}},
             openapi_extra=FORM_BODY, summary="Submit a study (JSON body or a model file upload)")
async def submit_study(request: Request, owner: Owner, settings: SettingsDep, store: StoreDep,
                       idempotency_key: Annotated[str | None, IDEMPOTENCY_KEY] = None):
    kind, payload, filename = await read_request(request, settings)
    if idempotency_key is None and _small(request):
        # a resubmission answered from the cache: built on the loop, only its insert waits (for the
        # store's group writer), so no thread of the pool is woken for it
        prep = _PREPARED.peek(kind, payload, filename, settings)
        future = None if prep is None else store.create_study_nowait(
            owner=owner, request=prep.request, model_name=prep.model.name, tasks=prep.tasks, keys=prep.keys,
            max_active=settings.max_active_studies_per_owner, max_queued=settings.max_queued_tasks)
        if future is not None:
            try:
                summary, _, _ = await asyncio.wrap_future(future)
            except (TooManyActive, QueueFull) as exc:
                return _refused(exc, owner, settings, prep)
            return _accepted(summary)
    return await run_in_threadpool(_submit, kind, payload, filename, owner, idempotency_key, settings, store)


#: bodies up to this size are looked up in the memo on the event loop (a key of a form's fields is
#: their canonical JSON, made there)
SMALL_BODY_BYTES = 16384


def _small(request: Request) -> bool:
    length = request.headers.get("content-length", "")
    return length.isdigit() and int(length) <= SMALL_BODY_BYTES


class _PreparedMemo:
    """The last few prepared requests of this process, by their body (the raw JSON bytes, or a form's
    request as canonical JSON): a resubmission (the common case of a cached study) skips the
    preparation process. Only small bodies (at most ``max_chars``) are kept; a request that failed
    is never kept."""

    def __init__(self, size: int = 256, max_chars: int = 65536):
        self.size, self.max_chars = size, max_chars
        self._d: collections.OrderedDict = collections.OrderedDict()
        self._lock = threading.Lock()

    def _key(self, kind: str, payload, filename: str | None, settings) -> tuple | None:
        if kind == "json":
            text = payload if len(payload) <= self.max_chars else None
        else:
            try:
                text = json.dumps(payload, sort_keys=True, separators=(",", ":"))
            except (TypeError, ValueError, RecursionError):
                text = None
        if text is None or len(text) > self.max_chars:
            return None
        return kind, text, filename, id(settings)

    def _hit(self, key: tuple | None) -> Prepared | None:
        if key is None:
            return None
        with self._lock:
            hit = self._d.get(key)
            if hit is not None:
                self._d.move_to_end(key)
            return hit

    def peek(self, kind: str, payload, filename: str | None, settings) -> Prepared | None:
        """The prepared request if this process prepared the same one before, else None (no work)."""
        return self._hit(self._key(kind, payload, filename, settings))

    def get(self, kind: str, payload, filename: str | None, settings) -> Prepared:
        key = self._key(kind, payload, filename, settings)
        hit = self._hit(key)
        if hit is not None:
            return hit
        prep = prepare_request(kind, payload, filename, settings)
        if key is not None:
            with self._lock:
                self._d[key] = prep
                while len(self._d) > self.size:
                    self._d.popitem(last=False)
        return prep


_PREPARED = _PreparedMemo()


def _submit(kind: str, payload, filename: str | None, owner: str, idempotency_key: str | None, settings,
            store: Store) -> JSONResponse:
    """Store the study: its pending rows are the queue the queue workers take tasks from."""
    try:
        prep = _PREPARED.get(kind, payload, filename, settings)
    except PrepareBusy:
        return busy(settings)
    try:
        summary, created, pending = store.create_study(
            owner=owner, request=prep.request, model_name=prep.model.name, tasks=prep.tasks, keys=prep.keys,
            idempotency_key=idempotency_key, max_active=settings.max_active_studies_per_owner,
            max_queued=settings.max_queued_tasks)
    except (TooManyActive, QueueFull) as exc:
        return _refused(exc, owner, settings, prep)
    return _accepted(summary)


def _refused(exc: TooManyActive | QueueFull, owner: str, settings, prep: Prepared) -> JSONResponse:
    if isinstance(exc, TooManyActive):
        return error(429, f"owner {owner} already has {exc.active} studies queued or running (cap "
                          f"max_active_studies_per_owner={settings.max_active_studies_per_owner}); wait for one "
                          "to finish or cancel one, then retry", None, {"Retry-After": "5"})
    return error(429, f"the service already has {exc.queued} tasks queued and this study's "
                      f"{len(prep.tasks)} would pass its cap (max_queued_tasks={settings.max_queued_tasks}); "
                      "retry later", None, {"Retry-After": "30"})


def _accepted(summary: dict) -> JSONResponse:
    url = f"/v1/studies/{summary['id']}"
    body = {"id": summary["id"], "url": url, "status": summary["status"], "progress": summary["progress"]}
    return JSONResponse(body, status_code=202, headers={"Location": url})


@router.get("/{study_id}", response_model=S.Study, responses=ERRORS_STUDY,
            summary="A study: status, progress, request and rows")
async def get_study(study_id: StudyId, owner: Owner, store: StoreDep, finished: FinishedCache):
    cached = finished.get(study_id)
    if cached is not None:
        return Response(cached, media_type="application/json")
    study = await run_in_threadpool(store.get_study, study_id)
    if study is None:
        return error(404, f"no study with id {study_id[:64]!r}", "study_id")
    study["best_connectivity"] = best_connectivity(study["rows"])
    body = json.dumps(study, separators=(",", ":")).encode()
    if study["status"] in FINISHED_STATES:
        finished.put(study_id, body)  # a finished study no longer changes
    return Response(body, media_type="application/json")


@router.get("", response_model=S.StudyList, responses=ERRORS_READ, summary="Studies, newest first")
def list_studies(owner: Owner, store: StoreDep, status: Annotated[S.StudyStatus | None, Query()] = None,
                 owner_filter: Annotated[str | None, Query(alias="owner", min_length=1, max_length=64)] = None,
                 limit: Annotated[int, Query(ge=1, le=100)] = 20,
                 offset: Annotated[int, Query(ge=0, le=10**9)] = 0,
                 model: Annotated[str | None, Query(min_length=1, max_length=200)] = None,
                 label: Annotated[str | None, Query(min_length=1, max_length=80)] = None):
    items, total = store.list_studies(status=status, owner=owner_filter, limit=limit, offset=offset, model=model,
                                      label=label)
    return JSONResponse({"items": items, "total": total, "limit": limit, "offset": offset})


@router.delete("/{study_id}", response_model=S.StudySummary,
               responses=ERRORS_STUDY | {403: ERROR_BODY | {"description": "only the owner may cancel a study"},
                                         409: ERROR_BODY | {"description": "the study already finished"}},
               summary="Cancel a study (the record stays, marked cancelled)")
def cancel_study(study_id: StudyId, owner: Owner, store: StoreDep):
    study_owner = store.study_owner(study_id)
    if study_owner is None:
        return error(404, f"no study with id {study_id[:64]!r}", "study_id")
    if study_owner != owner:
        return error(403, f"study {study_id} belongs to {study_owner}; only its owner may cancel it", "study_id")
    summary = store.cancel(study_id)
    if summary["status"] in ("done", "failed"):
        return error(409, f"study {study_id} already finished ({summary['status']}); nothing to cancel", "study_id")
    # the queue workers holding its tasks see the status and stop them
    return JSONResponse(summary)


def _study_or_404(store: Store, study_id: str) -> dict | JSONResponse:
    study = store.get_study(study_id)
    if study is None:
        return error(404, f"no study with id {study_id[:64]!r}", "study_id")
    return study


@router.get("/{study_id}/rows.json", response_model=S.RowsDocument, responses=ERRORS_STUDY,
            summary="The rows of a study as a JSON document")
def rows_json(study_id: StudyId, owner: Owner, store: StoreDep):
    study = _study_or_404(store, study_id)
    if isinstance(study, JSONResponse):
        return study
    return JSONResponse({"id": study["id"], "model_name": study["model_name"], "status": study["status"],
                         "rows": study["rows"]})


@router.get("/{study_id}/rows.csv",
            responses=ERRORS_STUDY | {200: {"content": {"text/csv": {"schema": {"type": "string"}}}}},
            summary="The rows of a study as CSV")
def rows_csv(study_id: StudyId, owner: Owner, store: StoreDep):
    study = _study_or_404(store, study_id)
    if isinstance(study, JSONResponse):
        return study
    buf = io.StringIO()
    write_csv(study["rows"], buf)
    return Response(buf.getvalue(), media_type="text/csv",
                    headers={"Content-Disposition": f'attachment; filename="{study["id"]}.csv"'})


def _circuit(store: Store, study_id: str, task_index: int) -> bytes | JSONResponse:
    data = store.circuit(study_id, task_index)
    if data is None:
        return error(404, f"study {study_id[:64]!r} has no finished row {task_index} with a circuit", "task_index")
    return data


@router.get("/{study_id}/circuits/{task_index}.qpy", tags=["circuits"],
            responses=ERRORS_STUDY | {200: {"content": {"application/octet-stream": {
                "schema": {"type": "string", "format": "binary"}}}}},
            summary="A row's compiled circuit as QPY")
def circuit_qpy(study_id: StudyId, task_index: TaskIndex, owner: Owner, store: StoreDep):
    data = _circuit(store, study_id, task_index)
    if isinstance(data, JSONResponse):
        return data
    return Response(data, media_type="application/octet-stream",
                    headers={"Content-Disposition": f'attachment; filename="{study_id}-{task_index}.qpy"'})


@router.get("/{study_id}/circuits/{task_index}.qasm", tags=["circuits"],
            responses=ERRORS_STUDY | {200: {"content": {"text/plain": {"schema": {"type": "string"}}}}},
            summary="A row's compiled circuit as OpenQASM 3")
def circuit_qasm(study_id: StudyId, task_index: TaskIndex, owner: Owner, store: StoreDep):
    data = _circuit(store, study_id, task_index)
    if isinstance(data, JSONResponse):
        return data
    return PlainTextResponse(qasm3.dumps(load_qpy(data)))
