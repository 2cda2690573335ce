"""Reading a request body: JSON (strict: no NaN, bounded nesting) or a multipart model upload,
validated against the request schema before any work starts (both run in a preparation
process, :mod:`toposcout.service.api.preparing`; the multipart form is split in the API)."""

from __future__ import annotations

import json
import threading
from typing import Any

from fastapi import Request
from pydantic import ValidationError
from starlette.exceptions import HTTPException

from toposcout.compiler.errors import ToposcoutError
from toposcout.service.api import schemas as S
from toposcout.service.api.errors import validation_detail
from toposcout.service.api.planning import form_to_request, safe_filename
from toposcout.service.settings import MAX_JSON_CONTAINERS, Settings

__all__ = ["parse_json", "validate_request", "read_request", "FORM_BODY", "JSON_BODY", "MAX_JSON_CONTAINERS"]

FORM_SCHEMA = {
    "type": "object",
    "required": ["file"],
    "properties": {
        "file": {"type": "string", "format": "binary", "description": "the model file (JSON, UAI or node-link)"},
        "connectivities": {"type": "array", "items": {"type": "string"}},
        "noise_scales": {"type": "array", "items": {"type": "string"}},
        **{k: {"type": "string"} for k in ("label", "model_format", "gate_set", "strategy", "profile", "compile_only", "seeds",
                                           "family", "layers", "seed", "max_order", "fidelity_target",
                                           "requirement_tolerance", "method", "time_budget_seconds", "trajectories", "precision")},
    },
}
FORM_BODY = {"requestBody": {"required": True, "content": {
    "application/json": {"schema": {"$ref": "#/components/schemas/StudyRequest"}},
    "multipart/form-data": {"schema": FORM_SCHEMA}}}}
JSON_BODY = {"requestBody": {"required": True, "content": {
    "application/json": {"schema": {"$ref": "#/components/schemas/StudyRequest"}}}}}


def _reject_constant(token: str):
    raise ValueError(f"{token} is not a number in JSON; give a finite value")


# MAX_JSON_CONTAINERS, the default of ``Settings.max_json_containers``: the most objects and arrays a
# JSON body may hold (counted on the raw bytes before decoding: each costs ~100 bytes once decoded, so a
# 4 MiB body of ``{}`` would otherwise become ~160 MB of dicts); a node-link graph at its link cap holds
# about 20000
#: bodies decoded at once in one process: bounds the memory of a flood
_decoding = threading.BoundedSemaphore(2)


def parse_json(body: bytes, *, max_containers: int = MAX_JSON_CONTAINERS) -> dict:
    containers = body.count(b"{") + body.count(b"[")
    if containers > max_containers:
        raise ToposcoutError(f"body: the JSON holds {containers} objects and arrays (nested or side by side), more "
                             f"than this server's cap of max_json_containers={max_containers}", field="body")
    with _decoding:
        return _parse_json(body)


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


def validate_request(data: dict) -> S.StudyRequest:
    try:
        return S.StudyRequest.model_validate(data)
    except ValidationError as exc:
        detail, field = validation_detail(exc.errors(include_url=False), strip_source=False)
        raise ToposcoutError(detail, field=field) from None
    except RecursionError:
        raise ToposcoutError("body: the JSON is nested too deeply", field="body") from None


async def read_request(request: Request, settings: Settings) -> tuple[str, Any, str | None]:
    """``("json", raw body, None)`` (decoded later, in a preparation process: ``preparing``) or
    ``("data", request dict, file name)`` of a multipart form."""
    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if ctype == "application/json" or ctype.endswith("+json"):
        return "json", await request.body(), None
    if ctype != "multipart/form-data":
        raise HTTPException(415, "Content-Type must be application/json or multipart/form-data")
    try:
        form = await request.form(max_files=1, max_fields=64, max_part_size=settings.max_body_bytes)
    except HTTPException as exc:
        if exc.status_code == 413:
            raise
        where = "file" if "files" in str(exc.detail) else "body"  # "Too many files": the file field
        raise ToposcoutError(f"{where}: malformed multipart form ({exc.detail})", field=where) from None
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
        return "data", data, filename
    finally:
        await form.close()


