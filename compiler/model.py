"""Models: Markov networks over binary variables, read from three formats.

* our JSON model format (``compiler/model.schema.json``; :func:`model_schema`),
* the UAI format of the probabilistic-inference community (``MARKOV`` preamble,
  binary variables only),
* networkx node-link JSON (the cliques are the graph's maximal cliques).

Conventions: variable ``i`` of a model is logical qubit ``i`` and classical bit ``i``.
Factor values and distributions are little-endian: entry ``x = sum_j b_j * 2**j``
where ``b_j`` is the value of ``scope[j]`` (of ``variables[j]`` for a distribution).

Examples:
    >>> m = parse_model({"name": "door-chain", "variables": ["d0", "d1", "d2"],
    ...                  "cliques": [["d0", "d1"], ["d1", "d2"]]})
    >>> m.num_variables, m.cliques
    (3, (('d0', 'd1'), ('d1', 'd2')))
    >>> parse_model({"variables": ["a", "a"]})
    Traceback (most recent call last):
    ...
    toposcout.compiler.errors.ModelError: variables[1]: duplicate variable name 'a' (first at variables[0]); every variable needs its own name
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources
from itertools import combinations
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from toposcout.compiler.errors import CapacityError, ModelError

__all__ = [
    "Factor",
    "Model",
    "Limits",
    "parse_model",
    "load_model",
    "model_schema",
    "target_distribution",
    "count_terms",
    "detect_format",
    "MAX_EXACT_VARIABLES",
]

#: the largest model whose target distribution is computed exactly (2**20 entries).
MAX_EXACT_VARIABLES = 20


@dataclass(frozen=True)
class Limits:
    """Caps checked before any expensive work.

    max_variables: default 128; more variables are refused.
    max_clique_size: default 16; a larger clique without ``max_order`` is refused
        (its 2**k - 1 subsets would explode).
    max_terms: default 20000; the number of terms (before de-duplication) after
        ``max_order`` is applied.
    max_order: default 16; the largest ``max_order`` a model may set (the request's cap).
    max_cliques: default 4096; cliques of a JSON model, maximal cliques of a node-link graph.
    max_factors: default 4096; factors of a JSON model, functions of a UAI file.
    max_links: default 20000; links of a node-link graph.
    max_angle: default 1e6 rad; the largest |angle| in ``parameters`` (exp(-iθZ_S) has period
        2π, u(θ, φ, λ) period 2π in each angle up to a global phase; above 1e6 rad the reduction
        in double precision loses more than 1e-10 rad, and 1e308 overflows 2θ to infinity).
    max_clique_steps: default 200000; calls of the clique enumeration (a work budget).

    Every cap is checked as the input is read, before anything of its size is allocated.
    """

    max_variables: int = 128
    max_clique_size: int = 16
    max_terms: int = 20000
    max_order: int = 16
    max_cliques: int = 4096
    max_factors: int = 4096
    max_links: int = 20000
    max_angle: float = 1e6
    max_clique_steps: int = 200_000


@dataclass(frozen=True)
class Factor:
    """A positive potential over ``scope``; ``values`` little-endian over the scope."""

    scope: tuple[str, ...]
    values: tuple[float, ...]

    def to_dict(self) -> dict:
        return {"scope": list(self.scope), "values": list(self.values)}


@dataclass(frozen=True)
class Model:
    """A Markov network over binary variables.

    ``cliques`` are tuples of variable names in variable order; every variable is in
    at least one clique (an isolated variable is its own one-variable clique).
    ``parameters`` (optional) holds trained angles: ``{"terms": {"a,b": θ | [θ per layer]},
    "rotations": {"a": [θ, φ, λ] | [[θ, φ, λ] per layer]}}``.
    """

    name: str
    variables: tuple[str, ...]
    cliques: tuple[tuple[str, ...], ...]
    factors: tuple[Factor, ...] = ()
    parameters: Mapping[str, Any] | None = field(default=None, compare=True, hash=False)
    max_order: int | None = None

    @property
    def num_variables(self) -> int:
        return len(self.variables)

    def index(self, name: str) -> int:
        """The logical qubit of variable ``name``."""
        return self.variables.index(name)

    def edges(self) -> list[tuple[int, int]]:
        """Pairs of variables that share a clique (the model's interaction graph)."""
        pos = {v: i for i, v in enumerate(self.variables)}
        out = set()
        for c in self.cliques:
            for a, b in combinations(c, 2):
                out.add((min(pos[a], pos[b]), max(pos[a], pos[b])))
        return sorted(out)

    def to_dict(self) -> dict:
        """The model in our JSON format (normalised: what the cache key hashes)."""
        d: dict[str, Any] = {
            "name": self.name,
            "variables": list(self.variables),
            "cliques": [list(c) for c in self.cliques],
        }
        if self.factors:
            d["factors"] = [f.to_dict() for f in self.factors]
        if self.parameters:
            d["parameters"] = json.loads(json.dumps(self.parameters))
        if self.max_order is not None:
            d["max_order"] = self.max_order
        return d

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], *, limits: Limits | None = None) -> "Model":
        return parse_model(dict(d), "json", limits=limits or Limits())


@lru_cache(maxsize=1)
def model_schema() -> dict:
    """The JSON Schema of our model format (also served at ``GET /v1/schema/model``)."""
    text = resources.files(__package__).joinpath("model.schema.json").read_text()
    return json.loads(text)


def _reject_constant(token: str):
    raise ModelError(
        f"invalid JSON number {token}: NaN and Infinity are not numbers in JSON; give a finite value",
        field="body",
    )


#: the most objects and arrays a model text may hold, counted before it is decoded (a node-link
#: graph at the link cap holds about 20000; 4 MB of ``{}`` would decode to ~160 MB of dicts)
MAX_JSON_CONTAINERS = 100_000


def _loads_json(text: str, what: str = "model") -> Any:
    containers = text.count("{") + text.count("[")
    if containers > MAX_JSON_CONTAINERS:
        raise CapacityError(f"the {what} holds {containers} JSON objects and arrays, more than the cap of "
                            f"{MAX_JSON_CONTAINERS}", field="body")
    try:
        return json.loads(text, parse_constant=_reject_constant)
    except json.JSONDecodeError as exc:
        raise ModelError(
            f"line {exc.lineno} column {exc.colno}: the {what} is not valid JSON ({exc.msg})",
            field=f"line {exc.lineno}",
        ) from None


def detect_format(source: str | Mapping[str, Any], filename: str | None = None) -> str:
    """Guess ``json``, ``uai`` or ``nodelink`` from a file name or the content."""
    if filename:
        suffix = Path(filename).suffix.lower()
        if suffix == ".uai":
            return "uai"
    if isinstance(source, Mapping):
        obj = source
    else:
        stripped = source.lstrip()
        if not stripped:
            raise ModelError("the model is empty: give a JSON model, a UAI file or a node-link graph", field="body")
        if stripped[0] not in "{[":
            return "uai"
        obj = _loads_json(source)
    if isinstance(obj, Mapping) and "nodes" in obj and ("links" in obj or "edges" in obj):
        return "nodelink"
    return "json"


def parse_model(
    source: str | Mapping[str, Any],
    fmt: str | None = None,
    *,
    name: str | None = None,
    limits: Limits | None = None,
    filename: str | None = None,
) -> Model:
    """Parse and validate a model.

    source: the file text, or an already decoded JSON object.
    fmt: ``"json"``, ``"uai"``, ``"nodelink"`` or None (default: guessed by
        :func:`detect_format`).
    name: default None: the name in the file, else the file name, else ``"model"``.
    limits: default :class:`Limits()`.

    Raises :class:`ModelError` (naming the field or line) or :class:`CapacityError`.
    """
    limits = limits or Limits()
    fmt = fmt or detect_format(source, filename)
    default_name = name or (Path(filename).stem if filename else None)
    if fmt == "uai":
        if not isinstance(source, str):
            raise ModelError("a UAI model must be given as text", field="body")
        obj = _uai_to_dict(source, limits)
    else:
        obj = _loads_json(source) if isinstance(source, str) else source
        if fmt == "nodelink":
            obj = _nodelink_to_dict(obj, limits)
        elif fmt != "json":
            raise ModelError(f"unknown model format {fmt!r}; use json, uai or nodelink", field="format")
    if not isinstance(obj, Mapping):
        raise ModelError("the model must be a JSON object with at least 'variables'", field="body")
    obj = dict(obj)
    if default_name and not obj.get("name"):
        obj["name"] = default_name
    return _build(obj, limits)


def load_model(path: str | Path, *, limits: Limits | None = None, fmt: str | None = None) -> Model:
    """Read a model file (format from the suffix ``.uai``, else from the content)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ModelError(f"model file {str(p)!r} does not exist", field="model") from None
    except IsADirectoryError:
        raise ModelError(f"{str(p)!r} is a directory, not a model file", field="model") from None
    except UnicodeDecodeError:
        raise ModelError(f"model file {str(p)!r} is not UTF-8 text", field="model") from None
    return parse_model(text, fmt, limits=limits, filename=p.name)


# --------------------------------------------------------------------------- validation


def _path(parts: tuple) -> str:
    out = ""
    for p in parts:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else str(p))
    return out or "body"


def _schema_view(obj: Mapping[str, Any]) -> Mapping[str, Any]:
    """``obj`` with each factor's values cut to their first two: the schema says no more about the
    rest than that they are positive numbers, which :func:`_build` checks entry by entry (naming
    the entry) far faster than the schema validator."""
    factors = obj.get("factors")
    if not isinstance(factors, list):
        return obj
    short = [dict(f, values=f["values"][:2]) if isinstance(f, Mapping) and isinstance(f.get("values"), list)
             and len(f["values"]) > 2 else f for f in factors]
    return {**obj, "factors": short}


def _schema_check(obj: Mapping[str, Any]) -> None:
    import jsonschema

    validator = jsonschema.Draft202012Validator(model_schema())
    errors = sorted(validator.iter_errors(_schema_view(obj)), key=lambda e: (len(e.absolute_path), list(map(str, e.absolute_path))))
    if errors:
        err = errors[0]
        where = _path(tuple(err.absolute_path))
        msg = err.message
        if err.validator == "pattern":
            msg = (f"{err.instance!r} is not a valid variable name: use letters, digits, _ . : - "
                   f"(at most 64 characters, no spaces or commas)")
        elif err.validator == "exclusiveMinimum":
            msg = f"{err.instance!r}: potentials must be finite and positive"
        elif err.validator == "additionalProperties":
            msg = f"{msg}; the model format knows name, description, variables, cliques, factors, parameters, max_order"
        raise ModelError(f"{where}: {msg}", field=where)


def _finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def count_terms(clique_sizes: list[int], max_order: int | None) -> int:
    """Upper bound of the number of terms: sum over cliques of the subsets up to max_order."""
    total = 0
    for k in clique_sizes:
        top = k if max_order is None else min(k, max_order)
        total += sum(math.comb(k, r) for r in range(1, top + 1))
    return total


#: the most entries in all of a model's cliques, of its factor tables, of its parameters
#: (each is checked by the schema validator at a few microseconds an entry)
MAX_ENTRIES = 65536


def _precheck(obj: Mapping[str, Any], limits: Limits) -> None:
    """The sizes of a decoded model against the caps, before the schema check and any loop
    over the contents (each list's length is known without walking it)."""
    cliques = obj.get("cliques")
    if isinstance(cliques, list) and len(cliques) > limits.max_cliques:
        raise CapacityError(f"the model lists {len(cliques)} cliques, more than the cap of {limits.max_cliques} "
                            "on cliques; merge cliques or split the model", field="cliques")
    if isinstance(cliques, list):
        members = sum(len(c) for c in cliques if isinstance(c, list))
        if members > MAX_ENTRIES:
            raise CapacityError(f"the model's cliques list {members} variables in all, more than the cap of "
                                f"{MAX_ENTRIES}", field="cliques")
    factors = obj.get("factors")
    if isinstance(factors, list):
        if len(factors) > limits.max_factors:
            raise CapacityError(f"the model lists {len(factors)} factors, more than the cap of "
                                f"{limits.max_factors} on factors", field="factors")
        entries = sum(len(f["values"]) for f in factors if isinstance(f, Mapping) and isinstance(f.get("values"), list))
        if entries > MAX_ENTRIES:
            raise CapacityError(f"the model's factor tables hold {entries} entries in all, more than the cap of "
                                f"{MAX_ENTRIES}", field="factors")
        for fi, f in enumerate(factors):
            if not isinstance(f, Mapping):
                continue
            scope, values = f.get("scope"), f.get("values")
            if isinstance(scope, list) and len(scope) > limits.max_clique_size:
                raise CapacityError(f"factors[{fi}].scope has {len(scope)} variables, more than the cap of "
                                    f"{limits.max_clique_size} on a factor's scope (its table would have "
                                    f"2**{len(scope)} entries)", field=f"factors[{fi}].scope")
            if isinstance(values, list) and len(values) > 2 ** limits.max_clique_size:
                raise CapacityError(f"factors[{fi}].values has {len(values)} entries, more than the cap of "
                                    f"2**{limits.max_clique_size}", field=f"factors[{fi}].values")
    mo = obj.get("max_order")
    if isinstance(mo, int) and not isinstance(mo, bool) and mo > limits.max_order:
        raise CapacityError(f"max_order: the model sets max_order={mo}, more than the cap of {limits.max_order} "
                            "(the same cap as the request's max_order)", field="max_order")
    params = obj.get("parameters")
    if isinstance(params, Mapping):
        for table in ("terms", "rotations"):
            t = params.get(table)
            cap = limits.max_terms if table == "terms" else limits.max_variables
            if isinstance(t, Mapping) and len(t) > cap:
                raise CapacityError(f"parameters.{table} has {len(t)} entries, more than the cap of {cap}",
                                    field=f"parameters.{table}")
            if isinstance(t, Mapping):
                numbers = sum(len(v) if isinstance(v, list) else 1 for v in t.values())
                if numbers > MAX_ENTRIES:
                    raise CapacityError(f"parameters.{table} holds about {numbers} angles, more than the cap of "
                                        f"{MAX_ENTRIES}", field=f"parameters.{table}")
                for key, val in t.items():
                    if isinstance(val, list) and len(val) > 64:
                        raise CapacityError(f"parameters.{table}[{str(key)[:40]!r}] lists {len(val)} layers, more "
                                            "than the cap of 64", field=f"parameters.{table}.{str(key)[:40]}")


def _by_variable(sets: list[frozenset]) -> dict[str, list[frozenset]]:
    """Each variable → the sets that contain it (for subset tests without a pairwise loop)."""
    out: dict[str, list[frozenset]] = {}
    for s in sets:
        for v in s:
            out.setdefault(v, []).append(s)
    return out


def _inside_some(s: frozenset, index: Mapping[Any, list[frozenset]], *, proper: bool = False) -> bool:
    """Whether ``s`` is a subset (``proper``: a proper subset) of a set in ``index``; only the
    sets holding the rarest member of ``s`` are looked at."""
    if not s:
        return True
    bucket = min((index.get(v, ()) for v in s), key=len)
    return any((s < c) if proper else (s <= c) for c in bucket)


def _build(obj: Mapping[str, Any], limits: Limits) -> Model:
    variables = obj.get("variables")
    if variables is None or (isinstance(variables, list) and not variables):
        raise ModelError("the model has no variables: list at least one variable name in 'variables'", field="variables")
    if isinstance(variables, list) and len(variables) > limits.max_variables:
        raise CapacityError(
            f"the model has {len(variables)} variables, more than the cap of {limits.max_variables}; "
            f"split the model or raise the cap on variables",
            field="variables",
        )
    # duplicate names first: a clearer message than the schema's
    if isinstance(variables, list):
        seen: dict[str, int] = {}
        for i, v in enumerate(variables):
            if isinstance(v, str) and v in seen:
                raise ModelError(
                    f"variables[{i}]: duplicate variable name {v!r} (first at variables[{seen[v]}]); "
                    f"every variable needs its own name",
                    field=f"variables[{i}]",
                )
            if isinstance(v, str):
                seen[v] = i
    _precheck(obj, limits)
    _schema_check(obj)
    names = tuple(variables)
    pos = {v: i for i, v in enumerate(names)}
    max_order = obj.get("max_order")

    cliques: list[tuple[str, ...]] = []
    in_clique: set[str] = set()
    for ci, clique in enumerate(obj.get("cliques", [])):
        seen_c: set[str] = set()
        for vi, v in enumerate(clique):
            if v not in pos:
                raise ModelError(
                    f"cliques[{ci}][{vi}]: unknown variable {v!r}; declare it in 'variables' or fix the name",
                    field=f"cliques[{ci}][{vi}]",
                )
            if v in seen_c:
                raise ModelError(
                    f"cliques[{ci}]: variable {v!r} is repeated in the clique; list each variable once",
                    field=f"cliques[{ci}]",
                )
            seen_c.add(v)
        if len(clique) > limits.max_clique_size and max_order is None:
            raise CapacityError(
                f"cliques[{ci}] has {len(clique)} variables, more than the cap of {limits.max_clique_size} on "
                f"clique size: its {2 ** len(clique) - 1} subsets would each become a term; set 'max_order' "
                f"(for example 2 or 3) to keep only low-order terms",
                field=f"cliques[{ci}]",
            )
        cliques.append(tuple(sorted(clique, key=pos.__getitem__)))
        in_clique.update(clique)
    for v in names:
        if v not in in_clique:
            cliques.append((v,))
    n_terms = count_terms([len(c) for c in cliques], max_order)
    if n_terms > limits.max_terms:
        raise CapacityError(
            f"the model would have {n_terms} terms, more than the cap of {limits.max_terms} on the term count; "
            f"set a lower 'max_order' (now {max_order}) or use smaller cliques",
            field="max_order" if max_order is not None else "cliques",
        )

    clique_index = _by_variable([frozenset(c) for c in cliques])
    factors: list[Factor] = []
    for fi, f in enumerate(obj.get("factors", [])):
        scope = f["scope"]
        seen_s: set[str] = set()
        for si, v in enumerate(scope):
            if v not in pos:
                raise ModelError(
                    f"factors[{fi}].scope[{si}]: unknown variable {v!r}; declare it in 'variables'",
                    field=f"factors[{fi}].scope[{si}]",
                )
            if v in seen_s:
                raise ModelError(f"factors[{fi}].scope: variable {v!r} is repeated", field=f"factors[{fi}].scope")
            seen_s.add(v)
        if not _inside_some(frozenset(seen_s), clique_index):
            raise ModelError(
                f"factors[{fi}].scope {scope} is not inside any clique; add a clique that contains it",
                field=f"factors[{fi}].scope",
            )
        values = f["values"]
        want = 2 ** len(scope)
        if len(values) != want:
            raise ModelError(
                f"factors[{fi}].values has {len(values)} entries but a factor over {len(scope)} binary "
                f"variables needs 2**{len(scope)} = {want}",
                field=f"factors[{fi}].values",
            )
        for vi, x in enumerate(values):
            if not _finite(x) or x <= 0:
                raise ModelError(
                    f"factors[{fi}].values[{vi}] = {x!r}: potentials must be finite and positive",
                    field=f"factors[{fi}].values[{vi}]",
                )
        factors.append(Factor(tuple(scope), tuple(float(x) for x in values)))

    params = obj.get("parameters")
    if params:
        _check_parameters(params, pos, limits.max_angle)
    return Model(
        name=str(obj.get("name") or "model"),
        variables=names,
        cliques=tuple(cliques),
        factors=tuple(factors),
        parameters=params or None,
        max_order=max_order,
    )


def _angle_bound(x: float, bound: float, what: str, where: str) -> None:
    if abs(x) > bound:
        raise ModelError(f"{what}: angle {x!r} rad is over the bound of {bound:g} rad; the rotation has period "
                         f"2π, so give the angle reduced modulo 2π (math.remainder(x, 2*math.pi))", field=where)


def _check_parameters(params: Mapping[str, Any], pos: Mapping[str, int], bound: float = 1e6) -> None:
    for key, val in params.get("terms", {}).items():
        parts = key.split(",")
        for p in parts:
            if p.strip() not in pos:
                raise ModelError(
                    f"parameters.terms[{key!r}]: unknown variable {p.strip()!r}; keys are variable names joined "
                    f"with commas, e.g. \"a,b\"",
                    field=f"parameters.terms.{key}",
                )
        if len({p.strip() for p in parts}) != len(parts):
            raise ModelError(f"parameters.terms[{key!r}]: a variable is repeated", field=f"parameters.terms.{key}")
        for x in val if isinstance(val, list) else [val]:
            if not _finite(x):
                raise ModelError(f"parameters.terms[{key!r}]: angle {x!r} is not a finite number",
                                 field=f"parameters.terms.{key}")
            _angle_bound(x, bound, f"parameters.terms[{key!r}]", f"parameters.terms.{key}")
    for key, val in params.get("rotations", {}).items():
        if key not in pos:
            raise ModelError(f"parameters.rotations[{key!r}]: unknown variable", field=f"parameters.rotations.{key}")
        flat = val if not isinstance(val[0], list) else [x for tri in val for x in tri]
        for x in flat:
            if not _finite(x):
                raise ModelError(f"parameters.rotations[{key!r}]: angle {x!r} is not a finite number",
                                 field=f"parameters.rotations.{key}")
            _angle_bound(x, bound, f"parameters.rotations[{key!r}]", f"parameters.rotations.{key}")


# --------------------------------------------------------------------------- UAI


def _uai_tokens(text: str):
    """The tokens of a UAI file with their line numbers, one at a time (nothing is listed ahead)."""
    line, last = 1, 0
    for m in _TOKEN.finditer(text):
        line += text.count("\n", last, m.start())
        last = m.start()
        yield m.group(), line


_TOKEN = re.compile(r"\S+")
_INT = re.compile(r"[+-]?[0-9]{1,12}")


def _uai_to_dict(text: str, limits: Limits | None = None) -> dict:
    """Read a UAI ``MARKOV`` file (binary variables) into our JSON model form.

    UAI tables list entries with the last variable of a function's scope changing
    fastest; our factors are little-endian over the scope, so the order is converted.
    The file is read token by token and every count (variables, functions, scope sizes,
    table sizes) is checked against ``limits`` as it is read, before anything of that size exists.
    """
    limits = limits or Limits()
    tokens = _uai_tokens(text)
    last_line = 1

    def take(what: str) -> tuple[str, int]:
        nonlocal last_line
        tok = next(tokens, None)
        if tok is None:
            raise ModelError(f"line {last_line}: the UAI file ends early; expected {what}", field=f"line {last_line}")
        last_line = tok[1]
        return tok

    def take_int(what: str, minimum: int = 0) -> tuple[int, int]:
        tok, line = take(what)
        if not _INT.fullmatch(tok):
            raise ModelError(f"line {line}: expected {what} (an integer), found {tok[:40]!r}", field=f"line {line}")
        v = int(tok)
        if v < minimum:
            raise ModelError(f"line {line}: {what} must be at least {minimum}, found {v}", field=f"line {line}")
        return v, line

    first = next(tokens, None)
    if first is None:
        raise ModelError("the UAI file is empty", field="line 1")
    kind, line = first
    if kind.upper() != "MARKOV":
        raise ModelError(
            f"line {line}: the UAI preamble is {kind[:40]!r}; toposcout reads Markov networks only (preamble MARKOV)",
            field=f"line {line}",
        )
    n, line = take_int("the number of variables", 1)
    if n > limits.max_variables:
        raise CapacityError(
            f"line {line}: the UAI file declares {n} variables, more than the cap of {limits.max_variables}; "
            "split the model or raise the cap on variables",
            field="variables",
        )
    names = [f"v{i}" for i in range(n)]
    for i in range(n):
        card, cline = take_int(f"the cardinality of variable {i}", 1)
        if card != 2:
            raise ModelError(
                f"line {cline}: variable {i} has cardinality {card}; toposcout supports binary variables only",
                field=f"line {cline}",
            )
    m, line = take_int("the number of functions", 0)
    if m > limits.max_factors:
        raise CapacityError(f"line {line}: the UAI file declares {m} functions, more than the cap of "
                            f"{limits.max_factors} on factors", field="factors")
    scopes: list[list[int]] = []
    for fi in range(m):
        k, sline = take_int(f"the scope size of function {fi}", 1)
        if k > n:
            raise ModelError(f"line {sline}: function {fi} has a scope of {k} variables, but the file declares "
                             f"{n} variables", field=f"line {sline}")
        if k > limits.max_clique_size:
            raise CapacityError(f"line {sline}: function {fi} has a scope of {k} variables, more than the cap of "
                                f"{limits.max_clique_size} on a factor's scope (its table would have 2**{k} entries)",
                                field="factors")
        scope = []
        for _ in range(k):
            v, vline = take_int(f"a variable index of function {fi}", 0)
            if v >= n:
                raise ModelError(
                    f"line {vline}: function {fi} names variable {v}, but the file declares {n} variables (0..{n - 1})",
                    field=f"line {vline}",
                )
            if v in scope:
                raise ModelError(f"line {vline}: function {fi} repeats variable {v}", field=f"line {vline}")
            scope.append(v)
        scopes.append(scope)
    factors = []
    for fi, scope in enumerate(scopes):
        size, sline = take_int(f"the table size of function {fi}", 1)
        want = 2 ** len(scope)
        if size != want:
            raise ModelError(
                f"line {sline}: function {fi} has a table of {size} entries but its {len(scope)} binary "
                f"variables need {want}",
                field=f"line {sline}",
            )
        raw = []
        for _ in range(size):
            tok, vline = take(f"a table entry of function {fi}")
            try:
                x = float(tok)
            except ValueError:
                raise ModelError(f"line {vline}: table entry {tok[:40]!r} of function {fi} is not a number",
                                 field=f"line {vline}") from None
            if not math.isfinite(x) or x <= 0:
                raise ModelError(
                    f"line {vline}: table entry {tok[:40]} of function {fi} must be finite and positive",
                    field=f"line {vline}",
                )
            raw.append(x)
        k = len(scope)
        # UAI index u has scope[0] as the most significant bit; ours has it least significant.
        values = [0.0] * size
        for u, x in enumerate(raw):
            ours = sum(((u >> (k - 1 - j)) & 1) << j for j in range(k))
            values[ours] = x
        factors.append({"scope": [names[v] for v in scope], "values": values})
    extra = next(tokens, None)
    if extra is not None:
        tok, line = extra
        raise ModelError(f"line {line}: unexpected extra content {tok[:40]!r} after the last table",
                         field=f"line {line}")
    # The cliques are the function scopes (sub-scopes of a larger scope add no structure);
    # a scope is dropped when it repeats an earlier one or lies inside another.
    sets = [frozenset(sc) for sc in scopes]
    index = _by_variable(list(dict.fromkeys(sets)))
    cliques: list[list[str]] = []
    seen_sets: set[frozenset] = set()
    for sc, st in zip(scopes, sets):
        if st in seen_sets or _inside_some(st, index, proper=True):
            continue
        seen_sets.add(st)
        cliques.append([names[v] for v in sc])
    return {"variables": names, "cliques": cliques, "factors": factors}


def to_uai(model: Model) -> str:
    """Write a model with factors as a UAI ``MARKOV`` file (variables in model order)."""
    pos = {v: i for i, v in enumerate(model.variables)}
    lines = ["MARKOV", str(model.num_variables), " ".join("2" for _ in model.variables)]
    factors = list(model.factors) or [Factor(c, tuple([1.0] * 2 ** len(c))) for c in model.cliques]
    lines.append(str(len(factors)))
    for f in factors:
        lines.append(" ".join([str(len(f.scope))] + [str(pos[v]) for v in f.scope]))
    for f in factors:
        k = len(f.scope)
        raw = [f.values[sum(((u >> (k - 1 - j)) & 1) << j for j in range(k))] for u in range(2**k)]
        lines += ["", str(len(raw)), " ".join(repr(x) for x in raw)]
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------- node-link


def maximal_cliques(adjacency: list[int], *, max_cliques: int, max_steps: int, field: str = "links") -> list[list[int]]:
    """The maximal cliques of a graph on vertices ``0..n-1`` (``adjacency[v]``: a bit mask of v's
    neighbours), by Bron–Kerbosch with Tomita's pivot (the choice networkx.find_cliques makes),
    counted as it goes: more than ``max_cliques`` cliques or ``max_steps`` expansions raise a
    :class:`CapacityError` naming the cap, so a graph with exponentially many cliques
    (3^(n/3) for n/3 disjoint triples' complement) costs at most the budget.

    >>> maximal_cliques([0b110, 0b101, 0b011, 0b0000], max_cliques=10, max_steps=100)
    [[0, 1, 2], [3]]
    """
    n = len(adjacency)
    out: list[list[int]] = []
    if n == 0:
        return out
    stack: list[tuple[tuple[int, ...], int, int]] = [((), (1 << n) - 1, 0)]
    steps = 0
    while stack:
        r, p, x = stack.pop()
        steps += 1
        if steps > max_steps:
            raise CapacityError(f"the graph's clique enumeration took more than {max_steps} steps, the cap "
                                "max_clique_steps; the graph has too many maximal cliques to be a model "
                                "(use fewer links or a JSON model with explicit cliques)", field=field)
        if not p:
            if not x:
                out.append(sorted(r))
                if len(out) > max_cliques:
                    raise CapacityError(f"the graph has more than {max_cliques} maximal cliques, the cap "
                                        "max_cliques on cliques; use fewer links or a JSON model with explicit "
                                        "cliques", field=field)
            continue
        px = p | x
        pivot, best = -1, -1
        while px:
            low = px & -px
            u = low.bit_length() - 1
            px ^= low
            c = (p & adjacency[u]).bit_count()
            if c > best:
                pivot, best = u, c
        cand = p & ~adjacency[pivot]
        children = []
        while cand:
            low = cand & -cand
            v = low.bit_length() - 1
            cand ^= low
            children.append((r + (v,), p & adjacency[v], x & adjacency[v]))
            p &= ~low
            x |= low
        stack.extend(reversed(children))
    return sorted(out)


def _nodelink_to_dict(obj: Mapping[str, Any], limits: Limits | None = None) -> dict:
    import networkx as nx

    limits = limits or Limits()
    if not isinstance(obj, Mapping) or not isinstance(obj.get("nodes"), list):
        raise ModelError("a node-link graph needs a 'nodes' list", field="nodes")
    key = "links" if "links" in obj else "edges"
    if len(obj["nodes"]) > limits.max_variables:
        raise CapacityError(f"the graph has {len(obj['nodes'])} nodes, more than the cap of {limits.max_variables} "
                            "on variables (one variable per node)", field="nodes")
    if not isinstance(obj.get(key), list):
        raise ModelError(f"a node-link graph needs a '{key}' list", field=key)
    if len(obj[key]) > limits.max_links:
        raise CapacityError(f"the graph has {len(obj[key])} {key}, more than the cap of {limits.max_links} "
                            f"on {key}", field=key)
    # networkx adds a node for a link end it has not seen; a model's variables are its declared nodes
    declared = {n.get("id") if isinstance(n, Mapping) else None for n in obj["nodes"]}
    links = obj.get(key)
    for i, link in enumerate(links if isinstance(links, list) else []):
        if not isinstance(link, Mapping):
            continue
        for end in ("source", "target"):
            v = link.get(end)
            if end in link and _hashable(v) and v not in declared:
                raise ModelError(f"{key}[{i}].{end}: node {v!r} is not declared in 'nodes'",
                                 field=f"{key}[{i}].{end}")
    try:
        g = nx.node_link_graph(dict(obj), edges=key)
    except (KeyError, TypeError, ValueError, AttributeError, nx.NetworkXError) as exc:
        raise ModelError(f"not a valid node-link graph: {str(exc)[:200]}; each node needs an 'id', each link a "
                         f"'source' and a 'target'", field=key) from None
    if g.number_of_nodes() > limits.max_variables:  # links may name nodes that are not listed
        raise CapacityError(f"the graph's links name {g.number_of_nodes()} nodes, more than the cap of "
                            f"{limits.max_variables} on variables", field=key)
    if g.is_directed() or g.is_multigraph():
        g = nx.Graph(g)
    names = [str(v) for v in g.nodes]
    if len(set(names)) != len(names):
        raise ModelError("node ids collide once turned into names", field="nodes")
    order = {v: i for i, v in enumerate(g.nodes)}
    adjacency = [0] * len(names)
    for a, b in g.edges:
        if a != b:
            adjacency[order[a]] |= 1 << order[b]
            adjacency[order[b]] |= 1 << order[a]
    cliques = maximal_cliques(adjacency, max_cliques=limits.max_cliques, max_steps=limits.max_clique_steps, field=key)
    out: dict[str, Any] = {"variables": names, "cliques": [[names[i] for i in c] for c in cliques]}
    gname = obj.get("graph", {}).get("name") if isinstance(obj.get("graph"), Mapping) else None
    if gname:
        out["name"] = str(gname)
    return out


def _hashable(v: Any) -> bool:
    try:
        hash(v)
    except TypeError:
        return False
    return True


# --------------------------------------------------------------------------- distribution


def target_distribution(model: Model) -> np.ndarray | None:
    """The normalised product of the model's factors, or None without factors.

    Little-endian over ``model.variables``. Exact, so at most :data:`MAX_EXACT_VARIABLES`
    variables.

    Examples:
        >>> m = parse_model({"variables": ["a", "b"], "cliques": [["a", "b"]],
        ...                  "factors": [{"scope": ["a", "b"], "values": [3, 1, 1, 3]}]})
        >>> target_distribution(m).tolist()
        [0.375, 0.125, 0.125, 0.375]
    """
    if not model.factors:
        return None
    n = model.num_variables
    if n > MAX_EXACT_VARIABLES:
        raise CapacityError(
            f"the exact target distribution of {n} variables has 2**{n} entries; it is computed for at most "
            f"{MAX_EXACT_VARIABLES} variables",
            field="factors",
        )
    pos = {v: i for i, v in enumerate(model.variables)}
    x = np.arange(2**n, dtype=np.int64)
    logp = np.zeros(2**n)
    for f in model.factors:
        idx = np.zeros(2**n, dtype=np.int64)
        for j, v in enumerate(f.scope):
            idx |= ((x >> pos[v]) & 1) << j
        logp += np.log(np.asarray(f.values))[idx]
    logp -= logp.max()
    p = np.exp(logp)
    return p / p.sum()
