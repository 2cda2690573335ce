"""Fit before you compare: the fit step shared by ``toposcout fit``, ``compare --fit`` and the API.

The fitting itself is :func:`toposcout.compiler.fit.fit_model` (pure); here are the parts with I/O:
reading a samples CSV, the on-disk cache of fits (by :func:`toposcout.compiler.fit.fit_key`), and
turning one model plus several families into tasks whose models carry the fitted angles.
"""

from __future__ import annotations

import io
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from toposcout.compiler.errors import ModelError
from toposcout.compiler.fit import MMD_BANDWIDTHS, check_fit_options, fit_key, fit_model, parse_samples, with_parameters
from toposcout.compiler.model import Model
from toposcout.compiler.study import make_tasks

__all__ = ["FitSettings", "FitCache", "read_samples", "fit_cached", "fitted_tasks", "default_cache_dir",
           "loss_curve_image", "format_report"]


@dataclass
class FitSettings:
    """What a fit is asked to do (the CLI options / the API's ``fit`` block)."""

    loss: str = "kl"
    layers: int = 1
    restarts: int = 3
    max_iter: int = 500
    tol: float = 1e-10
    optimizer: str = "lbfgs"
    seed: int = 0
    bandwidths: tuple[float, ...] = MMD_BANDWIDTHS
    samples: np.ndarray | None = field(default=None, repr=False)

    def check(self, model: Model, family: str) -> None:
        check_fit_options(model, family=family, layers=self.layers, loss=self.loss, samples=self.samples,
                          restarts=self.restarts, max_iter=self.max_iter, optimizer=self.optimizer, tol=self.tol,
                          bandwidths=self.bandwidths)
        if self.loss == "mmd" and self.samples is None:
            raise ModelError("loss mmd needs samples: give a data file (one 0/1 column per variable)", field="data")

    def key(self, model: Model, family: str) -> str:
        return fit_key(model, family=family, layers=self.layers, loss=self.loss, samples=self.samples,
                       seed=self.seed, restarts=self.restarts, max_iter=self.max_iter, optimizer=self.optimizer,
                       tol=self.tol, bandwidths=self.bandwidths)


def read_samples(path: str | Path, model: Model) -> np.ndarray:
    """The samples of a CSV file (header = variable names) as little-endian indices."""
    text = Path(path).read_text(encoding="utf-8")
    return parse_samples(text, model.variables)


def default_cache_dir() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "toposcout" / "fits"


class FitCache:
    """Fits on disk: one JSON file per key (``parameters`` + the report). ``None`` folder: no cache."""

    def __init__(self, folder: str | Path | None):
        self.folder = Path(folder) if folder is not None else None

    def get(self, key: str) -> dict | None:
        if self.folder is None:
            return None
        path = self.folder / f"{key}.json"
        try:
            return json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None

    def put(self, key: str, entry: Mapping[str, Any]) -> None:
        if self.folder is None:
            return
        self.folder.mkdir(parents=True, exist_ok=True)
        tmp = self.folder / f"{key}.json.tmp"
        tmp.write_text(json.dumps(entry), encoding="utf-8")
        tmp.replace(self.folder / f"{key}.json")


def fit_cached(model: Model, family: str, settings: FitSettings, cache: FitCache,
               progress: Callable[[dict], Any] | None = None) -> tuple[dict, bool]:
    """``({"parameters", "report"}, from_cache)`` for one family; an interrupted fit is not cached."""
    key = settings.key(model, family)
    hit = cache.get(key)
    if hit is not None:
        return hit, True
    r = fit_model(model, family=family, layers=settings.layers, loss=settings.loss, samples=settings.samples,
                  bandwidths=settings.bandwidths, restarts=settings.restarts, max_iter=settings.max_iter,
                  tol=settings.tol, optimizer=settings.optimizer, seed=settings.seed, progress=progress)
    entry = {"parameters": r.parameters, "report": r.report()}
    if not r.interrupted:
        cache.put(key, entry)
    return entry, False


def fitted_tasks(model: Model, connectivities: Sequence[Any] | None, families: Sequence[str],
                 settings: FitSettings | None, cache: FitCache | None = None, *,
                 noise_scales: Sequence[float] | None = None, progress: Callable[[str, dict], Any] | None = None,
                 **options: Any) -> tuple[list[dict], list[dict]]:
    """Tasks for every (family, connectivity, noise scale); with ``settings``, each family's angles fitted
    first (one fit per family, the same target). Returns ``(tasks, fit reports)``."""
    families = list(dict.fromkeys(families or ["clique"]))
    if settings is not None:
        for fam in families:  # every problem before any fit starts
            settings.check(model, fam)
        options["layers"] = settings.layers
    tasks: list[dict] = []
    reports: list[dict] = []
    for fam in families:
        m = model
        extra: dict[str, Any] = {}
        if settings is not None:
            entry, cached = fit_cached(model, fam, settings, cache or FitCache(None),
                                       (lambda e, f=fam: progress(f, e)) if progress else None)
            report = dict(entry["report"], cached=cached)
            reports.append(report)
            if report.get("interrupted"):
                raise KeyboardInterrupt
            m = with_parameters(model, entry["parameters"])
            extra["fit"] = {"loss": settings.loss, "loss_value": report["final_loss"], "key": report["key"]}
        tasks += make_tasks(m, connectivities, noise_scales=noise_scales, **{**options, "family": fam}, **extra)
    return tasks, reports


def loss_curve_image(report: Mapping[str, Any], fmt: str = "png") -> bytes:
    """The loss per iteration of every restart (log scale when every value is positive), as PNG or SVG."""

    import matplotlib  # matplotlib only for a plot

    matplotlib.use("Agg")
    from matplotlib.figure import Figure  # matplotlib only for a plot

    fig = Figure(figsize=(6.4, 4.0))
    ax = fig.add_subplot()
    values = []
    for r in report["restarts"]:
        curve = r.get("curve") or []
        values += curve
        final = "n/a" if r["loss"] is None else f"{r['loss']:.3g}"
        ax.plot(range(1, len(curve) + 1), curve, label=f"restart {r['restart']} (final {final})")
    if values and min(values) > 0:
        ax.set_yscale("log")
    unit = "KL(target ‖ model), nats" if report["loss"] == "kl" else "unbiased MMD² to the samples"
    ax.set_xlabel("iteration")
    ax.set_ylabel(unit)
    ax.set_title(f"fit of the {report['family']} family, {report['layers']} layer(s): loss per iteration")
    ax.legend(fontsize="small")
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt)
    return buf.getvalue()


def format_report(report: Mapping[str, Any]) -> str:
    """The fit report for a terminal: one line per restart, then the fitted model's distances."""
    lines = [f"fit of the {report['family']} family, {report['layers']} layer(s), loss {report['loss']}"
             + (" (from the cache)" if report.get("cached") else "")]
    lines.append(f"  {'restart':<8}{'final loss':>14}{'iterations':>12}{'evaluations':>13}{'seconds':>10}  stop")
    for r in report["restarts"]:
        loss = "n/a" if r["loss"] is None else f"{r['loss']:.6g}"
        lines.append(f"  {r['restart']:<8}{loss:>14}{r['iterations']:>12}{r['evaluations']:>13}"
                     f"{r['seconds']:>10.3f}  {r['message']}")

    def f(x):
        return "n/a" if x is None else f"{x:.6g}"
    lines.append(f"  best restart {report['best_restart']}: loss {f(report['final_loss'])}; "
                 f"KL(target ‖ fitted) {f(report['kl_target'])} nats; MMD(target, fitted) {f(report['mmd_target'])}; "
                 f"MMD² to the data {f(report['mmd_data'])}; {report['seconds']:.2f} s in all")
    if report.get("interrupted"):
        lines.append("  interrupted: these are the best parameters found so far")
    return "\n".join(lines)
