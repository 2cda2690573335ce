"""FastAPI dependencies, in one place: the settings, the store, the owner of a
request (bearer tokens, :mod:`toposcout.service.api.auth`) and the path parameters.

Everything comes from ``request.app.state``, set by :func:`toposcout.service.api.app.create_app`,
so tests can build an app with their own settings.
"""

from __future__ import annotations

from typing import Annotated, Any

# the getters are async: they only read app.state, so FastAPI runs them without a thread hop

from fastapi import Depends, Path, Request

from toposcout.service.api.auth import request_owner
from toposcout.service.settings import Settings
from toposcout.service.store import Store

__all__ = ["Owner", "SettingsDep", "StoreDep", "StudyId", "TaskIndex", "FinishedCache",
           "get_settings", "get_store"]


async def get_settings(request: Request) -> Settings:
    return request.app.state.settings


async def get_store(request: Request) -> Store:
    return request.app.state.store


async def get_finished_cache(request: Request) -> Any:
    return request.app.state.finished_cache


Owner = Annotated[str, Depends(request_owner)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
StoreDep = Annotated[Store, Depends(get_store)]
FinishedCache = Annotated[Any, Depends(get_finished_cache)]
StudyId = Annotated[str, Path(min_length=1, max_length=64, description="the study id")]
TaskIndex = Annotated[int, Path(ge=0, le=1_000_000, description="row index in the study")]
