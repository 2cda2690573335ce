"""toposcout: where does a graph-structured circuit fit, and what survives noise?

The few names a notebook needs, loaded lazily so that ``import toposcout`` stays light (a
notebook that only talks to a server never loads FastAPI, SQLAlchemy or Dask):

* :func:`compare`: run a study on this machine (no server) and get its rows as a DataFrame.
* :class:`Client`: talk to a toposcout server.
* :func:`load_model`: read a model file (our JSON, UAI, or networkx node-link JSON).
* ``__version__``.

The library is ``toposcout.compiler`` (pure: model → circuit → compiled → noise → simulation →
metrics); the service (CLI, REST API, store, executors, dashboard, client) is
``toposcout.service``. Figures are a simulation under a stated noise model, not a promise about a
device.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from toposcout.compiler.version import __version__

__all__ = ["__version__", "compare", "Client", "load_model"]

_LAZY = {
    "compare": ("toposcout.service.embedded", "compare"),
    "Client": ("toposcout.service.client", "Client"),
    "load_model": ("toposcout.compiler.model", "load_model"),
}


def __getattr__(name: str) -> Any:
    try:
        module, attr = _LAZY[name]
    except KeyError:
        raise AttributeError(f"module 'toposcout' has no attribute {name!r}") from None
    value = getattr(import_module(module), attr)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
