"""Device profiles: invented device classes with typical error rates, coherence and timing.

A profile is a *class* of device, not a machine: the built-in ones (``PROFILE_NAMES``) carry
typical values recalled from memory, marked as such in their TOML files
(``topologies/profiles/*.toml``). No number in them is calibration data of a real device.

Conventions (also written at the top of every profile file):

* ``one_qubit_error`` / ``two_qubit_error`` are **average gate infidelities** ``r = 1 - F_avg``
  of the whole gate, relaxation during the gate included. :func:`depolarizing_parameter`
  turns ``r`` into the depolarizing parameter of the part of the error that relaxation does
  not already explain, with Nielsen's relation ``F_avg = (d F_pro + 1) / (d + 1)``
  (M. A. Nielsen, "A simple formula for the average gate fidelity of a quantum dynamical
  operation", Phys. Lett. A 303, 249 (2002)), so relaxation is not counted twice.
* readout errors are two probabilities: ``p1_given_0`` = P(read 1 | prepared 0) and
  ``p0_given_1`` = P(read 0 | prepared 1).
* ``t1_us``, ``t2_us`` in microseconds, ``T2 <= 2 T1`` is enforced; gate durations in ns.
* ``noise_scale`` multiplies **every error rate**: both gate errors, both readout errors and
  the relaxation *rates* ``1/T1`` and ``1/T2`` (so the effective ``T1`` and ``T2`` are divided
  by the scale; ``T2 <= 2 T1`` is preserved). Scale 0 is the noiseless device. Scaled values
  are clipped at their physical maximum (gate infidelity ``(d-1)/d``, a readout probability 1).
  Gate durations are *not* scaled.

A profile file may start from a built-in profile with ``base = "NAME"`` and give only what
differs (its tables are merged key by key onto the base's; see :func:`_with_base`).

Per-qubit overrides (``[[qubit]]`` tables with ``index`` and any of ``t1_us``, ``t2_us``,
``one_qubit_error``, ``p1_given_0``, ``p0_given_1``, ``one_qubit_ns``) and per-edge overrides (``[[edge]]``
tables with ``qubits = [a, b]`` and ``two_qubit_error`` and/or ``two_qubit_ns``) address
*physical* qubits of the connectivity; an edge override applies to both directions.

Examples:
    >>> p = load_profile("superconducting")
    >>> p.one_qubit_error < p.two_qubit_error
    True
    >>> q = load_profile("superconducting", noise_scale=2.0)
    >>> round(q.qubit(0).t1_us * 2 - p.qubit(0).t1_us, 9)
    0.0
    >>> DeviceProfile.from_dict(p.to_dict()) == p
    True
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from toposcout.compiler.errors import ProfileError

__all__ = [
    "DeviceProfile",
    "QubitParams",
    "EdgeParams",
    "PROFILE_NAMES",
    "DEFAULT_PROFILE",
    "profile_catalogue",
    "profile_dirs",
    "load_profile",
    "parse_profile",
    "relaxation_process_fidelity",
    "relaxation_average_infidelity",
    "depolarizing_parameter",
    "max_infidelity",
]

_HERE = Path(__file__).resolve().parent


def profile_dirs() -> tuple[Path, ...]:
    """Where built-in profiles are looked up: ``topologies/profiles`` beside the ``compiler``
    package (the checkout, or the installed ``topologies`` data package)."""
    return tuple(d for d in (_HERE.parent / "topologies" / "profiles",) if d.is_dir())


def _builtin_names() -> tuple[str, ...]:
    names: set[str] = set()
    for d in profile_dirs():
        names.update(p.stem for p in d.glob("*.toml"))
    return tuple(sorted(names))


#: names of the built-in profiles (file stems).
PROFILE_NAMES: tuple[str, ...] = _builtin_names()
#: the profile of a task that names none.
DEFAULT_PROFILE = "superconducting"

_QUBIT_KEYS = ("t1_us", "t2_us", "one_qubit_error", "p1_given_0", "p0_given_1", "one_qubit_ns")
_EDGE_KEYS = ("two_qubit_error", "two_qubit_ns")


def max_infidelity(num_qubits: int) -> float:
    """Largest average infidelity of a depolarizing channel: (d-1)/d (fully depolarizing)."""
    d = 2**num_qubits
    return (d - 1) / d


@dataclass(frozen=True)
class QubitParams:
    """Effective (already scaled) parameters of one physical qubit."""

    t1_us: float
    t2_us: float
    one_qubit_error: float
    p1_given_0: float
    p0_given_1: float
    one_qubit_ns: float = 0.0  # not scaled (a duration)


@dataclass(frozen=True)
class EdgeParams:
    """Effective (already scaled) parameters of one coupler."""

    two_qubit_error: float
    two_qubit_ns: float


@dataclass(frozen=True)
class DeviceProfile:
    """A device class. Field values are the *unscaled* ones from the file; the accessors
    :meth:`qubit` and :meth:`edge` return the values with ``noise_scale`` applied."""

    name: str
    one_qubit_error: float
    two_qubit_error: float
    p1_given_0: float
    p0_given_1: float
    t1_us: float
    t2_us: float
    one_qubit_ns: float
    two_qubit_ns: float
    measure_ns: float
    description: str = ""
    intended_connectivity: str | None = None
    qubit_overrides: tuple[tuple[int, tuple[tuple[str, float], ...]], ...] = ()
    edge_overrides: tuple[tuple[tuple[int, int], tuple[tuple[str, float], ...]], ...] = ()
    noise_scale: float = 1.0

    def __post_init__(self) -> None:
        _validate(self)

    # --- effective values -------------------------------------------------------------
    def _qubit_raw(self, q: int) -> dict[str, float]:
        raw = {
            "t1_us": self.t1_us,
            "t2_us": self.t2_us,
            "one_qubit_error": self.one_qubit_error,
            "p1_given_0": self.p1_given_0,
            "p0_given_1": self.p0_given_1,
            "one_qubit_ns": self.one_qubit_ns,
        }
        for idx, items in self.qubit_overrides:
            if idx == q:
                raw.update(dict(items))
        return raw

    def qubit(self, q: int) -> QubitParams:
        """Parameters of physical qubit ``q`` (overrides and ``noise_scale`` applied)."""
        raw = self._qubit_raw(q)
        s = self.noise_scale
        t1 = math.inf if s == 0 else raw["t1_us"] / s
        t2 = math.inf if s == 0 else raw["t2_us"] / s
        return QubitParams(
            t1_us=t1,
            t2_us=t2,
            one_qubit_error=min(raw["one_qubit_error"] * s, max_infidelity(1)),
            p1_given_0=min(raw["p1_given_0"] * s, 1.0),
            p0_given_1=min(raw["p0_given_1"] * s, 1.0),
            one_qubit_ns=raw["one_qubit_ns"],
        )

    def edge(self, a: int, b: int) -> EdgeParams:
        """Parameters of the coupler between physical qubits ``a`` and ``b`` (either order)."""
        raw = {"two_qubit_error": self.two_qubit_error, "two_qubit_ns": self.two_qubit_ns}
        key = (min(a, b), max(a, b))
        for pair, items in self.edge_overrides:
            if pair == key:
                raw.update(dict(items))
        return EdgeParams(
            two_qubit_error=min(raw["two_qubit_error"] * self.noise_scale, max_infidelity(2)),
            two_qubit_ns=raw["two_qubit_ns"],
        )

    def scaled(self, noise_scale: float) -> "DeviceProfile":
        """The same device class at another noise scale (replaces, does not multiply)."""
        return replace(self, noise_scale=float(noise_scale))

    # --- plain-JSON round trip --------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "description": self.description,
            "intended_connectivity": self.intended_connectivity,
            "gates": {
                "one_qubit_error": self.one_qubit_error,
                "two_qubit_error": self.two_qubit_error,
                "one_qubit_ns": self.one_qubit_ns,
                "two_qubit_ns": self.two_qubit_ns,
                "measure_ns": self.measure_ns,
            },
            "readout": {"p1_given_0": self.p1_given_0, "p0_given_1": self.p0_given_1},
            "coherence": {"t1_us": self.t1_us, "t2_us": self.t2_us},
            "qubit": [{"index": i, **dict(items)} for i, items in self.qubit_overrides],
            "edge": [{"qubits": list(pair), **dict(items)} for pair, items in self.edge_overrides],
            "noise_scale": self.noise_scale,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], *, noise_scale: float | None = None) -> "DeviceProfile":
        """Build from the dict form (the TOML file's tables, or :meth:`to_dict` output).

        ``noise_scale`` given here replaces the one in ``d`` (default 1.0)."""
        return parse_profile(d, noise_scale=noise_scale)


# --- parsing and validation -------------------------------------------------------------
def _number(value: Any, field_name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ProfileError(f"{field_name}: expected a number, got {value!r}", field=field_name)
    x = float(value)
    if not math.isfinite(x):
        raise ProfileError(f"{field_name}: expected a finite number, got {value!r}", field=field_name)
    return x


def _table(d: Mapping[str, Any], key: str) -> Mapping[str, Any]:
    t = d.get(key)
    if not isinstance(t, Mapping):
        raise ProfileError(f"{key}: missing table [{key}]", field=key)
    return t


def _required(t: Mapping[str, Any], table: str, key: str) -> float:
    if key not in t:
        raise ProfileError(f"{table}.{key}: missing", field=f"{table}.{key}")
    return _number(t[key], f"{table}.{key}")


#: the most entries of a profile's [[qubit]] or [[edge]] table, and the largest qubit index in one
MAX_OVERRIDES = 4096
MAX_OVERRIDE_QUBIT = 9999

_KNOWN_TOP = {"name", "description", "intended_connectivity", "gates", "readout", "coherence",
              "qubit", "edge", "noise_scale", "base"}
_TABLE_KEYS = {"gates": ("one_qubit_error", "two_qubit_error", "one_qubit_ns", "two_qubit_ns", "measure_ns"),
               "readout": ("p1_given_0", "p0_given_1"), "coherence": ("t1_us", "t2_us")}


def _with_base(d: Mapping[str, Any], depth: int = 0) -> dict[str, Any]:
    """``d`` on top of its ``base = "NAME"`` (a built-in profile): the tables ``gates``, ``readout``
    and ``coherence`` are merged key by key, the ``[[qubit]]`` and ``[[edge]]`` overrides are the
    base's followed by ``d``'s, every other key of ``d`` replaces the base's. Without a name and a
    description of its own, the result is named ``custom`` and says what it changed."""
    base_name = d.get("base")
    if not isinstance(base_name, str) or base_name not in PROFILE_NAMES:
        raise ProfileError(f"base: {base_name!r} is not a built-in profile; built-in profiles: "
                           f"{', '.join(PROFILE_NAMES)}", field="base")
    if depth > 4:
        raise ProfileError("base: the chain of base profiles is too long (a loop?)", field="base")
    path = next(p / f"{base_name}.toml" for p in profile_dirs() if (p / f"{base_name}.toml").is_file())
    base = tomllib.loads(path.read_text(encoding="utf-8"))
    base.setdefault("name", base_name)
    if "base" in base:
        base = _with_base(base, depth + 1)
    out: dict[str, Any] = {k: v for k, v in base.items() if k not in ("name", "description")}
    changed = []
    for key, value in d.items():
        if key == "base":
            continue
        if key in _TABLE_KEYS:
            if not isinstance(value, Mapping):
                raise ProfileError(f"{key}: expected a table [{key}]", field=key)
            for k in value:
                if k not in _TABLE_KEYS[key]:
                    raise ProfileError(f"{key}.{k}: unknown key (known: {', '.join(_TABLE_KEYS[key])})",
                                       field=f"{key}.{k}")
            out[key] = {**dict(base.get(key) or {}), **dict(value)}
            changed += [f"{key}.{k}" for k in value]
        elif key in ("qubit", "edge"):
            out[key] = list(base.get(key) or []) + list(value or [])
            changed.append(key)
        else:
            out[key] = value
    out.setdefault("description", f"{base['name']} with {', '.join(changed) or 'no change'}")
    return out


def parse_profile(d: Mapping[str, Any], *, noise_scale: float | None = None, name: str | None = None) -> DeviceProfile:
    """Build and validate a :class:`DeviceProfile` from its dict form; raises ProfileError."""
    if not isinstance(d, Mapping):
        raise ProfileError(f"profile: expected a table/object, got {type(d).__name__}", field="profile")
    unknown = sorted(set(d) - _KNOWN_TOP)
    if unknown:
        raise ProfileError(f"{unknown[0]}: unknown profile key (known: {', '.join(sorted(_KNOWN_TOP))})",
                           field=unknown[0])
    if "base" in d:
        d = _with_base(d)
    gates, readout, coh = _table(d, "gates"), _table(d, "readout"), _table(d, "coherence")
    for key in ("qubit", "edge"):  # the override tables, counted before they are walked
        entries = d.get(key)
        if entries is None:
            continue
        if not isinstance(entries, (list, tuple)):
            raise ProfileError(f"{key}: expected a list of override tables ([[{key}]] in TOML), got "
                               f"{type(entries).__name__}", field=key)
        if len(entries) > MAX_OVERRIDES:
            raise ProfileError(f"{key}: {len(entries)} overrides is over the cap of {MAX_OVERRIDES} per table",
                               field=key)
    qov: list[tuple[int, tuple[tuple[str, float], ...]]] = []
    for k, entry in enumerate(d.get("qubit") or ()):
        where = f"qubit[{k}]"
        if not isinstance(entry, Mapping) or "index" not in entry:
            raise ProfileError(f"{where}: an override needs 'index'", field=where)
        idx = entry["index"]
        if isinstance(idx, bool) or not isinstance(idx, int) or idx < 0 or idx > MAX_OVERRIDE_QUBIT:
            raise ProfileError(f"{where}.index: expected an integer from 0 to {MAX_OVERRIDE_QUBIT}, got {idx!r}",
                               field=f"{where}.index")
        items = []
        for key, val in entry.items():
            if key == "index":
                continue
            if key not in _QUBIT_KEYS:
                raise ProfileError(f"{where}.{key}: unknown override (allowed: {', '.join(_QUBIT_KEYS)})",
                                   field=f"{where}.{key}")
            items.append((key, _number(val, f"{where}.{key}")))
        qov.append((idx, tuple(sorted(items))))
    eov: list[tuple[tuple[int, int], tuple[tuple[str, float], ...]]] = []
    for k, entry in enumerate(d.get("edge") or ()):
        where = f"edge[{k}]"
        pair = entry.get("qubits") if isinstance(entry, Mapping) else None
        if (not isinstance(pair, (list, tuple)) or len(pair) != 2
                or not all(isinstance(x, int) and not isinstance(x, bool) and 0 <= x <= MAX_OVERRIDE_QUBIT
                           for x in pair)
                or pair[0] == pair[1]):
            raise ProfileError(f"{where}.qubits: expected two distinct non-negative integers, got {pair!r}",
                               field=f"{where}.qubits")
        items = []
        for key, val in entry.items():
            if key == "qubits":
                continue
            if key not in _EDGE_KEYS:
                raise ProfileError(f"{where}.{key}: unknown override (allowed: {', '.join(_EDGE_KEYS)})",
                                   field=f"{where}.{key}")
            items.append((key, _number(val, f"{where}.{key}")))
        eov.append(((min(pair), max(pair)), tuple(sorted(items))))
    scale = d.get("noise_scale", 1.0) if noise_scale is None else noise_scale
    nm = name if name is not None else d.get("name", "custom")
    if not isinstance(nm, str) or not nm:
        raise ProfileError(f"name: expected a non-empty string, got {nm!r}", field="name")
    return DeviceProfile(
        name=nm,
        description=str(d.get("description", "")),
        intended_connectivity=d.get("intended_connectivity"),
        one_qubit_error=_required(gates, "gates", "one_qubit_error"),
        two_qubit_error=_required(gates, "gates", "two_qubit_error"),
        one_qubit_ns=_required(gates, "gates", "one_qubit_ns"),
        two_qubit_ns=_required(gates, "gates", "two_qubit_ns"),
        measure_ns=_required(gates, "gates", "measure_ns"),
        p1_given_0=_required(readout, "readout", "p1_given_0"),
        p0_given_1=_required(readout, "readout", "p0_given_1"),
        t1_us=_required(coh, "coherence", "t1_us"),
        t2_us=_required(coh, "coherence", "t2_us"),
        qubit_overrides=tuple(sorted(qov)),
        edge_overrides=tuple(sorted(eov)),
        noise_scale=_number(scale, "noise_scale"),
    )


def _check_qubit_values(names: Mapping[str, str], t1: float, t2: float, e1: float, p10: float, p01: float) -> None:
    if t1 <= 0:
        raise ProfileError(f"{names['t1_us']}: T1 must be > 0 us, got {t1}", field=names["t1_us"])
    if t2 <= 0:
        raise ProfileError(f"{names['t2_us']}: T2 must be > 0 us, got {t2}", field=names["t2_us"])
    if t2 > 2 * t1:
        raise ProfileError(
            f"{names['t2_us']}: T2 = {t2} us exceeds 2*T1 = {2 * t1} us (T1 = {t1} us); "
            "a physical qubit has T2 <= 2*T1", field=names["t2_us"])
    if not 0 <= e1 <= max_infidelity(1):
        raise ProfileError(f"{names['one_qubit_error']}: must be in [0, 0.5] (average gate infidelity), got {e1}",
                           field=names["one_qubit_error"])
    for key, p in (("p1_given_0", p10), ("p0_given_1", p01)):
        if not 0 <= p <= 1:
            raise ProfileError(f"{names[key]}: must be a probability in [0, 1], got {p}", field=names[key])


_BASE_NAMES = {"t1_us": "coherence.t1_us", "t2_us": "coherence.t2_us", "one_qubit_error": "gates.one_qubit_error",
               "p1_given_0": "readout.p1_given_0", "p0_given_1": "readout.p0_given_1"}


def _validate(p: DeviceProfile) -> None:
    if p.noise_scale < 0:
        raise ProfileError(f"noise_scale: must be >= 0, got {p.noise_scale}", field="noise_scale")
    if not 0 <= p.two_qubit_error <= max_infidelity(2):
        raise ProfileError(f"gates.two_qubit_error: must be in [0, 0.75] (average gate infidelity), "
                           f"got {p.two_qubit_error}", field="gates.two_qubit_error")
    for key in ("one_qubit_ns", "two_qubit_ns", "measure_ns"):
        if getattr(p, key) < 0:
            raise ProfileError(f"gates.{key}: a duration must be >= 0 ns, got {getattr(p, key)}", field=f"gates.{key}")
    _check_qubit_values(_BASE_NAMES, p.t1_us, p.t2_us, p.one_qubit_error, p.p1_given_0, p.p0_given_1)
    for idx, _items in p.qubit_overrides:
        raw = p._qubit_raw(idx)
        names = {k: f"qubit[index={idx}].{k}" for k in _QUBIT_KEYS}
        _check_qubit_values(names, raw["t1_us"], raw["t2_us"], raw["one_qubit_error"],
                            raw["p1_given_0"], raw["p0_given_1"])
        if raw["one_qubit_ns"] < 0:
            raise ProfileError(f"{names['one_qubit_ns']}: a duration must be >= 0 ns, got {raw['one_qubit_ns']}",
                               field=names["one_qubit_ns"])
    for pair, items in p.edge_overrides:
        d = dict(items)
        where = f"edge[{pair[0]}-{pair[1]}]"
        e = d.get("two_qubit_error", p.two_qubit_error)
        if not 0 <= e <= max_infidelity(2):
            raise ProfileError(f"{where}.two_qubit_error: must be in [0, 0.75], got {e}", field=f"{where}.two_qubit_error")
        if d.get("two_qubit_ns", 0) < 0:
            raise ProfileError(f"{where}.two_qubit_ns: a duration must be >= 0 ns, got {d['two_qubit_ns']}",
                               field=f"{where}.two_qubit_ns")


def load_profile(name_or_path: str | Path | Mapping[str, Any] | DeviceProfile, *, noise_scale: float = 1.0) -> DeviceProfile:
    """A profile by built-in name (``PROFILE_NAMES``), by TOML file path, or from its dict
    form (as carried in a JSON task). ``noise_scale`` replaces the file's scale."""
    if isinstance(name_or_path, DeviceProfile):
        return name_or_path.scaled(noise_scale)
    if isinstance(name_or_path, Mapping):
        return parse_profile(name_or_path, noise_scale=noise_scale)
    text = str(name_or_path)
    path: Path | None = None
    if text in PROFILE_NAMES or (not text.endswith(".toml") and "/" not in text and "\\" not in text):
        for d in profile_dirs():
            cand = d / f"{text}.toml"
            if cand.is_file():
                path = cand
                break
        if path is None:
            raise ProfileError(
                f"profile: unknown profile {text!r}; built-in profiles: {', '.join(PROFILE_NAMES)} "
                "(or give the path of a .toml file)", field="profile")
    else:
        path = Path(text)
        if not path.is_file():
            raise ProfileError(f"profile: no such profile file {text!r}", field="profile")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"profile {path.name}: not valid TOML: {exc}", field="profile") from exc
    return parse_profile(data, noise_scale=noise_scale, name=data.get("name", path.stem))


def profile_catalogue() -> dict[str, str]:
    """Built-in profile name -> its one-line description (with the numbers that matter)."""
    out = {}
    for name in PROFILE_NAMES:
        p = load_profile(name)
        out[name] = (f"{p.description} [1q {p.one_qubit_error:g}, 2q {p.two_qubit_error:g} avg infidelity; "
                     f"T1 {p.t1_us:g} us, T2 {p.t2_us:g} us; 2q gate {p.two_qubit_ns:g} ns]")
    return out


# --- conversion (Nielsen 2002) ------------------------------------------------------------
def relaxation_process_fidelity(t1_us: float, t2_us: float, time_ns: float) -> float:
    """Process (entanglement) fidelity of the single-qubit thermal-relaxation channel
    (amplitude damping with exp(-t/T1), coherence decay exp(-t/T2), ground-state bath).

    In the Pauli-transfer picture the channel keeps <Z> with factor exp(-t/T1) (plus a shift)
    and <X>, <Y> with exp(-t/T2); F_pro = Tr(R)/d^2 = (1 + e^{-t/T1} + 2 e^{-t/T2}) / 4.
    """
    if time_ns <= 0:
        return 1.0
    t = time_ns * 1e-3
    a = 0.0 if t1_us == math.inf else t / t1_us
    b = 0.0 if t2_us == math.inf else t / t2_us
    return (1.0 + math.exp(-a) + 2.0 * math.exp(-b)) / 4.0


def relaxation_average_infidelity(t1_us: float, t2_us: float, time_ns: float, num_qubits: int = 1) -> float:
    """1 - F_avg of thermal relaxation for ``time_ns`` on each of ``num_qubits`` identical
    qubits (process fidelities multiply under tensor products), via Nielsen's relation."""
    f_pro = relaxation_process_fidelity(t1_us, t2_us, time_ns) ** num_qubits
    d = 2**num_qubits
    return 1.0 - (d * f_pro + 1.0) / (d + 1.0)


def depolarizing_parameter(total_infidelity: float, relaxation_process_fid: float, num_qubits: int) -> float:
    """Depolarizing parameter ``p`` (channel rho -> (1-p) rho + p I/d) of the remainder of a
    gate error once the relaxation during the gate is accounted for.

    ``total_infidelity`` r = 1 - F_avg of the whole gate; ``relaxation_process_fid`` the
    process fidelity of the relaxation part. Nielsen (2002): F_pro = ((d+1) F_avg - 1)/d.
    For the composition, F_pro = (1-p) F_relax + p/d^2 (a depolarized output has process
    fidelity 1/d^2), so p = (F_relax - F_target) / (F_relax - 1/d^2). When relaxation alone
    already exceeds r, p is clipped at 0 (the gate is then worse than its nominal error, by
    the relaxation it cannot avoid); p is also clipped at its physical maximum d^2/(d^2-1).
    """
    d = 2**num_qubits
    f_target = ((d + 1) * (1.0 - total_infidelity) - 1.0) / d
    denom = relaxation_process_fid - 1.0 / d**2
    if denom <= 0:
        return 0.0
    p = (relaxation_process_fid - f_target) / denom
    return float(np.clip(p, 0.0, d**2 / (d**2 - 1)))
