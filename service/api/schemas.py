"""Request and response shapes of the REST API (pydantic v2).

Requests are strict (``false`` is not a number, unknown fields are refused) so a bad request
becomes a 422 naming the field before any work starts. Responses document what the API
returns; rows carry the fields of a ``run_task`` row (``toposcout.compiler.rows``) plus ``task_index``,
``status`` and ``cached``.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from toposcout.compiler.ansatz import FAMILIES
from toposcout.compiler.compile import STRATEGIES
from toposcout.compiler.options import DEFAULT_FIDELITY_TARGET, DEFAULT_REQUIREMENT_TOLERANCE, LIMITS
from toposcout.compiler.rows import ROW_FIELDS
from toposcout.compiler.targets import NAME_PATTERN
from toposcout.service.store import ROW_STATES, STUDY_STATES

__all__ = ["ConnectivitySpec", "FitBlock", "StudyRequest", "ErrorBody", "Progress", "StudySummary", "StudyCreated",
           "Study", "StudyList", "Row", "CompileResponse", "Health", "ConnectivityList", "ProfileList",
           "StudyStatus", "RowStatus", "RowsDocument"]

StudyStatus = Literal[STUDY_STATES]
RowStatus = Literal[ROW_STATES]

_STRICT = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False)

#: a built-in connectivity family, optionally with a size: "line", "grid:3x4", "heavy-hex:5"
CONNECTIVITY_PATTERN = r"^[a-z][a-z-]{0,31}(:[0-9]{1,4}(x[0-9]{1,4})?)?$"


class ConnectivitySpec(BaseModel):
    """A connectivity as an object: a built-in family with an optional size, or ``custom`` with edges."""

    model_config = _STRICT

    family: str = Field(min_length=1, max_length=32, description="a built-in family or 'custom'")
    size: str | int | None = Field(default=None, description="e.g. 12 (line), '3x4' (grid), 5 (heavy-hex)")
    edges: list[Annotated[list[int], Field(min_length=2, max_length=2)]] | None = Field(
        default=None, max_length=5000, description="custom only: undirected edges [a, b] of qubit indices")
    name: str | None = Field(default=None, pattern=f"^{NAME_PATTERN}$",
                             description="custom only: the row name (default custom-Q; two graphs of one size get "
                                         "custom-Q and custom-Q-2); one name for two graphs is refused")
    positions: list[Annotated[list[float], Field(min_length=2, max_length=2)]] | None = Field(
        default=None, max_length=5000, description="custom only: drawing position [x, y] of every qubit (the "
                                                   "dashboard's drawing; default: a planar layout)")


class FitBlock(BaseModel):
    """Fit the angles to the target before the study (each family fitted to the same target)."""

    model_config = _STRICT

    loss: Literal["kl", "mmd"] = Field(default="kl", description="kl: to the model's factor tables; mmd: to data")
    data: str | None = Field(default=None, max_length=2_000_000,
                             description="mmd samples as CSV text: header = variable names, one 0/1 row per sample")
    kernel_bandwidths: list[Annotated[float, Field(gt=0, le=100)]] | None = Field(
        default=None, min_length=1, max_length=8, description="MMD Gaussian kernel bandwidths (null: 0.5, 1, 2)")
    restarts: int = Field(default=3, ge=1, le=10, description="seeded random starts")
    max_iter: int = Field(default=500, ge=1, le=2000, description="iterations per restart")
    tol: float = Field(default=1e-10, ge=0, le=1, description="stop when the loss improves by less than this")
    optimizer: Literal["lbfgs", "adam"] = "lbfgs"


class StudyRequest(BaseModel):
    """What to study: a model, the targets, the options (the JSON body of POST /v1/studies)."""

    model_config = _STRICT

    model: dict[str, Any] | str = Field(
        description="the model: a JSON model object, or the text of a model file (UAI, JSON or node-link)")
    label: str | None = Field(default=None, min_length=1, max_length=80, pattern=r"^[^\x00-\x1f\x7f]+$",
                              description="a label of your choice, shown in the study list and usable as a filter")
    model_format: Literal["json", "uai", "nodelink"] | None = Field(
        default=None, description="default null: guessed from the content")
    connectivities: list[str | ConnectivitySpec] | None = Field(
        default=None, min_length=1, max_length=64,
        description="default null: every built-in family, sized to the model")
    gate_set: str | None = Field(default=None, max_length=32)  # None: the device's native gate, else cx
    strategy: Literal[STRATEGIES] = "auto"
    profile: str | dict[str, Any] | list[str | dict[str, Any]] | None = Field(
        default=None, description="a built-in profile name, or a profile object, or a list of them (one study "
                                  "compares the device classes: rows per profile); null: the default profile")
    noise_scales: list[float] = Field(default_factory=lambda: [1.0], min_length=1, max_length=64,
                                      description="one row per connectivity and scale; every error rate x scale")
    compile_only: bool = Field(default=False, description="skip the noise simulation")
    seeds: int = Field(default=5, **LIMITS["seeds"].pydantic(), description="transpiler seeds tried by the generic strategy")
    family: Literal[FAMILIES] = "clique"
    families: list[Literal[FAMILIES]] | None = Field(
        default=None, min_length=1, max_length=len(FAMILIES),
        description="several families: rows for each (family, connectivity); overrides family")
    fit: FitBlock | None = Field(default=None, description="fit the angles first (null: angles as given)")
    layers: int = Field(default=1, **LIMITS["layers"].pydantic(), description=LIMITS["layers"].meaning)
    seed: int = Field(default=0, **LIMITS["seed"].pydantic(), description="seed of the random angles")
    max_order: int | None = Field(default=None, **LIMITS["max_order"].pydantic(), description="keep only terms of at most this order")
    fidelity_target: float | None = Field(default=None, **LIMITS["fidelity_target"].pydantic(),
                                          description="also find the largest 2q error reaching this state fidelity "
                                                      f"(null: {DEFAULT_FIDELITY_TARGET} with two or more noise "
                                                      "scales, else no requirement)")
    requirement_tolerance: float | None = Field(
        default=None, **LIMITS["requirement_tolerance"].pydantic(),
        description="relative width (upper - lower) / upper at which the requirement's bisection stops "
                    f"(null: {DEFAULT_REQUIREMENT_TOLERANCE}); the row reports the bracket")
    method: Literal["auto", "density-matrix", "trajectories", "clifford"] = Field(
        default="auto", description="how noise figures are computed; auto: density-matrix within the memory budget, "
                                    "else trajectories within time_budget_seconds, else clifford (an estimate)")
    time_budget_seconds: float | None = Field(default=None, **LIMITS["time_budget_seconds"].pydantic(),
                                              description="wall time the noise figures of one row may take "
                                                          "(null: 300)")
    trajectories: int | None = Field(default=None, **LIMITS["trajectories"].pydantic(),
                                     description="trajectories method: run exactly this many trajectories")
    precision: float | None = Field(default=None, **LIMITS["precision"].pydantic(),
                                    description="trajectories method: stop when the state fidelity's standard "
                                                "error is below this (null: 0.01)")
    device: str | None = Field(default=None, max_length=2_000_000,
                               description="the text of a device file (TOML: chip, coordinates, per-qubit and "
                                           "per-coupler figures); fixes the connectivity and the profile")
    placement: Literal["errors", "count"] | None = Field(
        default=None, description="placement objective; null: errors when there are per-element figures, else count")
    regions: int | None = Field(default=None, ge=1, le=50,
                                description="rank this many placements over the chip by ESP; the best 3 are rows")
    jitter: float | None = Field(default=None, ge=0, le=3,
                                 description="log-normal sigma of redrawn figures: the ESP spread under drift")
    jitter_samples: int = Field(default=100, ge=2, le=1000, description="redraws for jitter")


class ErrorBody(BaseModel):
    """Every error: the message names the problem; ``field`` names where (or null)."""

    detail: str
    field: str | None = None


class Progress(BaseModel):
    done: int
    total: int


class StudySummary(BaseModel):
    id: str
    status: StudyStatus
    owner: str
    model_name: str
    created_at: str
    updated_at: str
    progress: Progress
    best_connectivity: str | None = None  # set when the study finishes; live in GET /v1/studies/{id}
    label: str | None = None
    connectivities: list[str] = Field(default_factory=list, description="the study's connectivities as requested")
    profiles: list[str] = Field(default_factory=list, description="profile names (empty: compile-only)")
    noise_scales: list[float] = Field(default_factory=list)


class StudyCreated(BaseModel):
    id: str
    url: str
    status: StudyStatus
    progress: Progress


_JSON_TYPES = {"int": "integer", "float": "number", "str": "string", "bool": "boolean", "object": "object",
               "list": "array"}


def _document_row_fields(schema: dict[str, Any]) -> None:
    """Every field of the row definition in the schema, with its meaning and unit (rows keep extras)."""
    props = schema.setdefault("properties", {})
    for f in ROW_FIELDS:
        if f.name not in props:
            props[f.name] = {"anyOf": [{"type": _JSON_TYPES[f.kind]}, {"type": "null"}],
                             "description": f.meaning + (f" ({f.unit})" if f.unit else "")}


class Row(BaseModel):
    """One task's row: ``task_index``, ``status``, ``cached`` and the fields of ``run_task``'s row
    (defined with meaning and unit in ``toposcout.compiler.rows``; a field that does not apply is absent)."""

    model_config = ConfigDict(extra="allow", json_schema_extra=_document_row_fields)

    task_index: int
    status: RowStatus
    cached: bool
    connectivity: str | None = None
    error: str | None = None
    error_field: str | None = None


class Study(StudySummary):
    request: dict[str, Any]
    rows: list[Row]


class StudyList(BaseModel):
    items: list[StudySummary]
    total: int
    limit: int
    offset: int


class RowsDocument(BaseModel):
    id: str
    model_name: str
    status: StudyStatus
    rows: list[Row]


class CompileResponse(BaseModel):
    rows: list[Row]


class Health(BaseModel):
    status: Literal["ok"]
    version: str
    database: str
    executor: str


class ConnectivityInfo(BaseModel):
    name: str
    description: str
    sizing: str
    size: str


class GateSetInfo(BaseModel):
    name: str
    description: str


class ConnectivityList(BaseModel):
    connectivities: list[ConnectivityInfo]
    gate_sets: list[GateSetInfo]


class ProfileInfo(BaseModel):
    name: str
    description: str


class ProfileList(BaseModel):
    default: str
    profiles: list[ProfileInfo]
