"""The embedded default: a study run on this machine (no server, local worker processes).

:func:`compare` is what ``toposcout compare FILE`` runs without ``--server``, as a library call
for a notebook. Figures are a simulation under the stated noise model, not a promise about a
device.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any, Mapping, Sequence

from toposcout.compiler.model import Model, load_model, parse_model
from toposcout.compiler.study import make_tasks
from toposcout.service.execution.runner import run_tasks
from toposcout.service.output import sort_rows

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

__all__ = ["compare", "compare_rows"]


def _as_model(model: Model | Mapping[str, Any] | str | Path) -> Model:
    if isinstance(model, Model):
        return model
    if isinstance(model, Mapping):
        return parse_model(dict(model))
    return load_model(model)


def compare_rows(model: Model | Mapping[str, Any] | str | Path,
                 connectivities: Sequence[str | Mapping[str, Any]] | None = None, *,
                 noise_scales: Sequence[float] | None = None, workers: int | None = None, progress: bool = False,
                 families: Sequence[str] | None = None, fit: bool | Mapping[str, Any] | None = None,
                 **options: Any) -> list[dict]:
    """The rows of a study of ``model`` on ``connectivities``, sorted as the CLI table sorts them.

    connectivities: default None: every built-in family, sized to the model.
    noise_scales: default None: scale 1 only.
    workers: default None: in-process for compile-only studies, else up to 2 worker processes.
    families: default None: ``options["family"]`` only; several: rows for each (family, connectivity).
    fit: default None: the angles as given; True or ``{"loss", "restarts", "max_iter", "tol", "optimizer",
        "bandwidths", "samples"}``: fit each family's angles first (``toposcout.compiler.fit``).
    options: task fields (``gate_set``, ``strategy``, ``seeds``, ``family``, ``layers``, ``seed``,
        ``compile_only``, ``profile``, ``fidelity_target``, ...).
    """
    m = _as_model(model)
    if fit:  # fitted in the worker processes (toposcout.compiler.study: fit_request), memoised per process
        req = {"loss": "kl", "seed": options.get("seed", 0), **(dict(fit) if isinstance(fit, Mapping) else {})}
        if req.get("samples") is not None:
            req["samples"] = [int(x) for x in req["samples"]]
        from toposcout.compiler.fit import check_fit_options  # scipy and the fit evaluator: only for requests that fit

        for fam in families or [options.get("family", "clique")]:
            check_fit_options(m, family=fam, layers=options.get("layers", 1), loss=req["loss"],
                              samples=req.get("samples"), restarts=req.get("restarts", 3),
                              max_iter=req.get("max_iter", 500), optimizer=req.get("optimizer", "lbfgs"),
                              tol=req.get("tol", 1e-10))
        options["fit_request"] = req
    tasks = []
    for fam in families or [options.pop("family", "clique")]:
        tasks += make_tasks(m, connectivities, noise_scales=noise_scales, **{**options, "family": fam})
    return sort_rows(run_tasks(tasks, workers=workers, progress=progress))


def compare(model: Model | Mapping[str, Any] | str | Path,
            connectivities: Sequence[str | Mapping[str, Any]] | None = None, **kwargs: Any) -> "pd.DataFrame":
    """:func:`compare_rows` as a pandas DataFrame, one row per (connectivity, noise scale).

    Examples:
        >>> import toposcout
        >>> df = toposcout.compare({"name": "demo", "variables": ["a", "b", "c"], "cliques": [["a", "b", "c"]]},
        ...                        ["line", "all-to-all"], compile_only=True, seeds=1)
        >>> sorted(df["connectivity"])
        ['all-to-all-3', 'line-3']
    """
    import pandas as pd  # only for the DataFrame form

    return pd.DataFrame.from_records(compare_rows(model, connectivities, **kwargs))
