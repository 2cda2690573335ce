"""Which executor a server uses: Dask when ``settings.dask_address`` is set, else local processes."""

from __future__ import annotations

from typing import Any

from toposcout.service.execution.base import Executor
from toposcout.service.execution.local import LocalExecutor

__all__ = ["make_executor"]


def make_executor(settings: Any, store: Any, *, workers: int | None = None) -> Executor:
    """The Dask executor when ``settings.dask_address`` is set, else a :class:`LocalExecutor`
    (``workers`` processes, default ``settings.workers``). A queue worker runs one of these."""
    if getattr(settings, "dask_address", None):
        # optional heavy dependency: Dask is imported only by workers configured for it
        from toposcout.service.execution.dask import DaskExecutor

        return DaskExecutor(settings, store)
    return LocalExecutor(settings, store, workers=workers)
