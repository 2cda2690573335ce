"""Studies: one model against several targets; one task per row.

:func:`run_task` is the single task function every executor runs (in-process, in a
local worker process or on a Dask worker). A task and a row are plain JSON-able dicts,
so a task can be hashed (:func:`task_key`) and shipped anywhere.

A task::

    {"model": Model.to_dict(), "connectivity": {"family": "grid", "size": None, "edges": None},
     "gate_set": "cx", "strategy": "auto", "seeds": 5, "family": "clique", "layers": 1, "seed": 0,
     "compile_only": False, "profile": "NAME" | {profile dict} | None, "noise_scale": 1.0,
     "memory_budget_bytes": None, "error_budget": True, "fidelity_target": None,
     "keep_circuit": False, "method": "auto", "time_budget_seconds": None, "trajectories": None,
     "precision": None, "requirement_tolerance": None, "device": None | {device dict}, "placement": None | "errors" | "count",
     "regions": None | K, "region_rank": 0, "jitter": None | sigma, "jitter_samples": 100}

With ``device`` (the normalised content of a device file, ``toposcout.compiler.devices``) the
chip fixes the connectivity and its figures are the profile; ``placement``, ``regions`` and
``jitter`` are described in ``toposcout.compiler.regions``.

and optionally ``"fit": {"loss": "kl" | "mmd", "loss_value": x, "key": KEY}`` when the model's
parameters were fitted before (``toposcout.compiler.fit``; the CLI's ``compare --fit``), or
``"fit_request": {"loss", "restarts", "max_iter", "tol", "optimizer", "seed", "bandwidths",
"samples"}`` to fit in the worker before compiling (the API's ``fit`` block; deterministic, so
every worker finds the same angles; memoised per process). Either way the row says
``angles_fitted`` and carries the fitted ``fit_parameters``.

``method`` picks how the noise figures are computed (``toposcout.compiler.methods``); when they
cannot be computed the row keeps its compile figures and says why in ``noise_error``.

With ``keep_circuit`` the row also carries ``circuit_qpy_b64``: the compiled circuit as
base64 QPY (the service stores it apart from the row).

Examples:
    >>> t = make_tasks({"name": "pair", "variables": ["a", "b"], "cliques": [["a", "b"]]},
    ...                ["line", "all-to-all"], compile_only=True, strategy="generic", seeds=1)
    >>> [run_task(x)["two_qubit_gates"] for x in t]
    [2, 2]
"""

from __future__ import annotations

import hashlib
import json
import re
import time
from collections import OrderedDict
from dataclasses import replace
from typing import Any, Iterable, Mapping, Sequence

from toposcout.compiler.ansatz import FAMILIES, build_ansatz
from toposcout.compiler.compile import STRATEGIES
from toposcout.compiler.errors import CapacityError, ModelError, TargetError, ToposcoutError
from toposcout.compiler.model import Limits, Model, parse_model
from toposcout.compiler.options import LIMITS, requirement_target
from toposcout.compiler.targets import (BUILTIN_FAMILIES, NAME_PATTERN, get_gate_set, make_connectivity, name_from_path,
                                        parse_edge_list, read_edge_list, read_positions)
from toposcout.compiler.version import __version__

__all__ = ["TASK_DEFAULTS", "normalise_task", "task_key", "make_tasks", "run_task", "connectivity_spec"]

TASK_DEFAULTS: dict[str, Any] = {
    "gate_set": "cx",
    "strategy": "auto",
    "seeds": 5,
    "family": "clique",
    "layers": 1,
    "seed": 0,
    "compile_only": False,
    "profile": None,
    "noise_scale": 1.0,
    "memory_budget_bytes": None,
    "error_budget": True,
    "fidelity_target": None,
    "keep_circuit": False,
    "method": "auto",
    "time_budget_seconds": None,
    "trajectories": None,
    "precision": None,
    "requirement_tolerance": None,
    "device": None,
    "placement": None,
    "regions": None,
    "region_rank": 0,
    "jitter": None,
    "jitter_samples": 100,
}


def connectivity_spec(spec: str | Mapping[str, Any]) -> dict:
    """Turn ``"grid:3x4"``, ``"custom:FILE"``, ``"custom:NAME=FILE"`` or a dict into
    ``{"family", "size", "edges"}`` (and ``"name"`` for a custom one: NAME, else the file's stem)."""
    if isinstance(spec, Mapping):
        d = {"family": spec.get("family"), "size": spec.get("size"), "edges": spec.get("edges")}
        if spec.get("name") is not None:
            d["name"] = str(spec["name"])
        if spec.get("positions") is not None:
            d["positions"] = [[float(x), float(y)] for x, y in spec["positions"]]
    else:
        family, _, size = str(spec).partition(":")
        d = {"family": family.strip(), "size": size or None, "edges": None}
        if d["family"] == "custom":
            if not size:
                raise TargetError("custom needs an edge-list file: custom:PATH or custom:NAME=PATH",
                                  field="connectivity")
            name, path = _custom_name(size)
            d["edges"] = [list(e) for e in read_edge_list(path)]
            pos = read_positions(path)
            if pos is not None:
                d["positions"] = pos
            d["size"] = None
            d["name"] = name or name_from_path(path)
    if isinstance(d["edges"], str):
        d["edges"] = [list(e) for e in parse_edge_list(d["edges"])]
    if d["size"] is not None:
        d["size"] = str(d["size"])
    return d


def _custom_name(text: str) -> tuple[str | None, str]:
    """``NAME=PATH`` → (NAME, PATH); a plain path → (None, PATH)."""
    name, eq, path = text.partition("=")
    if eq and re.fullmatch(NAME_PATTERN, name) and path:
        return name, path
    return None, text


def _explicit_name(spec: str | Mapping[str, Any]) -> bool:
    if isinstance(spec, Mapping):
        return spec.get("name") is not None
    family, _, size = str(spec).partition(":")
    return family.strip() == "custom" and _custom_name(size)[0] is not None


def _unique_names(specs: list[dict], conns: list, explicit: list[bool]) -> None:
    """One row name per coupling graph: a derived custom name that another graph of the study
    already has gets ``-2``, ``-3``, ...; a NAME given twice for different graphs is refused."""
    graphs: dict[str, tuple] = {}
    for i, (spec, conn) in enumerate(zip(specs, conns)):
        graph = (conn.num_qubits, tuple(conn.edges))
        name = conn.name
        if graphs.get(name, graph) == graph:
            graphs[name] = graph
            continue
        if explicit[i] or spec["family"] != "custom":
            other = "a built-in connectivity" if spec["family"] != "custom" else "another coupling graph"
            raise TargetError(f"connectivity name {name!r} is taken by {other} of this study; give each custom "
                              "graph its own name (custom:NAME=FILE)", field="connectivity")
        k = 2
        while f"{name}-{k}" in graphs and graphs[f"{name}-{k}"] != graph:
            k += 1
        spec["name"] = f"{name}-{k}"
        graphs[spec["name"]] = graph


def resolve_connectivities(connectivities: Sequence[str | Mapping[str, Any]] | None, num_variables: int
                           ) -> tuple[list[dict], list]:
    """The specs and the Connectivity objects of a study's connectivities, with the row names the
    study gives them (:func:`_unique_names`); raises TargetError before any work."""
    given = list(connectivities or BUILTIN_FAMILIES)
    specs = [connectivity_spec(c) for c in given]
    conns = [make_connectivity(spec["family"], num_variables, size=spec["size"], edges=spec["edges"],
                               name=spec.get("name"), positions=spec.get("positions")) for spec in specs]
    _unique_names(specs, conns, [_explicit_name(c) for c in given])
    conns = [replace(c, name=s["name"]) if s.get("name") and c.name != s["name"] else c for s, c in zip(specs, conns)]
    return specs, conns


def normalise_task(task: Mapping[str, Any]) -> dict:
    """Fill defaults and normalise the model, so equal work has an equal key."""
    out = dict(TASK_DEFAULTS)
    unknown = set(task) - set(TASK_DEFAULTS) - {"model", "connectivity", "fit", "fit_request"}
    if unknown:
        raise ModelError(f"unknown task fields {sorted(unknown)}", field=sorted(unknown)[0])
    out.update({k: v for k, v in task.items() if k != "model"})
    model = task["model"]
    if not isinstance(model, Model):
        model = parse_model(model, "json") if isinstance(model, Mapping) else parse_model(model)
    out["model"] = model.to_dict()
    out["connectivity"] = connectivity_spec(task["connectivity"])
    return out


def task_key(task: Mapping[str, Any]) -> str:
    """SHA-256 of the canonical JSON of the normalised task and the toposcout version."""
    canon = json.dumps({"task": normalise_task(task), "version": __version__}, sort_keys=True,
                       separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(canon.encode()).hexdigest()


def make_tasks(
    model: Model | Mapping[str, Any],
    connectivities: Sequence[str | Mapping[str, Any]] | None = None,
    *,
    noise_scales: Iterable[float] | None = None,
    regions_simulated: int = 3,
    **options: Any,
) -> list[dict]:
    """One task per (connectivity, profile, noise scale); options are task fields.

    connectivities: default None: every built-in family, sized to the model (with a
        ``device`` option: the device's chip, and ``connectivities`` must be None).
    noise_scales: default None: one task per connectivity at ``options["noise_scale"]``.
    ``options["profile"]`` may be a list of profiles (names or dicts): one study, every profile.
    regions_simulated: default 3; with ``regions`` = K, one task per rank 0..min(K, this)-1
        (the best regions by ESP are the ones simulated).
    """
    m = model if isinstance(model, Model) else parse_model(dict(model), "json")
    device = None
    if options.get("device") is not None:
        from toposcout.compiler.devices import load_device

        device = load_device(options["device"])
        device.check_fits(m.num_variables)
        options["device"] = device.to_dict()
        connectivities = [{"family": "custom", "size": None, "edges": [list(e) for e in device.connectivity.edges]}]
    if device is None:
        specs, _conns = resolve_connectivities(connectivities, m.num_variables)
    else:  # the device's chip is the one connectivity; run_task takes it from the device
        specs = [connectivity_spec(c) for c in connectivities]
    scales = list(noise_scales) if noise_scales else [options.pop("noise_scale", 1.0)]
    given_profiles = options.get("profile")
    profiles = list(given_profiles) if isinstance(given_profiles, (list, tuple)) else [given_profiles]
    if not profiles:
        raise ModelError("profile: give at least one profile (or none for the default)", field="profile")
    options["profile"] = profiles[0]
    # check every combination before any expensive work starts
    probe = dict(TASK_DEFAULTS)
    probe.update(options)
    if probe["fidelity_target"] is not None:  # a bad target is refused even where it would not be used
        LIMITS["fidelity_target"].check(probe["fidelity_target"])
    target = requirement_target(probe["fidelity_target"], scales, probe["compile_only"])
    if target is not None or "fidelity_target" in options:
        options["fidelity_target"] = probe["fidelity_target"] = target
    for s in scales:
        _check_options({**probe, "noise_scale": s})
    get_gate_set(probe["gate_set"])
    names = []
    for prof in profiles:
        if prof is not None or not probe["compile_only"]:
            names.append(_profile(prof, 1.0).name)  # an unknown profile is refused with compile_only too
    if len(set(names)) != len(names):
        raise ModelError(f"profile: {sorted(n for n in names if names.count(n) > 1)[0]!r} is given twice; rows of "
                         "two profiles are told apart by the profile's name", field="profile")
    if not probe["compile_only"]:
        if probe["method"] == "density-matrix":
            from toposcout.compiler.simulate import capacity_message, default_memory_budget_bytes, estimate_memory_bytes

            budget = probe["memory_budget_bytes"] or default_memory_budget_bytes()
            est = estimate_memory_bytes(m.num_variables)
            if est > budget:  # every row needs at least one qubit per variable: no row could run
                raise CapacityError(f"method density-matrix: {capacity_message(m.num_variables, est, budget)}; "
                                    "or use method auto, trajectories or clifford", field="method")
    ranks = range(min(options["regions"], max(1, regions_simulated))) if options.get("regions") else [None]
    tasks = []
    for spec in specs:
        for prof in profiles:
            for k, s in enumerate(scales):
                for r in ranks:
                    t = {"model": m.to_dict(), "connectivity": spec, **options, "profile": prof,
                         "noise_scale": float(s)}
                    if r is not None:
                        t["region_rank"] = r
                    if options.get("fidelity_target") is not None and k > 0:
                        t["fidelity_target"] = None  # the threshold is searched once per connectivity and profile
                    tasks.append(t)
    return tasks


def _check_options(t: Mapping[str, Any]) -> None:
    if t["strategy"] not in STRATEGIES:
        raise ModelError(f"unknown strategy {t['strategy']!r}; choose one of {', '.join(STRATEGIES)}",
                         field="strategy")
    if t["family"] not in FAMILIES:
        raise ModelError(f"unknown family {t['family']!r}; choose one of {', '.join(FAMILIES)}", field="family")
    for name in ("seeds", "layers", "seed"):
        LIMITS[name].check(t[name])
    for name in ("fidelity_target", "requirement_tolerance"):
        if t.get(name) is not None:
            LIMITS[name].check(t[name])
    from toposcout.compiler.methods import check_method_options

    check_method_options(t["method"], precision=t["precision"], trajectories=t["trajectories"],
                         time_budget_seconds=t["time_budget_seconds"])
    from toposcout.compiler.regions import check_placement_options

    check_placement_options(t)
    LIMITS["noise_scale"].check(t["noise_scale"])


def run_task(task: Mapping[str, Any], *, limits: Limits | None = None) -> dict:
    """Compile (and unless ``compile_only``, simulate) one row; never raises a ToposcoutError.

    A ToposcoutError becomes a row with ``error`` (the message) and ``error_field`` set;
    anything else is a bug and propagates.
    """
    started = time.perf_counter()
    row: dict[str, Any] = {"error": None, "error_field": None}
    try:
        t = dict(TASK_DEFAULTS)
        t.update(task)
        spec = connectivity_spec(t["connectivity"])
        row.update(connectivity=spec["family"], noise_scale=t["noise_scale"], gate_set=t["gate_set"],
                   strategy_requested=t["strategy"])
        _check_options(t)
        model = parse_model(dict(t["model"]), "json", limits=limits)
        row["model"] = model.name
        if t.get("fit_request"):
            model, t["fit"], fit_row = _fitted(model, t)
            row.update(fit_row)
        ansatz = build_ansatz(model, family=t["family"], layers=t["layers"], seed=t["seed"])
        st = ansatz.stats()
        fit = t.get("fit") or {}
        row.update(angles_fitted=bool(fit), fit_loss=fit.get("loss"), fit_loss_value=fit.get("loss_value"),
                   fit_key=fit.get("key"),
                   angles_source="fitted" if fit else "model" if model.parameters else "seeded")
        if fit and "fit_parameters" not in row:
            row["fit_parameters"] = model.parameters
        row.update(family=t["family"], layers=t["layers"], variables=model.num_variables,
                   terms=st["terms"], lower_bound_two_qubit=st["lower_bound_two_qubit"],
                   logical_cnots=st["cnots"], logical_depth=st["depth"])
        conn, device_name, gate_set = task_connectivity(t, model, spec)
        if device_name is not None:
            row["device"] = device_name
        row["connectivity"] = conn.name
        row["connectivity_family"] = conn.family
        (compiled, placed), reused = _compiled(ansatz, conn, gate_set, t, limits)
        row["compile_reused"] = reused
        row.update(placed)
        fig = compiled.figures()
        fig["layout"] = {v: p for v, p in zip(model.variables, compiled.initial_layout)}
        fig["final_layout"] = {v: p for v, p in zip(model.variables, compiled.final_layout)}
        fig.pop("initial_layout")
        row.update(fig)
        if t["keep_circuit"]:
            import base64

            from toposcout.compiler.compile import qpy_bytes

            row["circuit_qpy_b64"] = base64.b64encode(qpy_bytes(compiled)).decode("ascii")
        if t["compile_only"]:
            row.update(method=None, method_reason="compile-only: no noise simulation")
        else:
            row.update(_noise_row(compiled, ansatz, t))
        if t["jitter"] is not None:
            from toposcout.compiler.regions import jitter_figures

            row.update(jitter_figures(compiled, _profile(t["profile"], t["noise_scale"]), float(t["jitter"]),
                                      int(t["jitter_samples"]), seed=int(t["seed"])))
    except ToposcoutError as exc:
        row["error"] = str(exc)
        row["error_field"] = exc.field
    row["row_seconds"] = round(time.perf_counter() - started, 4)
    return row


#: compiled circuits of the last tasks run in this process, by everything that decides the
#: compilation (not the noise options): the rows of a noise-scale sweep compile once. A memo
#: of a deterministic function, so a hit returns exactly what a new compilation would.
_COMPILED: "OrderedDict[str, Any]" = OrderedDict()
_COMPILED_SIZE = 8


def task_connectivity(t: dict[str, Any], model, spec: Mapping[str, Any]):
    """(connectivity, device name or None, gate set) of a task; a device's figures become
    ``t["profile"]`` and its couplers' own native gates join the task's gate set."""
    if t.get("device") is None:
        return make_connectivity(spec["family"], model.num_variables, size=spec["size"], edges=spec["edges"],
                                 name=spec.get("name"), positions=spec.get("positions")), None, get_gate_set(t["gate_set"])
    from toposcout.compiler.devices import parse_device  # only device tasks need the device reader

    dev = parse_device(t["device"])
    dev.check_fits(model.num_variables)
    t["profile"] = dev.profile.to_dict()  # the chip's figures are the row's profile
    return dev.connectivity, dev.name, dev.gate_set(t["gate_set"])


def _compiled(ansatz, conn, gate_set, t: Mapping[str, Any], limits) -> tuple[Any, bool]:
    """((compiled, placement fields), reused); see ``toposcout.compiler.regions``."""
    from toposcout.compiler.regions import has_per_element, placed_compilation

    profile = _profile(t["profile"], t["noise_scale"])
    # the profile decides the compilation only under error-aware placement or a comparison of both
    aware = has_per_element(profile) or t["placement"] == "errors"
    key = json.dumps({"model": ansatz.model.to_dict(), "family": t["family"], "layers": t["layers"],
                      "seed": t["seed"], "connectivity": conn.to_dict(), "gate_set": t["gate_set"],
                      "coupler_gates": [[list(p), g] for p, g in gate_set.couplers],
                      "strategy": t["strategy"], "seeds": t["seeds"], "limits": repr(limits), "version": __version__,
                      "placement": t["placement"], "profile": profile.to_dict() if aware else None,
                      "regions": t["regions"], "region_rank": t["region_rank"]},
                     sort_keys=True, default=str)
    if key in _COMPILED:
        _COMPILED.move_to_end(key)
        return _COMPILED[key], True
    compiled = placed_compilation(ansatz, conn, gate_set, t, profile)
    _COMPILED[key] = compiled
    while len(_COMPILED) > _COMPILED_SIZE:
        _COMPILED.popitem(last=False)
    return compiled, False


#: fits of the last tasks run in this process, by fit key (a memo of a deterministic function)
_FITTED: "OrderedDict[str, Any]" = OrderedDict()


def _fitted(model: Model, t: Mapping[str, Any]) -> tuple[Model, dict, dict]:
    """Fit the task's model (its ``fit_request``) for its family and layers: (fitted model, fit, row fields)."""
    import numpy as np

    from toposcout.compiler.fit import MMD_BANDWIDTHS, fit_key, fit_model, with_parameters

    req = dict(t["fit_request"])
    samples = None if req.get("samples") is None else np.asarray(req["samples"], dtype=np.int64)
    opts = dict(loss=req.get("loss", "kl"), restarts=req.get("restarts", 3), max_iter=req.get("max_iter", 500),
                tol=req.get("tol", 1e-10), optimizer=req.get("optimizer", "lbfgs"), seed=req.get("seed", 0),
                bandwidths=tuple(req.get("bandwidths") or MMD_BANDWIDTHS))
    key = fit_key(model, family=t["family"], layers=t["layers"], samples=samples, **opts)
    hit = key in _FITTED
    if hit:
        _FITTED.move_to_end(key)
        result = _FITTED[key]
    else:
        result = fit_model(model, family=t["family"], layers=t["layers"], samples=samples, **opts)
        _FITTED[key] = result
        while len(_FITTED) > _COMPILED_SIZE:
            _FITTED.popitem(last=False)
    fit = {"loss": opts["loss"], "loss_value": result.loss, "key": key}
    best = next((r for r in result.restarts if r.restart == result.best_restart), None)
    fields = {"fit_parameters": result.parameters, "fit_restart_losses": [r.loss for r in result.restarts],
              "fit_curve": list(best.curve) if best else [],
              "fit_seconds": 0.0 if hit else round(result.seconds, 4)}
    return with_parameters(model, result.parameters), fit, fields


def _profile(spec: str | Mapping[str, Any] | None, noise_scale: float):
    from toposcout.compiler.profiles import DEFAULT_PROFILE, DeviceProfile, load_profile

    spec = spec or DEFAULT_PROFILE
    if isinstance(spec, Mapping):
        return DeviceProfile.from_dict(dict(spec), noise_scale=noise_scale)
    return load_profile(spec, noise_scale=noise_scale)


def _noise_row(compiled, ansatz, t: Mapping[str, Any]) -> dict:
    """The noise figures by the task's method; a failure is ``noise_error`` (the compile
    figures of the row stay). The threshold bisection replaces the profile's noise scale."""
    from toposcout.compiler.methods import method_noise_row

    return method_noise_row(compiled, ansatz, _profile(t["profile"], t["noise_scale"]), t)
