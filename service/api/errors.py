"""One error shape for every answer: ``{"detail": message, "field": name-or-null}``.

The message names the problem and how to fix it, ``field`` the request field it is about;
:func:`install_error_handlers` maps each exception branch to one status.
"""

from __future__ import annotations

import json
import logging

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException

from toposcout.compiler.errors import ToposcoutError
from toposcout.service.api import schemas as S
from toposcout.service.store import StudyConflict

__all__ = ["error", "ERROR_BODY", "validation_detail", "install_error_handlers", "ERRORS_READ", "ERRORS_STUDY", "ERRORS_SUBMIT"]

log = logging.getLogger("toposcout.api")

ERROR_BODY = _E = {"model": S.ErrorBody}
ERRORS_READ = {401: _E | {"description": "no or unknown bearer token"},
               403: _E | {"description": "not allowed (non-loopback client without tokens configured)"},
               422: _E | {"description": "a malformed parameter; detail and field name it"}}
ERRORS_STUDY = ERRORS_READ | {404: _E | {"description": "no such study"}}
ERRORS_SUBMIT = ERRORS_READ | {
    409: _E | {"description": "Idempotency-Key reused with a different request"},
    413: _E | {"description": "request body over the size limit"},
    415: _E | {"description": "Content-Type is neither application/json nor multipart/form-data"},
    429: _E | {"description": "too many unfinished studies for this token, or the service's queue is full; "
                              "see Retry-After",
               "headers": {"Retry-After": {"schema": {"type": "integer"}, "description": "seconds"}}},
}


def error(status: int, detail: str, field: str | None = None, headers: dict | None = None) -> JSONResponse:
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


def validation_detail(errors: list[dict], *, strip_source: bool) -> tuple[str, str]:
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



def install_error_handlers(app: FastAPI, max_body_bytes: int) -> None:
    """Every exception becomes the one error shape (a 500 says nothing stored was changed)."""

    @app.exception_handler(ToposcoutError)
    async def _toposcout_error(request: Request, exc: ToposcoutError):
        return error(422, str(exc), exc.field)

    @app.exception_handler(StudyConflict)
    async def _conflict(request: Request, exc: StudyConflict):
        return error(409, str(exc), "Idempotency-Key")

    @app.exception_handler(RequestValidationError)
    async def _request_validation(request: Request, exc: RequestValidationError):
        detail, field = validation_detail(list(exc.errors()), strip_source=True)
        return error(422, detail, field)

    @app.exception_handler(HTTPException)
    async def _http_error(request: Request, exc: HTTPException):
        if exc.status_code == 413:
            return error(413, f"body: the request body is over this server's limit of {max_body_bytes} "
                              "bytes (max_body_bytes)", "body")
        detail = exc.detail if isinstance(exc.detail, str) else json.dumps(exc.detail)
        return error(exc.status_code, detail, None, getattr(exc, "headers", None))

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception):
        log.exception("unexpected error on %s %s", request.method, request.url.path)
        return error(500, "internal server error; it was logged and nothing stored was changed", None)
