"""From a request to tasks: parse the model, apply the server's caps, build and validate tasks.

Everything a study will need is checked here, before anything is stored or queued; each
problem is a :class:`toposcout.compiler.errors.ToposcoutError` naming the request field, which the API
answers with 422. The caps (``Settings.max_*``) bound what one request can make the server do:
variables, term order, active qubits of a simulation (the density-matrix memory estimate is
in the message), connectivity size, targets, noise scales.
"""

from __future__ import annotations

import json
import math
import re
import threading
from dataclasses import dataclass
from typing import Any, Mapping

from toposcout.compiler.errors import CapacityError, ModelError, ProfileError, TargetError, ToposcoutError
from toposcout.compiler.devices import parse_device_text
from toposcout.compiler.model import Limits, Model, parse_model
from toposcout.compiler.options import LIMITS
from toposcout.compiler.study import make_tasks, task_key
from toposcout.compiler.targets import BUILTIN_FAMILIES, CONNECTIVITY_FAMILIES, GATE_SETS, check_edge_list, heavy_hex_qubits

from toposcout.service.api.schemas import CONNECTIVITY_PATTERN, ConnectivitySpec, StudyRequest
from toposcout.compiler.profiles import PROFILE_NAMES, load_profile

__all__ = ["Prepared", "prepare", "physical_qubits_of", "safe_filename"]

_CONN = re.compile(CONNECTIVITY_PATTERN)


@dataclass
class Prepared:
    model: Model
    request: dict          # the normalised request (what the study stores)
    tasks: list[dict]
    keys: list[str]


def _gib(n: int) -> str:
    return f"{n / 2**30:.2f} GiB"


def physical_qubits_of(family: str, size: Any, edges: list | None, num_variables: int) -> int:
    """Qubits of a connectivity instance, computed without building it (0: sized to the model)."""
    if family == "custom":
        return 1 + max((max(a, b) for a, b in edges or []), default=0)
    if size is None:
        return 0
    text = str(size).strip().lower()
    try:
        if family == "grid" and "x" in text:
            r, c = text.split("x", 1)
            return int(r) * int(c)
        v = int(text)
    except ValueError:
        return 0  # make_connectivity names the malformed size
    if family == "grid":
        return v * v
    if family == "heavy-hex":
        return heavy_hex_qubits(v)
    return v


def _connectivity(i: int, spec: str | ConnectivitySpec, settings, num_variables: int) -> dict:
    where = f"connectivities[{i}]"
    if isinstance(spec, str):
        if spec.startswith("custom"):
            raise TargetError(f"{where}: the server reads no files; give a custom connectivity as "
                              '{"family": "custom", "edges": [[0, 1], [1, 2], ...]}', field=where)
        if not _CONN.match(spec):
            raise TargetError(f"{where}: {spec[:60]!r} is not FAMILY or FAMILY:SIZE (e.g. line, grid:3x4, "
                              f"heavy-hex:5); families: {', '.join(f for f in CONNECTIVITY_FAMILIES if f != 'custom')}",
                              field=where)
        family, _, size = spec.partition(":")
        d = {"family": family, "size": size or None, "edges": None}
    else:
        d = {"family": spec.family, "size": None if spec.size is None else str(spec.size),
             "edges": [list(e) for e in spec.edges] if spec.edges is not None else None}
        if spec.name is not None:
            if spec.family != "custom":
                raise TargetError(f"{where}.name: only a custom connectivity takes a name", field=f"{where}.name")
            d["name"] = spec.name
        if spec.positions is not None:
            if spec.family != "custom":
                raise TargetError(f"{where}.positions: only a custom connectivity takes positions",
                                  field=f"{where}.positions")
            d["positions"] = [list(p) for p in spec.positions]
        if d["size"] is not None and not re.match(r"^[0-9]{1,4}(x[0-9]{1,4})?$", d["size"]):
            raise TargetError(f"{where}.size: {d['size'][:40]!r} is not a size (e.g. 12, '3x4')", field=f"{where}.size")
    family = d["family"]
    if family not in CONNECTIVITY_FAMILIES:
        raise TargetError(f"{where}: unknown connectivity family {family[:40]!r}; choose one of "
                          f"{', '.join(CONNECTIVITY_FAMILIES)}", field=where)
    if family == "custom":
        if not d["edges"]:
            raise TargetError(f"{where}.edges: a custom connectivity needs a non-empty edge list", field=f"{where}.edges")
        if any(a < 0 or b < 0 for a, b in d["edges"]):
            raise TargetError(f"{where}.edges: qubit indices must be >= 0", field=f"{where}.edges")
        check_edge_list(d["edges"], f"{where}.edges")  # self-loops, repeated edges: named
        d["size"] = None
    elif d["edges"] is not None:
        raise TargetError(f"{where}.edges: only a custom connectivity takes edges", field=f"{where}.edges")
    q = physical_qubits_of(family, d["size"], d["edges"], num_variables)
    if q > settings.max_physical_qubits:
        raise CapacityError(f"{where}: {q} physical qubits is over this server's cap max_physical_qubits="
                            f"{settings.max_physical_qubits}; pick a smaller instance", field=where)
    return d


def _profile(profile: str | dict | list | None) -> str | dict | list | None:
    if profile is None:
        return None
    if isinstance(profile, list):
        if not 1 <= len(profile) <= 8:
            raise ProfileError("profile: give from 1 to 8 profiles", field="profile")
        return [_profile(p) for p in profile]

    if isinstance(profile, str):
        if profile not in PROFILE_NAMES:
            raise ProfileError(f"profile: unknown profile {profile[:60]!r}; built-in profiles: "
                               f"{', '.join(PROFILE_NAMES)} (or send a profile object)", field="profile")
        return profile
    try:
        return load_profile(dict(profile)).to_dict()
    except ProfileError as exc:  # name the request field: profile.<where in the profile>
        where = f"profile.{exc.field}" if exc.field and exc.field != "profile" else "profile"
        raise ProfileError(f"profile: {exc}", field=where) from None


def _device(req: StudyRequest, settings, num_variables: int):
    """The request's device (None without one); errors name ``device.<field>``."""
    if req.device is None:
        return None
    if req.connectivities is not None:
        raise TargetError("connectivities: a device fixes the connectivity; send either device or connectivities",
                          field="connectivities")
    if req.profile is not None:
        raise ProfileError("profile: a device carries its own figures (and base profile); send either device or "
                           "profile", field="profile")

    try:
        dev = parse_device_text(req.device, name="device")
        if dev.num_qubits > settings.max_physical_qubits:
            raise CapacityError(f"qubits: {dev.num_qubits} physical qubits is over this server's cap "
                                f"max_physical_qubits={settings.max_physical_qubits}", field="qubits")
        dev.check_fits(num_variables)
    except ToposcoutError as exc:
        f = exc.field or ""
        field = f if f.startswith("device") else f"device.{f}" if f else "device"
        raise type(exc)(f"device: {exc}", field=field) from None
    return dev


def model_order(model: Model) -> int:
    """The largest term order of the model: its largest clique, cut at ``max_order``."""
    largest = max((len(c) for c in model.cliques), default=1)
    return min(largest, model.max_order) if model.max_order else largest


#: at most this many requests are prepared at once in one process (the API prepares in its
#: preparation processes, ``toposcout.service.api.preparing``, one call each; this bounds other callers)
PREPARE_CONCURRENCY = 2
_preparing = threading.BoundedSemaphore(PREPARE_CONCURRENCY)


def _study_size(n_tasks: int, model_bytes: int, cap: int) -> None:
    """Every task carries the model (its key hashes it, the store keeps it): bound tasks x model size
    (``Settings.max_study_model_bytes``)."""
    if n_tasks * model_bytes > cap:
        raise CapacityError(f"model: {n_tasks} tasks (connectivities x noise_scales) each carrying this "
                            f"{model_bytes}-byte model make {n_tasks * model_bytes} bytes, over this server's cap "
                            f"of max_study_model_bytes={cap}; send fewer targets or noise scales, or a smaller model",
                            field="model")


def _check_study_size(req: StudyRequest, compile_only: bool | None, cap: int) -> None:
    """The tasks x model-size cap estimated from the request as sent (the model's compact JSON,
    or its text), so an oversized study is refused before its model is parsed."""

    only = req.compile_only if compile_only is None else compile_only
    n_tasks = (len(req.connectivities) if req.connectivities is not None else len(BUILTIN_FAMILIES)) * (
        1 if only else len(req.noise_scales))
    raw = req.model if isinstance(req.model, str) else json.dumps(req.model, separators=(",", ":"))
    _study_size(n_tasks, len(raw), cap)


def prepare(req: StudyRequest, settings, **kwargs: Any) -> Prepared:
    """Validate ``req`` against the server's caps and build its tasks (raises ToposcoutError);
    at most :data:`PREPARE_CONCURRENCY` at a time (see :func:`_prepare` for the keywords)."""
    with _preparing:
        return _prepare(req, settings, **kwargs)


def _prepare(req: StudyRequest, settings, *, filename: str | None = None, compile_only: bool | None = None,
             max_targets: int | None = None, keep_circuit: bool = True) -> Prepared:
    model = _request_model(req, settings, filename, compile_only)
    compile_only = req.compile_only if compile_only is None else compile_only
    memory_budget = None if compile_only else _memory_budget(req, settings, model)
    device = _device(req, settings, model.num_variables)
    specs = _targets(req, settings, model, max_targets or settings.max_connectivities)
    scales = _scales(req, settings, compile_only)
    _study_size(len(specs) * len(scales), len(json.dumps(model.to_dict(), separators=(",", ":"))),
                settings.max_study_model_bytes)
    _work_caps(req, settings)
    profile = None if compile_only else _profile(req.profile)
    gate_set = req.gate_set or (device.native_gate if device is not None else "cx")
    options: dict[str, Any] = dict(gate_set=gate_set, strategy=req.strategy, seeds=req.seeds, family=req.family,
                                   layers=req.layers, seed=req.seed, compile_only=compile_only, profile=profile,
                                   keep_circuit=keep_circuit)
    if device is not None:
        options.update(device=device.to_dict(), profile=None)
        specs = None
    options.update(placement=req.placement, regions=req.regions, jitter=req.jitter, jitter_samples=req.jitter_samples)
    if memory_budget is not None:
        options["memory_budget_bytes"] = int(memory_budget)
    if req.fidelity_target is not None and not compile_only:
        options["fidelity_target"] = req.fidelity_target
    if req.requirement_tolerance is not None and not compile_only:
        options["requirement_tolerance"] = req.requirement_tolerance
    if not compile_only:
        options.update(method=req.method, time_budget_seconds=req.time_budget_seconds,
                       trajectories=req.trajectories, precision=req.precision)
    families = list(dict.fromkeys(req.families or [req.family]))
    fit_request = _fit_request(req, model, families, settings) if req.fit is not None else None
    if fit_request is not None:
        options["fit_request"] = fit_request
    tasks = []
    for fam in families:
        tasks += make_tasks(model, specs, noise_scales=scales, **{**options, "family": fam})
    keys = [task_key({**t, "model": model}) for t in tasks]  # the parsed model: no second parse per task
    normalised = {"label": req.label, "model": model.to_dict(), "connectivities": specs, "gate_set": gate_set,
                  "strategy": req.strategy, "profile": profile, "noise_scales": scales, "compile_only": compile_only,
                  "seeds": req.seeds, "family": req.family, "layers": req.layers, "seed": req.seed,
                  "max_order": model.max_order,
                  "fidelity_target": tasks[0].get("fidelity_target") if tasks else None,  # after the one default
                  "requirement_tolerance": req.requirement_tolerance,
                  "method": req.method, "time_budget_seconds": req.time_budget_seconds,
                  "trajectories": req.trajectories, "precision": req.precision,
                  "device": None if device is None else device.to_dict(), "placement": req.placement,
                  "regions": req.regions, "jitter": req.jitter, "jitter_samples": req.jitter_samples}
    if req.families:
        normalised["families"] = families
    if fit_request is not None:
        from toposcout.compiler.fit import data_hash  # scipy and the fit evaluator: only for requests that fit

        normalised["fit"] = {**{k: v for k, v in fit_request.items() if k != "samples"},
                             "data_hash": data_hash(fit_request["samples"]) if fit_request["samples"] else None}
    return Prepared(model=model, request=normalised, tasks=tasks, keys=keys)


def _request_model(req: StudyRequest, settings, filename: str | None, compile_only: bool | None) -> Model:
    """The request's model, parsed within the server's caps (fields named ``model.*``)."""
    limits = Limits(max_variables=settings.max_variables, max_cliques=settings.max_cliques,
                    max_factors=settings.max_factors, max_links=settings.max_links, max_terms=settings.max_terms,
                    max_clique_steps=settings.max_clique_steps)
    if isinstance(req.model, str) and not req.model.strip():
        raise ModelError("model: the model text is empty", field="model")
    _check_study_size(req, compile_only, settings.max_study_model_bytes)  # an estimate before the parse; exact after
    try:
        model = parse_model(req.model, req.model_format, limits=limits, filename=filename)
    except (ModelError, CapacityError) as exc:
        f = exc.field
        field = f"model.{f}" if f and f != "body" and not f.startswith("line") else "model"
        raise type(exc)(f"model: {exc}", field=field) from None
    if req.max_order is not None:
        d = model.to_dict()
        d["max_order"] = req.max_order
        model = Model.from_dict(d, limits=limits)
    order = model_order(model)
    if order > settings.max_order:
        raise CapacityError(f"max_order: the model has terms of order {order} (its largest clique) but this "
                            f"server's cap is max_order={settings.max_order}; send max_order <= {settings.max_order}",
                            field="max_order")
    return model


def _work_caps(req: StudyRequest, settings) -> None:
    """The server's caps on seeds and trajectories per row (at most the library's ranges, ``LIMITS``)."""
    if req.seeds > settings.max_seeds:
        raise CapacityError(f"seeds: {req.seeds} transpiler seeds is over this server's cap max_seeds="
                            f"{settings.max_seeds}; send seeds <= {settings.max_seeds}", field="seeds")
    if req.trajectories is not None and req.trajectories > settings.max_trajectories:
        raise CapacityError(f"trajectories: {req.trajectories} trajectories is over this server's cap "
                            f"max_trajectories={settings.max_trajectories}; send trajectories <= "
                            f"{settings.max_trajectories} or a precision instead", field="trajectories")


def _memory_budget(req: StudyRequest, settings, model: Model) -> int:
    """The simulations' memory budget on this server; a forced density matrix past its cap is refused."""
    from toposcout.compiler.simulate import default_memory_budget_bytes, estimate_memory_bytes  # noise studies only

    cap = settings.max_active_qubits
    n = model.num_variables
    if n > cap and req.method == "density-matrix":
        est = estimate_memory_bytes(n)
        raise CapacityError(
            f"model.variables: the noise study simulates at least {n} active qubits (one per variable) but this "
            f"server's cap is max_active_qubits={cap}: a density matrix of {n} qubits needs about {_gib(est)} "
            f"(16*4^{n} bytes plus overhead; {cap} qubits need {_gib(estimate_memory_bytes(cap))}). "
            "Send method auto, trajectories or clifford, compile_only=true, or use a server with a larger cap",
            field="method")
    budget = settings.memory_budget_bytes or default_memory_budget_bytes()
    return min(budget, estimate_memory_bytes(cap))


def _targets(req: StudyRequest, settings, model: Model, max_targets: int) -> list[dict]:
    """Connectivity specs of the request (every built-in family when none is given) and its gate set checked."""
    conns = req.connectivities
    if conns is not None and len(conns) > max_targets:
        raise CapacityError(f"connectivities: {len(conns)} targets is over this endpoint's cap of {max_targets}",
                            field="connectivities")
    if conns is None:
        specs = [{"family": f, "size": None, "edges": None} for f in BUILTIN_FAMILIES][:max_targets]
    else:
        specs = [_connectivity(i, c, settings, model.num_variables) for i, c in enumerate(conns)]
    if req.gate_set is not None and req.gate_set not in GATE_SETS:
        raise TargetError(f"gate_set: unknown gate set {req.gate_set[:40]!r}; choose one of {', '.join(GATE_SETS)}",
                          field="gate_set")
    return specs


def _scales(req: StudyRequest, settings, compile_only: bool) -> list[float]:
    """The noise scales (one, 1.0, for a compile-only study), each within its limit."""
    scales = [1.0] if compile_only else list(req.noise_scales)
    if len(scales) > settings.max_noise_scales:
        raise CapacityError(f"noise_scales: {len(scales)} scales is over this server's cap of "
                            f"{settings.max_noise_scales}", field="noise_scales")
    for i, s in enumerate(scales):
        LIMITS["noise_scale"].check(s, field=f"noise_scales[{i}]")
    return scales


def _fit_request(req: StudyRequest, model: Model, families: list[str], settings) -> dict:
    """The ``fit`` block checked against the model and the server's cap, as a task's ``fit_request``."""
    from toposcout.compiler.fit import MMD_BANDWIDTHS, check_fit_options, parse_samples  # scipy and the fit evaluator: only for requests that fit

    f = req.fit
    if model.num_variables > settings.max_fit_variables:
        raise CapacityError(f"fit: the model has {model.num_variables} variables but this server fits at most "
                            f"max_fit_variables={settings.max_fit_variables} (the fit is exact: 2**n amplitudes)",
                            field="fit")
    samples = None
    if f.data is not None:
        try:
            samples = parse_samples(f.data, model.variables)
        except ModelError as exc:
            raise ModelError(f"fit.data: {exc}", field="fit.data") from None
    bandwidths = tuple(f.kernel_bandwidths or MMD_BANDWIDTHS)
    for fam in families:
        try:
            check_fit_options(model, family=fam, layers=req.layers, loss=f.loss, samples=samples,
                              restarts=f.restarts, max_iter=f.max_iter, optimizer=f.optimizer, tol=f.tol,
                              bandwidths=bandwidths)
        except (ModelError, CapacityError) as exc:
            field = {"factors": "fit.loss", "data": "fit.data"}.get(exc.field or "", f"fit.{exc.field}")
            raise type(exc)(f"{field}: {exc}", field=field) from None
    if f.loss == "mmd" and samples is None:
        raise ModelError("fit.data: loss mmd needs samples: CSV text with one 0/1 column per variable",
                         field="fit.data")
    return {"loss": f.loss, "restarts": f.restarts, "max_iter": f.max_iter, "tol": f.tol, "optimizer": f.optimizer,
            "seed": req.seed, "bandwidths": list(bandwidths),
            "samples": None if samples is None else [int(x) for x in samples]}


_BAD_NAME = re.compile(r"[\x00-\x1f\x7f/\\]")


def safe_filename(name: str | None) -> str | None:
    """An uploaded file's name if it is a plain file name; raises ModelError otherwise.

    >>> safe_filename("chain.uai")
    'chain.uai'
    >>> safe_filename("../../etc/passwd")
    Traceback (most recent call last):
    ...
    toposcout.compiler.errors.ModelError: file: the file name '../../etc/passwd' must be a plain name without folders, '..' or control characters
    """
    if name is None or name == "":
        return None
    if len(name) > 200 or _BAD_NAME.search(name) or ".." in name or name.strip() in (".", ""):
        raise ModelError(f"file: the file name {name[:80]!r} must be a plain name without folders, '..' or control "
                         "characters", field="file")
    return name


def form_to_request(fields: Mapping[str, list[str]]) -> dict:
    """Form fields (strings, repeated keys) → the JSON request dict (types converted, names checked)."""
    allowed = set(StudyRequest.model_fields) - {"model"}
    out: dict[str, Any] = {}
    for key, values in fields.items():
        if key not in allowed:
            raise ModelError(f"{key[:40]}: unknown form field; known fields: file, {', '.join(sorted(allowed))}",
                             field=key[:40])
        if key == "connectivities":
            out[key] = [c.strip() for v in values for c in v.split(",") if c.strip()]
            continue
        if key == "noise_scales":
            out[key] = [_form_float(key, c) for v in values for c in v.split(",") if c.strip()]
            continue
        if key == "families":
            out[key] = [c.strip() for v in values for c in v.split(",") if c.strip()]
            continue
        if key == "profile" and len(values) > 1:  # a profile chosen several times: rows per profile
            out[key] = [v.strip() for v in values if v.strip()]
            continue
        if len(values) != 1:
            raise ModelError(f"{key}: give this form field once", field=key)
        v = values[0].strip()
        if key in ("seeds", "layers", "seed", "max_order", "trajectories", "regions", "jitter_samples"):
            if v == "" and key in ("max_order", "trajectories", "regions"):
                continue
            try:
                out[key] = int(v)
            except ValueError:
                raise ModelError(f"{key}: {v[:40]!r} is not an integer", field=key) from None
        elif key in ("fidelity_target", "requirement_tolerance", "time_budget_seconds", "precision", "jitter"):
            if v:
                out[key] = _form_float(key, v)
        elif key == "compile_only":
            if v.lower() not in ("true", "false", "1", "0", "yes", "no", "on", "off"):
                raise ModelError(f"{key}: {v[:40]!r} is not true or false", field=key)
            out[key] = v.lower() in ("true", "1", "yes", "on")
        elif key in ("model_format", "profile", "device", "placement", "gate_set") and v == "":
            continue
        elif key == "fit":  # the form's fit field is the loss (kl | mmd); the other fit options keep their defaults
            if v:
                out[key] = {"loss": v}
        else:
            out[key] = v
    return out


def _form_float(key: str, v: str) -> float:
    try:
        x = float(v)
    except ValueError:
        raise ModelError(f"{key}: {v[:40]!r} is not a number", field=key) from None
    if not math.isfinite(x):
        raise ModelError(f"{key}: {v[:40]!r} is not a finite number", field=key)
    return x
