"""Device files: one chip with its own per-qubit and per-coupler figures.

A device file (TOML, toposcout's own format; JSON Schema in ``compiler/device.schema.json``)
names a chip, its qubit count and coupling edges (or a built-in family and size that generates
them), optional 2-D coordinates for drawing, and figures per qubit (T1, T2, one-qubit error,
readout errors, one-qubit duration) and per coupler (two-qubit error and duration, native
gate). Whatever a qubit or coupler does not give comes from ``[defaults]``, and what those do
not give from the built-in profile named by ``base`` (``topologies/profiles/*.toml``). A
device turns into a :class:`~toposcout.compiler.targets.Connectivity` (the chip: it fixes the
coupling graph) and a :class:`~toposcout.compiler.profiles.DeviceProfile` whose per-qubit and
per-edge overrides carry the figures, so the noise model, the ESP and the placement all read
the same numbers.

Native gates: ``native_gate`` (a gate set of ``topologies/gate_sets.toml``; default cx) gives
the one-qubit gates and the default two-qubit gate; a coupler's own ``native_gate`` (any
two-qubit gate a gate set offers, :data:`~toposcout.compiler.targets.TWO_QUBIT_GATES`, or a
gate set's name) replaces the two-qubit gate on that coupler only. :meth:`Device.gate_set`
is the gate set a compilation for the chip uses; the coupler's figures are those of its own gate.

Units as in profiles: T1, T2 in microseconds; durations in ns; errors are average gate
infidelities in [0, 1); readout errors are P(read 1 | 0) and P(read 0 | 1).

Example::

    name = "example-4"
    base = "superconducting"
    qubits = 4
    edges = [[0, 1], [1, 2], [2, 3]]
    [[qubit]]
    index = 2
    t1_us = 40.0
    [[coupler]]
    qubits = [1, 2]
    two_qubit_error = 0.03

>>> d = parse_device({"name": "ex", "qubits": 3, "edges": [[0, 1], [1, 2]], "base": "superconducting",
...                   "coupler": [{"qubits": [1, 2], "two_qubit_error": 0.03}]})
>>> d.profile.edge(2, 1).two_qubit_error, d.profile.edge(0, 1).two_qubit_error
(0.03, 0.008)
>>> d = parse_device({"name": "ex", "qubits": 3, "edges": [[0, 1], [1, 2]], "base": "superconducting",
...                   "native_gate": "cz", "coupler": [{"qubits": [2, 1], "native_gate": "cx"}]})
>>> d.gate_set().two_qubit_on(1, 2), d.gate_set().two_qubit_on(0, 1)
('cx', 'cz')
>>> parse_device({"name": "ex", "qubits": 2, "edges": [[0, 2]]})
Traceback (most recent call last):
...
toposcout.compiler.errors.ProfileError: edges[0]: qubit 2 is outside the chip's 2 qubits (0..1)
"""

from __future__ import annotations

import json
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import networkx as nx

from toposcout.compiler.errors import ProfileError, TargetError
from toposcout.compiler.profiles import DeviceProfile, load_profile, max_infidelity
from toposcout.compiler.targets import (GATE_SETS, TWO_QUBIT_GATES, Connectivity, GateSet, get_gate_set,
                                        make_connectivity)

__all__ = ["Device", "parse_device", "load_device", "device_dirs", "DEVICE_NAMES", "SCHEMA_PATH",
           "device_schema", "parse_device_text", "QUBIT_FIGURES", "COUPLER_FIGURES", "DEFAULT_KEYS"]

_HERE = Path(__file__).resolve().parent
#: the JSON Schema of a device file (the TOML's tables as JSON).
SCHEMA_PATH = _HERE / "device.schema.json"

#: per-qubit figures a ``[[qubit]]`` table may give.
QUBIT_FIGURES = ("t1_us", "t2_us", "one_qubit_error", "p1_given_0", "p0_given_1", "one_qubit_ns")
#: per-coupler figures a ``[[coupler]]`` table may give (besides ``qubits`` and ``native_gate``).
COUPLER_FIGURES = ("two_qubit_error", "two_qubit_ns")
#: keys of ``[defaults]``.
DEFAULT_KEYS = QUBIT_FIGURES + COUPLER_FIGURES + ("measure_ns",)
_TOP = {"name", "description", "base", "native_gate", "qubits", "edges", "family", "size", "coordinates",
        "defaults", "qubit", "coupler", "note"}
_ERRORS = ("one_qubit_error", "p1_given_0", "p0_given_1", "two_qubit_error")


def device_dirs() -> tuple[Path, ...]:
    """Where the example devices live: ``topologies/devices``."""
    return tuple(d for d in (_HERE.parent / "topologies" / "devices",) if d.is_dir())


#: names (file stems) of the example devices.
DEVICE_NAMES: tuple[str, ...] = tuple(sorted({p.stem for d in device_dirs() for p in d.glob("*.toml")}))


def device_schema() -> dict:
    """The JSON Schema of a device file."""
    return json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))


@dataclass(frozen=True)
class Device:
    """A chip: its coupling graph, drawing coordinates, native gate and figures (as a profile)."""

    name: str
    description: str
    connectivity: Connectivity
    profile: DeviceProfile
    native_gate: str
    coordinates: tuple[tuple[float, float], ...] | None
    per_element: bool          # True when any qubit or coupler has figures of its own
    source: dict               # the normalised file content (plain JSON), what a task carries
    #: couplers that name their own native two-qubit gate: ((a, b), gate), a < b, sorted
    coupler_gates: tuple[tuple[tuple[int, int], str], ...] = ()

    def gate_set(self, name: str | None = None) -> GateSet:
        """The gate set of a compilation for this chip: ``name`` (default: the device's
        ``native_gate``) for the one-qubit gates and the default two-qubit gate, and each coupler
        that names its own native gate keeps it."""
        return get_gate_set(name or self.native_gate).with_couplers(self.coupler_gates)

    @property
    def num_qubits(self) -> int:
        return self.connectivity.num_qubits

    def coords(self) -> list[tuple[float, float]]:
        """The file's coordinates, or a layout of the coupling graph when it gives none."""
        if self.coordinates is not None:
            return list(self.coordinates)
        return self.connectivity.coords()

    def check_fits(self, num_variables: int, field: str = "device") -> None:
        """Raise TargetError when a model of ``num_variables`` cannot be placed on the chip."""
        if num_variables > self.num_qubits:
            raise TargetError(f"{field}: the model has {num_variables} variables but device {self.name!r} has "
                              f"{self.num_qubits} qubits", field=field)
        g = self.connectivity.graph()
        largest = max((len(c) for c in nx.connected_components(g)), default=0)
        if largest < num_variables:
            raise TargetError(f"{field}.edges: the chip is disconnected and its largest connected part has "
                              f"{largest} qubits, fewer than the model's {num_variables} variables", field=f"{field}.edges")

    def to_dict(self) -> dict:
        return dict(self.source)


def _err(msg: str, field: str) -> ProfileError:
    return ProfileError(f"{field}: {msg}", field=field)


def _num(v: Any, field: str) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(float(v)):
        raise _err(f"expected a finite number, got {v!r}", field)
    return float(v)


def _index(v: Any, field: str, n: int) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < 0:
        raise _err(f"expected a non-negative integer qubit index, got {v!r}", field)
    if v >= n:
        raise _err(f"qubit {v} is outside the chip's {n} qubits (0..{n - 1})", field)
    return v


def _check_figure(key: str, x: float, field: str) -> None:
    if key in _ERRORS and not 0 <= x < 1:
        raise _err(f"an error must be in [0, 1), got {x:g}", field)
    if key in ("t1_us", "t2_us") and x <= 0:
        raise _err(f"a coherence time must be > 0 us, got {x:g}", field)
    if key.endswith("_ns") and x < 0:
        raise _err(f"a duration must be >= 0 ns, got {x:g}", field)


def _figures(entry: Mapping[str, Any], allowed: tuple[str, ...], where: str, skip: tuple[str, ...]) -> dict:
    out = {}
    for key, v in entry.items():
        if key in skip:
            continue
        if key not in allowed:
            raise _err(f"unknown key {key!r} (allowed: {', '.join(skip + allowed)})", f"{where}.{key}")
        x = _num(v, f"{where}.{key}")
        _check_figure(key, x, f"{where}.{key}")
        out[key] = x
    return out


def _edges(d: Mapping[str, Any], n: int) -> tuple[tuple[int, int], ...]:
    if "edges" in d and "family" in d:
        raise _err("give either edges or family (+ size), not both", "edges")
    if "family" in d:
        fam = d["family"]
        if fam == "custom":
            raise _err("custom is not a generating family; give the edges instead", "family")
        try:
            c = make_connectivity(str(fam), 1, size=d.get("size"))
        except TargetError as exc:
            raise _err(str(exc), "family" if "size" not in d else "size") from None
        if c.num_qubits != n:
            raise _err(f"{c.name} has {c.num_qubits} qubits but qubits = {n}", "qubits")
        return c.edges
    raw = d.get("edges")
    if not isinstance(raw, list) or not raw:
        raise _err("a device needs a non-empty list of coupling edges [[a, b], ...] or a family (+ size)", "edges")
    seen: dict[tuple[int, int], int] = {}
    for k, e in enumerate(raw):
        where = f"edges[{k}]"
        if not isinstance(e, (list, tuple)) or len(e) != 2:
            raise _err(f"expected a pair [a, b], got {e!r}", where)
        a, b = (_index(x, where, n) for x in e)
        if a == b:
            raise _err(f"a self edge on qubit {a}", where)
        key = (min(a, b), max(a, b))
        if key in seen:
            raise _err(f"duplicate edge {a}-{b} (also edges[{seen[key]}])", where)
        seen[key] = k
    return tuple(sorted(seen))


def parse_device(d: Mapping[str, Any], *, name: str | None = None) -> Device:
    """Validate a device's dict form (the TOML's tables) and build the :class:`Device`.

    Raises ProfileError naming the field and the qubit or edge on bad input."""
    if not isinstance(d, Mapping):
        raise _err(f"expected a table/object, got {type(d).__name__}", "device")
    unknown = sorted(set(d) - _TOP)
    if unknown:
        raise _err(f"unknown device key (known: {', '.join(sorted(_TOP))})", unknown[0])
    nm = d.get("name", name)
    if not isinstance(nm, str) or not nm.strip() or len(nm) > 80:
        raise _err(f"expected a non-empty name of at most 80 characters, got {nm!r}", "name")
    n = d.get("qubits")
    if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= 10_000:
        raise _err(f"expected the number of qubits, an integer from 1 to 10000, got {n!r}", "qubits")
    edges = _edges(d, n)
    gate = d.get("native_gate", "cx")
    if gate not in GATE_SETS:
        raise _err(f"unknown native gate set {gate!r}; choose one of {', '.join(GATE_SETS)}", "native_gate")
    two_qubit_name = get_gate_set(gate).two_qubit
    # the starting profile
    base = d.get("base")
    defaults_raw = d.get("defaults") or {}
    if not isinstance(defaults_raw, Mapping):
        raise _err("expected a table", "defaults")
    defaults = _figures(defaults_raw, DEFAULT_KEYS, "defaults", ())
    if base is not None:
        if not isinstance(base, str):
            raise _err(f"expected a built-in profile name, got {base!r}", "base")
        from toposcout.compiler.profiles import PROFILE_NAMES

        if base not in PROFILE_NAMES:
            raise _err(f"unknown built-in profile {base!r}; choose one of {', '.join(PROFILE_NAMES)}", "base")
        start = load_profile(base)
        values = {"t1_us": start.t1_us, "t2_us": start.t2_us, "one_qubit_error": start.one_qubit_error,
                  "p1_given_0": start.p1_given_0, "p0_given_1": start.p0_given_1, "one_qubit_ns": start.one_qubit_ns,
                  "two_qubit_error": start.two_qubit_error, "two_qubit_ns": start.two_qubit_ns,
                  "measure_ns": start.measure_ns}
    else:
        values = {}
    values.update(defaults)
    missing = [k for k in DEFAULT_KEYS if k not in values]
    if missing:
        raise _err("missing with no default: give it in [defaults] or name a built-in profile in base",
                   f"defaults.{missing[0]}")
    if values["t2_us"] > 2 * values["t1_us"]:
        raise _err(f"T2 = {values['t2_us']:g} us exceeds 2*T1 = {2 * values['t1_us']:g} us", "defaults.t2_us")
    # per qubit
    qubits: dict[int, dict] = {}
    for k, entry in enumerate(d.get("qubit") or ()):
        where = f"qubit[{k}]"
        if not isinstance(entry, Mapping) or "index" not in entry:
            raise _err("a qubit table needs 'index'", where)
        idx = _index(entry["index"], f"{where}.index", n)
        if idx in qubits:
            raise _err(f"qubit {idx} is given twice", f"{where}.index")
        figs = _figures(entry, QUBIT_FIGURES, f"qubit[index={idx}]", ("index",))
        t1 = figs.get("t1_us", values["t1_us"])
        t2 = figs.get("t2_us", values["t2_us"])
        if t2 > 2 * t1:
            raise _err(f"T2 = {t2:g} us exceeds 2*T1 = {2 * t1:g} us on qubit {idx}", f"qubit[index={idx}].t2_us")
        qubits[idx] = figs
    edge_set = set(edges)
    couplers: dict[tuple[int, int], dict] = {}
    gates: dict[tuple[int, int], str] = {}
    for k, entry in enumerate(d.get("coupler") or ()):
        where = f"coupler[{k}]"
        pair = entry.get("qubits") if isinstance(entry, Mapping) else None
        if not isinstance(pair, (list, tuple)) or len(pair) != 2:
            raise _err(f"expected qubits = [a, b], got {pair!r}", f"{where}.qubits")
        a, b = (_index(x, f"{where}.qubits", n) for x in pair)
        key = (min(a, b), max(a, b))
        if key not in edge_set:
            raise _err(f"{a}-{b} is not a coupling edge of the chip", f"{where}.qubits")
        if key in couplers:
            raise _err(f"coupler {a}-{b} is given twice", f"{where}.qubits")
        ng = entry.get("native_gate")
        if ng is not None:
            if not isinstance(ng, str) or ng not in set(TWO_QUBIT_GATES) | set(GATE_SETS):
                raise _err(f"unknown native two-qubit gate {ng!r}; choose one of {', '.join(TWO_QUBIT_GATES)} "
                           f"(the two-qubit gates of the gate sets; the device's default is {two_qubit_name!r})",
                           f"coupler[{a}-{b}].native_gate")
            gates[key] = ng if ng in TWO_QUBIT_GATES else get_gate_set(ng).two_qubit
        couplers[key] = _figures(entry, COUPLER_FIGURES, f"coupler[{a}-{b}]", ("qubits", "native_gate"))
    coords = d.get("coordinates")
    if coords is not None:
        if not isinstance(coords, list) or len(coords) != n:
            raise _err(f"expected {n} [x, y] pairs, one per qubit", "coordinates")
        pts = []
        for k, c in enumerate(coords):
            if not isinstance(c, (list, tuple)) or len(c) != 2:
                raise _err(f"expected [x, y], got {c!r}", f"coordinates[{k}]")
            pts.append((_num(c[0], f"coordinates[{k}]"), _num(c[1], f"coordinates[{k}]")))
        coords = tuple(pts)
    profile_dict = {
        "name": nm,
        "description": str(d.get("description", "")),
        "gates": {k: values[k] for k in ("one_qubit_error", "two_qubit_error", "one_qubit_ns", "two_qubit_ns",
                                          "measure_ns")},
        "readout": {"p1_given_0": values["p1_given_0"], "p0_given_1": values["p0_given_1"]},
        "coherence": {"t1_us": values["t1_us"], "t2_us": values["t2_us"]},
        "qubit": [{"index": i, **f} for i, f in sorted(qubits.items()) if f],
        "edge": [{"qubits": list(p), **f} for p, f in sorted(couplers.items()) if f],
    }
    try:
        profile = DeviceProfile.from_dict(profile_dict)
    except ProfileError as exc:  # a limit the profile enforces beyond ours (e.g. a 1q error over 0.5)
        raise _err(str(exc), exc.field or "device") from None
    if any(f.get("one_qubit_error", 0) > max_infidelity(1) for f in qubits.values()):
        raise _err("a one-qubit error above 0.5 is not a gate", "qubit")
    conn = Connectivity(nm, "custom", n, edges, None)
    source = {"name": nm, "description": str(d.get("description", "")), "base": base, "native_gate": gate,
              "qubits": n, "edges": [list(e) for e in edges],
              "coordinates": None if coords is None else [list(c) for c in coords],
              "defaults": defaults,
              "qubit": [{"index": i, **f} for i, f in sorted(qubits.items())],
              "coupler": [{"qubits": list(p), **f, **({"native_gate": gates[p]} if p in gates else {})}
                          for p, f in sorted(couplers.items())]}
    return Device(name=nm, description=str(d.get("description", "")), connectivity=conn, profile=profile,
                  native_gate=gate, coordinates=coords, per_element=bool(profile.qubit_overrides or
                                                                           profile.edge_overrides),
                  source=source, coupler_gates=tuple(sorted(gates.items())))


def load_device(spec: str | Path | Mapping[str, Any]) -> Device:
    """A device by example name (``DEVICE_NAMES``), by TOML file path, or from its dict form."""
    if isinstance(spec, Device):
        return spec
    if isinstance(spec, Mapping):
        return parse_device(spec)
    text = str(spec)
    path = None
    if text in DEVICE_NAMES:
        path = next(d / f"{text}.toml" for d in device_dirs() if (d / f"{text}.toml").is_file())
    else:
        path = Path(text)
        if not path.is_file():
            raise _err(f"no such device file {text!r} (example devices: {', '.join(DEVICE_NAMES)})", "device")
    return parse_device_text(path.read_text(encoding="utf-8"), name=path.stem)


def parse_device_text(text: str, *, name: str | None = None) -> Device:
    """A device from the text of its TOML file (what the API receives)."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise _err(f"not valid TOML: {exc}", "device") from None
    return parse_device(data, name=name)
