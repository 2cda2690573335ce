"""The catalogue: connectivity families and gate sets, device profiles, the model schema."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter
from fastapi.responses import JSONResponse

from toposcout.compiler.model import model_schema
from toposcout.compiler.profiles import DEFAULT_PROFILE, profile_catalogue
from toposcout.compiler.targets import connectivity_catalogue, gate_set_catalogue
from toposcout.service.api import schemas as S
from toposcout.service.api.deps import Owner
from toposcout.service.api.errors import ERRORS_READ

__all__ = ["router"]

router = APIRouter(prefix="/v1", tags=["catalogue"])


@router.get("/connectivities", response_model=S.ConnectivityList, responses=ERRORS_READ,
            summary="Connectivity families and gate sets")
def connectivities(owner: Owner):
    conns = [{"name": k, "description": v["description"], "sizing": v["sizing"], "size": v["size"]}
             for k, v in connectivity_catalogue().items()]
    gates = [{"name": k, "description": v["description"]} for k, v in gate_set_catalogue().items()]
    return JSONResponse({"connectivities": conns, "gate_sets": gates})


@router.get("/profiles", response_model=S.ProfileList, responses=ERRORS_READ,
            summary="Built-in device profiles (invented classes, typical values from memory)")
def profiles(owner: Owner):
    items = [{"name": k, "description": v} for k, v in profile_catalogue().items()]
    return JSONResponse({"default": DEFAULT_PROFILE, "profiles": items})


@router.get("/schema/model", responses=ERRORS_READ, response_model=dict[str, Any],
            summary="The JSON Schema of the model format")
def schema_model(owner: Owner):
    return JSONResponse(model_schema())
