"""Noise of a compiled circuit on a device profile: timing, gate errors, idling, readout.

The flow for one compiled circuit::

    sched = schedule(compiled, profile)         # compact (active qubits only), ALAP, delays in ns
    nm    = build_noise_model(sched, profile)   # qiskit-aer NoiseModel: gates + readout
    circ  = noisy_circuit(sched, profile)       # + thermal relaxation after every delay (idle noise)

* **Compact index space.** Only the *active* physical qubits (touched by a gate or a
  measurement) are kept and renumbered ``0..n-1`` in increasing physical order;
  ``Scheduled.physical_qubits[k]`` is the physical qubit of compact qubit ``k``. Every
  per-qubit and per-edge number of the profile is looked up by the *physical* index, so
  overrides follow the qubits through the relabelling.
* **Timing.** The compact circuit (final measurements included) is scheduled as late as
  possible on a timed qiskit ``Target`` (``dt`` = 1 ns; durations from the profile, rounded
  to whole ns; ``rz`` is virtual: zero duration). Idle windows become ``delay`` instructions.
  ``Scheduled.duration_ns`` is the whole circuit including the final measurement. The final
  measurements are then removed from the circuit (simulation saves the pre-measurement state
  and applies readout errors exactly, see ``toposcout.compiler.simulate``).
* **Gate noise.** Every non-virtual gate gets ``depolarizing(p)`` followed by thermal
  relaxation for the gate's duration (two-qubit gates: the tensor product of both qubits'
  relaxation), with ``p`` from :func:`toposcout.compiler.profiles.depolarizing_parameter` so that the
  whole gate has the profile's average infidelity (Nielsen 2002; relaxation not counted twice).
  **The order is depolarizing first, then relaxation.** Both orders give the whole gate the
  profile's average infidelity, but they are different channels: amplitude damping does not
  preserve the maximally mixed state (it is not unital; Nielsen & Chuang, *Quantum Computation
  and Quantum Information*, section 8.3.5), so it does not commute with depolarizing, and the
  metrics differ by up to about 1e-5 between the two orders. When relaxation during the gate
  alone exceeds the profile's error, ``p`` is 0 and the gate is worse than nominal.
* **Idle noise.** Thermal relaxation ``exp(-t/T1)``, ``exp(-t/T2)`` is appended after every
  delay (an explicit ``QuantumError`` instruction per delay, computed with the qubit's own
  T1/T2). A qubit still in ``|0>`` before its first gate is unaffected by it (ground-state bath).
* **Readout.** ``ReadoutError`` rows = prepared state, columns = read value.
* **Switches.** :class:`NoiseSwitches` turns each source off (for the error budget).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Sequence

import numpy as np
from qiskit import QuantumCircuit
from qiskit.circuit import Delay, Parameter
from qiskit.circuit.library import Measure, get_standard_gate_name_mapping
from qiskit.transpiler import InstructionProperties, PassManager, Target
from qiskit.transpiler.passes import ALAPScheduleAnalysis, PadDelay
from qiskit_aer.noise import NoiseModel, QuantumError, ReadoutError, depolarizing_error, thermal_relaxation_error

from toposcout.compiler.errors import CompileError, ToposcoutError
from toposcout.compiler.profiles import (
    DeviceProfile,
    depolarizing_parameter,
    relaxation_average_infidelity,
    relaxation_process_fidelity,
)

__all__ = [
    "DT",
    "VIRTUAL_GATES",
    "SOURCES",
    "NoiseSwitches",
    "Scheduled",
    "schedule",
    "schedule_circuit",
    "strip_to_active",
    "timed_target",
    "gate_error",
    "build_noise_model",
    "noisy_circuit",
    "readout_matrices",
    "operation_errors",
]

#: the scheduling resolution: 1 ns.
DT = 1e-9
#: gates implemented as frame changes: zero duration, zero error.
VIRTUAL_GATES = frozenset({"rz"})
#: the noise sources, in the order of the error budget.
SOURCES = ("two_qubit", "one_qubit", "idle", "readout")
_NON_GATES = frozenset({"barrier", "delay", "measure"})


@dataclass(frozen=True)
class NoiseSwitches:
    """Which noise sources are on (all by default)."""

    two_qubit: bool = True
    one_qubit: bool = True
    idle: bool = True
    readout: bool = True

    def without(self, source: str) -> "NoiseSwitches":
        if source not in SOURCES:
            raise ValueError(f"unknown noise source {source!r}; one of {SOURCES}")
        return replace(self, **{source: False})


@dataclass(frozen=True)
class Scheduled:
    """A compiled circuit reduced to its active qubits and scheduled ALAP.

    circuit: compact circuit, ``delay`` instructions in units of dt = 1 ns, final
        measurements removed (no classical bits).
    physical_qubits: compact qubit k -> physical qubit.
    measured: variable i -> compact qubit measured into bit i.
    duration_ns: the whole circuit, final measurement included.
    measure_ns: the duration of the final measurement.
    """

    circuit: QuantumCircuit
    physical_qubits: tuple[int, ...]
    measured: tuple[int, ...]
    duration_ns: int
    measure_ns: int

    @property
    def num_qubits(self) -> int:
        return len(self.physical_qubits)

    @property
    def duration_us(self) -> float:
        return self.duration_ns * 1e-3


def _ns(x: float) -> int:
    return int(round(x))


def strip_to_active(circuit: QuantumCircuit, final_layout: Sequence[int] | None = None):
    """Drop qubits that only see delays/barriers (or nothing) and renumber the rest.

    Returns ``(compact_circuit, physical_qubits, measured)`` where the compact circuit keeps
    its final measurements (bit i <- compact ``measured[i]``). ``final_layout`` (variable i
    -> physical qubit measured into bit i) is checked against the measurements when given.
    Measurements must be final (no gate on a qubit after it is measured).
    """
    active = sorted({circuit.find_bit(q).index for ins in circuit.data
                     if ins.operation.name not in ("delay", "barrier") for q in ins.qubits})
    idx = {p: k for k, p in enumerate(active)}
    out = QuantumCircuit(len(active), circuit.num_clbits, global_phase=circuit.global_phase)
    measured_phys: dict[int, int] = {}
    done: set[int] = set()
    for ins in circuit.data:
        name = ins.operation.name
        qs = [circuit.find_bit(q).index for q in ins.qubits]
        if name in ("delay", "barrier"):
            continue  # re-scheduled below; barriers carry no noise
        if ins.operation.num_qubits > 2:
            raise CompileError(f"{name} acts on {ins.operation.num_qubits} qubits; the noise model "
                               "supports one- and two-qubit gates only", field="circuit")
        if any(q in done for q in qs):
            raise CompileError(f"{name} on qubit(s) {qs} after a measurement; the noise study needs "
                               "the measurements at the end", field="circuit")
        if name == "measure":
            measured_phys[circuit.find_bit(ins.clbits[0]).index] = qs[0]
            done.add(qs[0])
        out.append(ins.operation, [idx[q] for q in qs], [circuit.find_bit(c).index for c in ins.clbits])
    if final_layout is None:
        if sorted(measured_phys) != list(range(circuit.num_clbits)):
            raise CompileError("every classical bit must be measured once", field="circuit")
        final_layout = tuple(measured_phys[i] for i in range(circuit.num_clbits))
    else:
        final_layout = tuple(int(p) for p in final_layout)
        for i, p in enumerate(final_layout):
            if measured_phys.get(i, p) != p:
                raise CompileError(f"bit {i} is measured from physical qubit {measured_phys[i]}, but "
                                   f"final_layout says {p}", field="final_layout")
            if p not in idx:
                raise CompileError(f"variable {i} ends on physical qubit {p}, which no gate touches",
                                   field="final_layout")
    return out, tuple(active), tuple(idx[p] for p in final_layout)


def _gate_objects(circuit: QuantumCircuit) -> dict[str, object]:
    std = get_standard_gate_name_mapping()
    objs: dict[str, object] = {}
    for ins in circuit.data:
        name = ins.operation.name
        if name in _NON_GATES or name in objs:
            continue
        if name in std:
            objs[name] = std[name]
        elif not ins.operation.params:
            objs[name] = ins.operation
        else:
            raise ToposcoutError(f"cannot time the non-standard parametric gate {name!r}", field="circuit")
    return objs


def timed_target(circuit: QuantumCircuit, physical_qubits: Sequence[int], profile: DeviceProfile) -> Target:
    """A Target on the compact qubits with the profile's durations (dt = 1 ns) for exactly
    the gates and qubit pairs the circuit uses (both directions of each pair; each two-qubit
    gate on the pairs it is used on, so a coupler's duration belongs to its own native gate)."""
    n = len(physical_qubits)
    t = Target(num_qubits=n, dt=DT)
    pairs: dict[str, set[tuple[int, int]]] = {}  # each two-qubit gate on its own qubit pairs (per-coupler gates)
    for ins in circuit.data:
        if ins.operation.num_qubits == 2 and ins.operation.name not in _NON_GATES:
            a, b = (circuit.find_bit(q).index for q in ins.qubits)
            pairs.setdefault(ins.operation.name, set()).update({(a, b), (b, a)})
    for name, gate in _gate_objects(circuit).items():
        if gate.num_qubits == 1:
            t.add_instruction(gate, {(q,): InstructionProperties(
                duration=(0 if name in VIRTUAL_GATES else _ns(profile.qubit(physical_qubits[q]).one_qubit_ns)) * DT)
                for q in range(n)})
        else:
            props = {}
            for a, b in sorted(pairs[name]):
                dur = _ns(profile.edge(physical_qubits[a], physical_qubits[b]).two_qubit_ns)
                props[(a, b)] = InstructionProperties(duration=dur * DT)
            t.add_instruction(gate, props)
    t.add_instruction(Measure(), {(q,): InstructionProperties(duration=_ns(profile.measure_ns) * DT)
                                  for q in range(n)})
    t.add_instruction(Delay(Parameter("t")), {(q,): None for q in range(n)})
    return t


def schedule_circuit(circuit: QuantumCircuit, final_layout: Sequence[int] | None,
                     profile: DeviceProfile) -> Scheduled:
    """Strip to active qubits, schedule ALAP with the profile's durations, drop the final
    measurements. See the module docstring."""
    compact, phys, measured = strip_to_active(circuit, final_layout)
    target = timed_target(compact, phys, profile)
    timed = PassManager([ALAPScheduleAnalysis(target=target), PadDelay(target=target)]).run(compact)
    duration_ns = _ns(timed.estimate_duration(target, unit="s") / DT)
    body = QuantumCircuit(compact.num_qubits, global_phase=timed.global_phase)
    for ins in timed.data:
        if ins.operation.name == "measure":
            continue
        if ins.operation.name == "delay" and ins.operation.duration == 0:
            continue
        body.append(ins.operation, [timed.find_bit(q).index for q in ins.qubits])
    return Scheduled(circuit=body, physical_qubits=phys, measured=measured,
                     duration_ns=duration_ns, measure_ns=_ns(profile.measure_ns))


def schedule(compiled, profile: DeviceProfile) -> Scheduled:
    """:func:`schedule_circuit` of a ``toposcout.compiler.compile.Compiled``."""
    return schedule_circuit(compiled.circuit, compiled.final_layout, profile)


# --- errors -----------------------------------------------------------------------------
def _relax(profile: DeviceProfile, phys: int, time_ns: float) -> QuantumError:
    q = profile.qubit(phys)
    return thermal_relaxation_error(q.t1_us * 1e3, q.t2_us * 1e3, float(time_ns))


def _gate_figures(profile: DeviceProfile, phys: Sequence[int]) -> tuple[float, float, float]:
    """(the profile's gate error, the gate's duration in ns, the process fidelity of relaxation
    during it) of a native gate on ``phys``: what the channel and its infidelity are built from."""
    if len(phys) == 1:
        qp = profile.qubit(phys[0])
        dur = _ns(qp.one_qubit_ns)
        return qp.one_qubit_error, dur, relaxation_process_fidelity(qp.t1_us, qp.t2_us, dur)
    a, b = phys
    e = profile.edge(a, b)
    dur = _ns(e.two_qubit_ns)
    qa, qb = profile.qubit(a), profile.qubit(b)
    return e.two_qubit_error, dur, (relaxation_process_fidelity(qa.t1_us, qa.t2_us, dur)
                                    * relaxation_process_fidelity(qb.t1_us, qb.t2_us, dur))


def gate_error(profile: DeviceProfile, phys: Sequence[int], name: str) -> QuantumError | None:
    """The QuantumError of one native gate on physical qubits ``phys`` (None if noiseless):
    depolarizing remainder composed with relaxation over the gate's duration."""
    if name in VIRTUAL_GATES:
        return None
    r, dur, f_rel = _gate_figures(profile, phys)
    if len(phys) == 1:
        relax = _relax(profile, phys[0], dur) if dur > 0 else None
    else:
        a, b = phys
        relax = _relax(profile, a, dur).expand(_relax(profile, b, dur)) if dur > 0 else None
    p_dep = depolarizing_parameter(r, f_rel, len(phys))
    if relax is not None and f_rel >= 1.0:
        relax = None
    if p_dep <= 0 and relax is None:
        return None
    dep = depolarizing_error(p_dep, len(phys)) if p_dep > 0 else None
    if dep is None:
        return relax
    return dep if relax is None else dep.compose(relax)


def gate_infidelity(profile: DeviceProfile, phys: Sequence[int]) -> float:
    """Average infidelity of the whole gate on ``phys`` as simulated: the profile's error, or the
    relaxation during the gate when that alone is larger (then the depolarizing part is 0)."""
    r, _dur, f_rel = _gate_figures(profile, phys)
    d = 2 ** len(phys)
    return max(r, 1.0 - (d * f_rel + 1.0) / (d + 1.0))


def _gate_sites(circuit: QuantumCircuit) -> dict[str, set[tuple[int, ...]]]:
    sites: dict[str, set[tuple[int, ...]]] = {}
    for ins in circuit.data:
        name = ins.operation.name
        if name in _NON_GATES:
            continue
        if ins.operation.num_qubits not in (1, 2):
            continue
        sites.setdefault(name, set()).add(tuple(circuit.find_bit(q).index for q in ins.qubits))
    return sites


def readout_matrices(sched: Scheduled, profile: DeviceProfile, switches: NoiseSwitches = NoiseSwitches()):
    """One 2x2 confusion matrix per variable (row = prepared, column = read)."""
    mats = []
    for k in sched.measured:
        q = profile.qubit(sched.physical_qubits[k])
        if switches.readout:
            mats.append(np.array([[1 - q.p1_given_0, q.p1_given_0], [q.p0_given_1, 1 - q.p0_given_1]]))
        else:
            mats.append(np.eye(2))
    return mats


def build_noise_model(sched: Scheduled, profile: DeviceProfile,
                      switches: NoiseSwitches = NoiseSwitches()) -> NoiseModel:
    """The qiskit-aer NoiseModel of the compact circuit: one error per (gate, qubits) site
    used, keyed by compact index, plus readout errors on the measured qubits. Idle noise is
    not part of it (see :func:`noisy_circuit`)."""
    sites = _gate_sites(sched.circuit)
    basis = sorted(set(sites) | {"measure"})
    nm = NoiseModel(basis_gates=[b for b in basis if b != "measure"])
    for name, where in sorted(sites.items()):
        groups: dict[tuple, list[tuple[int, ...]]] = {}
        for qs in sorted(where):
            if (len(qs) == 1 and not switches.one_qubit) or (len(qs) == 2 and not switches.two_qubit):
                continue
            phys = [sched.physical_qubits[k] for k in qs]
            key = (tuple(profile.qubit(p) for p in phys), profile.edge(*phys) if len(phys) == 2 else None)
            groups.setdefault(key, []).append(qs)
        uniform = len(groups) == 1 and len(next(iter(groups.values()))) == len(where)
        for key, members in groups.items():
            err = gate_error(profile, [sched.physical_qubits[k] for k in members[0]], name)
            if err is None:
                continue
            if uniform:  # one error for every site: a smaller model, same channels
                nm.add_all_qubit_quantum_error(err, name)
            else:
                for qs in members:
                    nm.add_quantum_error(err, name, list(qs))
    if switches.readout:
        for k, m in zip(sched.measured, readout_matrices(sched, profile, switches)):
            if not np.allclose(m, np.eye(2)):
                nm.add_readout_error(ReadoutError(m), [k])
    return nm


def noisy_circuit(sched: Scheduled, profile: DeviceProfile,
                  switches: NoiseSwitches = NoiseSwitches()) -> QuantumCircuit:
    """The compact circuit with thermal relaxation appended after every delay (when the
    ``idle`` source is on). Gate noise comes from :func:`build_noise_model`."""
    if not switches.idle or profile.noise_scale == 0:
        return sched.circuit.copy()
    c = sched.circuit
    out = QuantumCircuit(c.num_qubits, global_phase=c.global_phase)
    cache: dict[tuple[int, int], object] = {}
    for ins in c.data:
        qs = [c.find_bit(q).index for q in ins.qubits]
        out.append(ins.operation, qs)
        if ins.operation.name == "delay":
            t = _delay_ns(ins.operation)
            key = (qs[0], t)
            if key not in cache:
                cache[key] = _relax(profile, sched.physical_qubits[qs[0]], t).to_instruction()
            out.append(cache[key], qs)
    return out


def _delay_ns(op) -> int:
    if op.unit == "dt":
        return int(op.duration)
    scale = {"s": 1e9, "ms": 1e6, "us": 1e3, "ns": 1.0, "ps": 1e-3}[op.unit]
    return _ns(op.duration * scale)


def operation_errors(sched: Scheduled, profile: DeviceProfile) -> dict[str, list[float]]:
    """Error probability of every operation, for the ESP estimate:

    * ``two_qubit`` / ``one_qubit``: the average infidelity of each gate executed
      (:func:`gate_infidelity`: the profile's, or the relaxation during the gate when that
      alone is larger; virtual rz: none);
    * ``idle``: the average infidelity of thermal relaxation over each delay, except delays
      before a qubit's first gate (the qubit is in |0>, which does not decay) and delays after
      the last gate of a qubit that is not measured (they cannot reach the output);
    * ``readout``: (p(1|0) + p(0|1)) / 2 per measured qubit.
    """
    c = sched.circuit
    first: dict[int, int] = {}
    last: dict[int, int] = {}
    for pos, ins in enumerate(c.data):
        if ins.operation.name in _NON_GATES:
            continue
        for q in ins.qubits:
            k = c.find_bit(q).index
            first.setdefault(k, pos)
            last[k] = pos
    measured = set(sched.measured)
    out: dict[str, list[float]] = {"two_qubit": [], "one_qubit": [], "idle": [], "readout": []}
    for pos, ins in enumerate(c.data):
        name = ins.operation.name
        qs = [c.find_bit(q).index for q in ins.qubits]
        phys = [sched.physical_qubits[k] for k in qs]
        if name == "delay":
            k = qs[0]
            if k not in first or pos < first[k] or (k not in measured and pos > last[k]):
                continue
            qp = profile.qubit(phys[0])
            out["idle"].append(relaxation_average_infidelity(qp.t1_us, qp.t2_us, _delay_ns(ins.operation)))
        elif name in _NON_GATES or name in VIRTUAL_GATES:
            continue
        elif len(qs) == 1:
            out["one_qubit"].append(gate_infidelity(profile, phys))
        else:
            out["two_qubit"].append(gate_infidelity(profile, phys))
    for k in sched.measured:
        qp = profile.qubit(sched.physical_qubits[k])
        out["readout"].append((qp.p1_given_0 + qp.p0_given_1) / 2)
    return out
