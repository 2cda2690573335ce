"""Clifford estimate of the state fidelity at any size: a stabilizer simulation with ``stim``.

What is computed (one scheduled circuit, one device profile):

* **The Clifford twin.** The compact, scheduled circuit of
  :class:`toposcout.compiler.noise.Scheduled` with every rotation angle rounded to the nearest
  multiple of pi/2 (``rz``, ``rx``, ``ry``, ``rzz``, ``rxx``, ...; ``cx``, ``cz``, ``sx``, ``x``
  are Clifford already). The gate layout, the durations and the idle windows (``delay``) are
  the same as in the density-matrix path. Each gate is turned into a stim tableau from its
  unitary (:meth:`stim.Tableau.from_unitary_matrix`), so every native gate set of
  ``topologies/gate_sets.toml`` is handled the same way.
* **Pauli-twirled noise**, in the channel order of :mod:`toposcout.compiler.noise` (after
  each gate: its depolarizing remainder, then the relaxation during the gate; after each
  delay: the relaxation of the idle window):

  - qiskit's ``depolarizing_error(lam, n)`` (rho -> (1-lam) rho + lam I/d) puts lam/d^2 on
    every non-identity Pauli, so it is stim's ``DEPOLARIZE1(3 lam / 4)`` /
    ``DEPOLARIZE2(15 lam / 16)``; with the depolarizing part's average infidelity
    r = lam (d-1)/d (Nielsen & Chuang, section 8.3 / Nielsen 2002) this is p = 1.5 r on one
    qubit and p = 1.25 r on two.
  - thermal relaxation over a time t (amplitude and phase damping, ground-state bath) is
    replaced by its Pauli twirl (Ghosh, Fowler & Geller, PRA 86, 062318 (2012)):
    px = py = (1 - e^{-t/T1})/4, pz = (1 - e^{-t/T2})/2 - (1 - e^{-t/T1})/4; a
    two-qubit gate gets the twirl of each qubit's relaxation (the twirl of a product is the
    product of the twirls, and twirling after the depolarizing part changes nothing, as the
    depolarizing channel is Pauli-diagonal already).
  - idle windows before a qubit's first gate carry no noise (the qubit is in |0>, which does
    not decay; same rule as ``noise.operation_errors``).
  - readout: a classical flip of probability (p(1|0) + p(0|1))/2 on each variable after the
    state is checked (it enters ``clifford_read_fidelity`` only: readout cannot change the
    state, so it is not part of the state fidelity, as in ``toposcout.compiler.metrics``).
* **Counting returns.** After the noisy twin, the stabilizers of the ideal state of the
  variables are measured noiselessly (``MPP``); a shot *returns* when every one has its ideal
  value. When every active qubit is a variable this is exactly "run the noisy circuit, then
  its noiseless inverse, and count returns to |0...0>" (measuring U Z_i U^dagger after U is
  measuring Z_i after U^dagger). With routing ancillas, only the stabilizer group of the
  variables' ideal reduced state is checked (Gaussian elimination with the ancillas first),
  because the exact figure traces the ancillas out; when that group has m < k generators the
  return rate is multiplied by 2^(m-k) (Tr(rho_ideal rho) for a mixed stabilizer state).
  Under Pauli noise this return rate *is* Tr(rho_ideal rho) of the twin (exact, no bias).
* **Three estimators** (``clifford_estimator``). The twin's detector error model (stim) is a
  :class:`toposcout.compiler.parity.ParityProblem`: when its span has rank <= 20 the return
  probability is computed exactly (``exact stabilizer average``); above that, shots are
  counted (``counted returns``, below) unless even the no-error probability would need more
  than a quarter of ``max_shots``, and then the importance-sampled ``weighted stabilizer
  average`` of :mod:`toposcout.compiler.parity` is used. The read fidelity is the state one
  times the probability that the readout flips alone cancel on the read checks (the only
  mechanisms that reach them apart from the state checks').
* **Shots** are drawn in batches from stim's compiled detector sampler until the binomial
  standard error sqrt(F(1-F)/N) is at most ``rel_se`` x F, or ``max_shots`` is reached.
  When no shot returns, the figure is the one-sided 95 % upper bound 1 - 0.05^(1/N) (about
  3/N, the "rule of three") and ``clifford_upper_bound`` is True.

What the proxy claims and where it fails (our own reading; the Clifford-proxy idea is the one
studied by Merkel, Proctor et al., arXiv:2503.05943 (2025)): the fidelity of a circuit under
gate and idle noise depends mostly on how many errors occur and how they spread through the
two-qubit gates, which the Clifford twin keeps (same two-qubit gates, same durations); the
exact rotation angles matter less. It fails, or is only approximate, when

* errors are coherent (over-rotations, crosstalk): the twirl removes the coherence, and
  coherent errors add in amplitude, not probability; this noise model has none;
* amplitude damping acts on a qubit that is mostly in |0>: the twirl turns the decay into
  symmetric X/Y flips, which harm |0> as well (it over-counts the error); only the windows
  before a qubit's first gate are exempted here;
* rounded angles change which errors are caught: an error before a small rotation
  (rounded to the identity) or before a rotation near pi/4 propagates differently in the
  twin than in the real circuit, so errors that the real circuit partly absorbs (a Z error
  on a qubit in a Z eigenstate) may count as full failures or the other way round;
* the figure is a *state* fidelity of the twin; distributions (Hellinger, KL, marginals)
  of the real circuit are not available from it.

In this repository's tests it agrees with the exact density-matrix state fidelity to a
few per cent (see README, "Clifford estimate"). Like every figure here it is a simulation
under a stated noise model, not a promise about a device, and it is an *estimate*.
"""

from __future__ import annotations

import math
import time
from typing import Any, Sequence

import numpy as np
import stim
from qiskit.circuit.library import get_standard_gate_name_mapping
from qiskit.quantum_info import Operator

from toposcout.compiler.options import DEFAULT_REQUIREMENT_TOLERANCE
from toposcout.compiler.errors import ToposcoutError
from toposcout.compiler.metrics import bisect_noise_scale
from toposcout.compiler.noise import (
    VIRTUAL_GATES,
    NoiseSwitches,
    Scheduled,
    _delay_ns,
    _ns,
    schedule,
)
from toposcout.compiler.parity import (EXACT_RANK, MIN_EFFECTIVE_SAMPLES, ParityEstimate, ParityProblem, estimate_cancellation,
                                       independent_flips)
from toposcout.compiler.profiles import DeviceProfile, depolarizing_parameter, relaxation_process_fidelity

__all__ = [
    "CLIFFORD_LABEL",
    "CLIFFORD_KEYS",
    "ESTIMATORS",
    "depolarizing_pauli_probability",
    "relaxation_twirl",
    "round_angle",
    "clifford_circuit",
    "CliffordCircuit",
    "count_returns",
    "fidelity_from_counts",
    "Tally",
    "clifford_tally",
    "parity_problems",
    "figures_from_tally",
    "budget_from_figures",
    "part_seed",
    "clifford_figures",
    "clifford_budget",
    "clifford_threshold",
]

#: the label every surface shows beside a clifford figure.
CLIFFORD_LABEL = ("estimate: stabilizer simulation of the Clifford twin (angles rounded to multiples of "
                  "pi/2, Pauli-twirled noise), not the exact density matrix")
#: keys of :func:`clifford_figures`.
CLIFFORD_KEYS = (
    "clifford_estimator", "clifford_samples", "clifford_effective_samples", "clifford_state_fidelity", "clifford_state_fidelity_se", "clifford_log10_state_fidelity",
    "clifford_read_fidelity", "clifford_read_fidelity_se",
    "clifford_shots", "clifford_returns", "clifford_upper_bound", "clifford_rel_se_target",
    "clifford_rounded_rotations", "clifford_checked_stabilizers", "clifford_seconds", "clifford_label",
)
#: how a clifford estimate may be formed (see :func:`clifford_tally`).
ESTIMATORS = ("auto", "returns", "weighted")
_BATCH_MIN = 4096
_BATCH_MAX = 1 << 20
_PI2 = math.pi / 2


# --- twirl formulas ---------------------------------------------------------------------
def depolarizing_pauli_probability(lam: float, num_qubits: int) -> float:
    """Total non-identity Pauli probability of qiskit's ``depolarizing_error(lam, n)``:
    lam (d^2 - 1)/d^2 (each of the d^2 - 1 Paulis gets lam/d^2), the ``p`` of stim's
    DEPOLARIZE1 / DEPOLARIZE2. Equals 1.5 r (one qubit) or 1.25 r (two qubits) for the
    average infidelity r = lam (d-1)/d of the channel (Nielsen & Chuang, section 8.3)."""
    d2 = 4**num_qubits
    return float(lam) * (d2 - 1) / d2


def relaxation_twirl(t1_ns: float, t2_ns: float, time_ns: float) -> tuple[float, float, float]:
    """(px, py, pz) of the Pauli twirl of thermal relaxation over ``time_ns`` (ground-state
    bath): Ghosh, Fowler & Geller, PRA 86, 062318 (2012), eq. for the Pauli-twirled
    amplitude/phase damping channel."""
    if time_ns <= 0:
        return 0.0, 0.0, 0.0
    a = 0.0 if math.isinf(t1_ns) else 1.0 - math.exp(-time_ns / t1_ns)
    b = 0.0 if math.isinf(t2_ns) else 1.0 - math.exp(-time_ns / t2_ns)
    px = a / 4.0
    pz = max(b / 2.0 - a / 4.0, 0.0)
    return px, px, pz


def round_angle(theta: float) -> float:
    """The nearest multiple of pi/2 (ties away from zero, as Python's round of k + 1/2 is not
    used: ``floor(x + 1/2)``)."""
    return _PI2 * math.floor(float(theta) / _PI2 + 0.5)


# --- the twin ---------------------------------------------------------------------------
_STD = get_standard_gate_name_mapping()


def _gate_tableau(op) -> tuple[stim.Tableau, bool]:
    """The stim tableau of ``op`` with its angles rounded, and whether any angle changed."""
    params = [float(p) for p in op.params]
    rounded = [round_angle(p) for p in params]
    changed = any(abs(a - b) > 1e-9 for a, b in zip(params, rounded))
    gate = op
    if params:
        base = _STD.get(op.name)
        if base is None:
            raise ToposcoutError(f"the clifford method cannot round the parameters of the non-standard gate "
                                 f"{op.name!r}; translate the circuit to a native gate set first", field="circuit")
        gate = type(base)(*rounded)
    u = Operator(gate).data
    try:
        tab = stim.Tableau.from_unitary_matrix(u, endian="little")
    except ValueError as exc:
        raise ToposcoutError(f"gate {op.name}{tuple(rounded)} is not Clifford after rounding its angles; the "
                             "clifford method supports rotation gates and Clifford gates", field="circuit") from exc
    return tab, changed


class CliffordCircuit:
    """The stim circuit of the twin plus what is needed to read it.

    ``circuit``: noisy twin, then the noiseless check of the ``checked`` stabilizers
    (detectors 0..m-1: state returns), then readout flips and the same check again
    (detectors m..2m-1: read returns; absent when readout is off). ``scale`` = 2^(m-k)."""

    def __init__(self, circuit: stim.Circuit, checked: int, variables: int, readout: bool, rounded: int):
        self.circuit = circuit
        self.checked = checked
        self.variables = variables
        self.readout = readout
        self.rounded = rounded

    @property
    def scale(self) -> float:
        return 2.0 ** (self.checked - self.variables)


def _append_pauli1(c: stim.Circuit, q: int, probs: tuple[float, float, float]) -> None:
    """The one-qubit Pauli channel ``probs`` as three independent flips (X, Y, Z) with the same
    Pauli eigenvalues (:func:`toposcout.compiler.parity.independent_flips`): the same channel
    for the shots, and one stim can turn into a detector error model without approximation.
    A flip whose exact probability would be negative (about -px^2 for a pure amplitude-damping
    twirl, pz = 0) is left out: a change below px^2 in that window's figures."""
    if not any(p > 0 for p in probs):
        return
    for gate, log_c in zip(("X_ERROR", "Y_ERROR", "Z_ERROR"), independent_flips(*probs)):
        flip = (1.0 - math.exp(log_c)) / 2.0
        if flip > 0:
            c.append(gate, [q], [flip])


def clifford_circuit(sched: Scheduled, profile: DeviceProfile,
                     switches: NoiseSwitches = NoiseSwitches()) -> CliffordCircuit:
    """Build the stim twin of ``sched`` under ``profile`` (see the module docstring)."""
    src = sched.circuit
    n = sched.num_qubits
    measured = list(sched.measured)
    ancillas = [q for q in range(n) if q not in set(measured)]
    # stim index: ancillas first, then the variables in variable order (elimination order)
    sidx = {q: i for i, q in enumerate(ancillas)}
    sidx.update({q: len(ancillas) + i for i, q in enumerate(measured)})
    phys = sched.physical_qubits
    ideal = stim.Circuit(f"I {n - 1}") if n else stim.Circuit()  # fixes the tableau size at n
    noisy = ideal.copy()
    cache: dict[tuple, tuple[stim.Circuit, bool]] = {}
    twirl_cache: dict[tuple, tuple] = {}
    started: set[int] = set()
    rounded = 0
    quiet = profile.noise_scale == 0
    for ins in src.data:
        op = ins.operation
        name = op.name
        qs = [src.find_bit(q).index for q in ins.qubits]
        if name == "barrier":
            continue
        if name == "delay":
            q = qs[0]
            if quiet or not switches.idle or q not in started:
                continue
            t = _delay_ns(op)
            key = ("idle", q, t)
            if key not in twirl_cache:
                qp = profile.qubit(phys[q])
                twirl_cache[key] = relaxation_twirl(qp.t1_us * 1e3, qp.t2_us * 1e3, t)
            _append_pauli1(noisy, sidx[q], twirl_cache[key])
            continue
        if name == "measure":
            raise ToposcoutError("the scheduled circuit still has measurements; pass a Scheduled from "
                                 "toposcout.compiler.noise.schedule", field="circuit")
        key = (name, tuple(float(p) for p in op.params))
        if key not in cache:
            tab, changed = _gate_tableau(op)
            cache[key] = (tab.to_circuit("elimination"), changed)
        piece, changed = cache[key]
        rounded += int(changed)
        targets = [sidx[q] for q in qs]
        remapped = stim.Circuit()
        for inst in piece:
            remapped.append(inst.name, [targets[t.value] for t in inst.targets_copy()], inst.gate_args_copy())
        ideal += remapped
        noisy += remapped
        started.update(qs)
        if quiet or name in VIRTUAL_GATES:
            continue
        if (len(qs) == 1 and not switches.one_qubit) or (len(qs) == 2 and not switches.two_qubit):
            continue
        gkey = ("gate", name, tuple(qs))
        if gkey not in twirl_cache:
            twirl_cache[gkey] = _gate_twirl(profile, [phys[q] for q in qs])
        p_dep, relax = twirl_cache[gkey]
        if p_dep > 0:
            noisy.append("DEPOLARIZE1" if len(qs) == 1 else "DEPOLARIZE2", targets, [p_dep])
        for t, probs in zip(targets, relax):
            _append_pauli1(noisy, t, probs)
    stabs = stim.Tableau.from_circuit(ideal, ignore_noise=True, ignore_measurement=True).to_stabilizers(
        canonicalize=True)
    na = len(ancillas)
    checked = [s for s in stabs if all(s[i] == 0 for i in range(na))]
    out = noisy.copy()
    _append_checks(out, checked)
    if switches.readout and not quiet:
        for k, q in enumerate(measured):
            qp = profile.qubit(phys[q])
            p = (qp.p1_given_0 + qp.p0_given_1) / 2
            if p > 0:
                out.append("X_ERROR", [sidx[q]], [p])
        _append_checks(out, checked)
    return CliffordCircuit(out, len(checked), len(measured), switches.readout and not quiet, rounded)


def _append_checks(c: stim.Circuit, checked: Sequence[stim.PauliString]) -> None:
    for s in checked:
        targets = []
        for i in range(len(s)):
            pauli = s[i]
            if pauli == 0:
                continue
            if targets:
                targets.append(stim.target_combiner())
            targets.append((stim.target_x, stim.target_y, stim.target_z)[pauli - 1](i))
        c.append("MPP", targets)
    m = len(checked)
    for j in range(m):
        c.append("DETECTOR", [stim.target_rec(-m + j)])


def _gate_twirl(profile: DeviceProfile, phys: Sequence[int]):
    """(stim depolarizing p, [(px, py, pz) per qubit]) of a gate on physical ``phys``: the
    twirl of ``toposcout.compiler.noise.gate_error`` (same depolarizing remainder, same
    relaxation over the gate's duration, same clipping)."""
    if len(phys) == 1:
        r, dur = profile.qubit(phys[0]).one_qubit_error, _ns(profile.qubit(phys[0]).one_qubit_ns)
    else:
        e = profile.edge(*phys)
        r, dur = e.two_qubit_error, _ns(e.two_qubit_ns)
    qps = [profile.qubit(p) for p in phys]
    f_rel = float(np.prod([relaxation_process_fidelity(q.t1_us, q.t2_us, dur) for q in qps]))
    lam = depolarizing_parameter(r, f_rel, len(phys))
    relax = [(0.0, 0.0, 0.0)] * len(phys)
    if dur > 0 and f_rel < 1.0:
        relax = [relaxation_twirl(q.t1_us * 1e3, q.t2_us * 1e3, dur) for q in qps]
    return depolarizing_pauli_probability(lam, len(phys)), relax


# --- sampling ---------------------------------------------------------------------------
def count_returns(twin: CliffordCircuit, shots: int, *, seed: int | None = 0, sampler=None) -> tuple[int, int]:
    """(state returns, read returns) in ``shots`` shots of the twin: one batch, usable as a
    separate task (independent seeds give independent batches)."""
    if shots <= 0:
        return 0, 0
    m = twin.checked
    if m == 0:
        return shots, shots
    smp = sampler if sampler is not None else twin.circuit.compile_detector_sampler(seed=seed)
    det = smp.sample(shots, bit_packed=False)
    state_ok = ~np.any(det[:, :m], axis=1)
    state = int(np.count_nonzero(state_ok))
    if twin.readout:
        read = int(np.count_nonzero(state_ok & ~np.any(det[:, m:2 * m], axis=1)))
    else:
        read = state
    return state, read


def fidelity_from_counts(returns: int, shots: int, scale: float = 1.0) -> tuple[float, float, bool]:
    """(estimate, binomial standard error, upper_bound). With no return, the one-sided 95 %
    upper bound 1 - 0.05^(1/shots) (about 3/shots) and upper_bound True."""
    if shots <= 0:
        raise ToposcoutError("no shots were taken", field="max_shots")
    if returns == 0:
        return scale * (1.0 - 0.05 ** (1.0 / shots)), math.nan, True
    f = returns / shots
    return scale * f, scale * math.sqrt(f * (1.0 - f) / shots), False


def _check_options(rel_se: float, max_shots: int) -> None:
    if not (isinstance(rel_se, (int, float)) and not isinstance(rel_se, bool) and 0 < rel_se < 1):
        raise ToposcoutError(f"rel_se (the relative standard error of the clifford estimate) must be in (0, 1), "
                             f"got {rel_se!r}", field="rel_se")
    if not isinstance(max_shots, int) or isinstance(max_shots, bool) or max_shots < 1:
        raise ToposcoutError(f"max_shots must be an integer >= 1, got {max_shots!r}", field="max_shots")


def _sample_adaptive(twin: CliffordCircuit, rel_se: float, max_shots: int, seed: int) -> tuple[int, int, int]:
    """Batches until rel. SE <= rel_se or max_shots: (shots, state returns, read returns)."""
    sampler = twin.circuit.compile_detector_sampler(seed=seed) if twin.checked else None
    shots = ret = read = 0
    batch = min(_BATCH_MIN, max_shots)
    while shots < max_shots:
        a, b = count_returns(twin, batch, sampler=sampler)
        shots, ret, read = shots + batch, ret + a, read + b
        if ret == shots:  # noiseless twin: every shot returns, the SE is zero
            break
        if ret > 0:
            f = ret / shots
            if math.sqrt(f * (1 - f) / shots) <= rel_se * f:
                break
            need = (1 - f) / (f * rel_se * rel_se)  # binomial: SE/F = sqrt((1-F)/(F N))
            nxt = int(need * 1.1) - shots
        else:
            nxt = shots * 8
        batch = int(min(max(nxt, _BATCH_MIN), _BATCH_MAX, max_shots - shots))
    return shots, ret, read


def parity_problems(twin: CliffordCircuit) -> tuple[ParityProblem, ParityProblem | None]:
    """The twin's detector error model (stim, exact: every channel of the twin is depolarizing
    or independent flips) as two :class:`toposcout.compiler.parity.ParityProblem`: the state
    checks (detectors 0..m-1), and the read checks' own part (detectors m..2m-1 minus the
    state checks: only readout flips reach it, so the read return probability is the state
    one times this one's; None without readout)."""
    m = twin.checked
    dem = twin.circuit.detector_error_model(decompose_errors=False, approximate_disjoint_errors=False,
                                            flatten_loops=True)
    state_sy, state_lc, read_sy, read_lc = [], [], [], []
    for inst in dem.flattened():
        if inst.type != "error":
            continue
        v = 0
        for t in inst.targets_copy():
            if t.is_relative_detector_id():
                v ^= 1 << t.val
        low, high = v & ((1 << m) - 1), v >> m
        p = inst.args_copy()[0]
        log_c = math.log1p(-2.0 * p) if p < 0.5 else -math.inf
        if low:
            if twin.readout and high != low:
                raise ToposcoutError("internal: a circuit error reaches the read checks differently from the "
                                     "state checks", field="circuit")
            state_sy.append(low)
            state_lc.append(log_c)
        elif high:
            read_sy.append(high)
            read_lc.append(log_c)
    return ParityProblem(state_sy, state_lc), (ParityProblem(read_sy, read_lc) if twin.readout else None)


def _weighted_is_better(state: ParityProblem, readout: ParityProblem | None, rel_se: float, max_shots: int) -> bool:
    """The stabilizer average is used when it is exact (every span of rank <= EXACT_RANK:
    no shot noise at all, in milliseconds), or when counting would be hopeless: counting
    returns needs about (1 - F) / (F rel_se^2) shots, F is at least the no-error
    probability P0, and even F = P0 would need more than a quarter of ``max_shots``.
    Deterministic, so every part of a split row decides the same."""
    if state.rank <= EXACT_RANK and (readout is None or readout.rank <= EXACT_RANK):
        return True
    p0 = math.exp(state.no_fire_log_probability())
    return p0 <= 0 or (1 - p0) / (p0 * rel_se * rel_se) > max_shots / 4


class Tally:
    """Counts of one batch of shots of a twin (a *part*: shots with their own seed), to be
    merged with the other parts of the same twin by ``+``: shots and returns add, which is
    exactly one binomial count of the pooled shots when the parts' seeds give independent
    streams. Plain picklable value (``to_dict`` / ``from_dict`` for JSON)."""

    __slots__ = ("shots", "returns", "read_returns", "checked", "variables", "rounded", "seconds", "parts",
                 "weighted")

    def __init__(self, shots: int, returns: int, read_returns: int, checked: int, variables: int, rounded: int,
                 seconds: float = 0.0, parts: int = 1, weighted: dict | None = None):
        self.shots, self.returns, self.read_returns = int(shots), int(returns), int(read_returns)
        self.checked, self.variables, self.rounded = int(checked), int(variables), int(rounded)
        self.seconds, self.parts = float(seconds), int(parts)
        #: None (counted returns), or {"state": ParityEstimate dict, "readout": ParityEstimate dict or None}
        self.weighted = weighted

    @property
    def scale(self) -> float:
        return 2.0 ** (self.checked - self.variables)

    def __add__(self, other: "Tally") -> "Tally":
        if (self.checked, self.variables, self.rounded) != (other.checked, other.variables, other.rounded):
            raise ToposcoutError("cannot merge the shots of two different Clifford twins", field="parts")
        if (self.weighted is None) != (other.weighted is None):
            raise ToposcoutError("cannot merge counted returns with a weighted estimate", field="parts")
        weighted = None
        if self.weighted is not None:
            weighted = {k: _merge_estimates(self.weighted[k], other.weighted[k]) for k in ("state", "readout")}
        return Tally(self.shots + other.shots, self.returns + other.returns, self.read_returns + other.read_returns,
                     self.checked, self.variables, self.rounded, self.seconds + other.seconds,
                     self.parts + other.parts, weighted)

    def to_dict(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in self.__slots__}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Tally":
        return cls(**{k: d[k] for k in cls.__slots__ if k in d})

    def __eq__(self, other) -> bool:
        return isinstance(other, Tally) and self.to_dict() == other.to_dict()

    def __repr__(self) -> str:
        return f"Tally({self.to_dict()})"


def _merge_estimates(a: dict | None, b: dict | None) -> dict | None:
    if a is None or b is None:
        return None
    return (ParityEstimate.from_dict(a) + ParityEstimate.from_dict(b)).to_dict()


def part_seed(seed: int, part: int) -> int:
    """The stim seed of part ``part`` of a row seeded ``seed`` (part 0: ``seed`` itself, so a
    row in one part is the unsplit row)."""
    return int(seed) if part == 0 else (int(seed) * 1_000_003 + int(part)) % 2**63


def clifford_tally(sched: Scheduled, profile: DeviceProfile, switches: NoiseSwitches = NoiseSwitches(), *,
                   rel_se: float = 0.05, max_shots: int = 2_000_000, seed: int = 0, estimator: str = "auto") -> Tally:
    """Shots of the twin until its relative standard error is at most ``rel_se`` (or
    ``max_shots``): one part. A row split into P parts runs P of these with ``rel_se *
    sqrt(P)``, ``max_shots / P`` and :func:`part_seed` seeds, and adds them up.

    ``estimator``: ``returns`` counts returns; ``weighted`` takes the stabilizer average of
    :mod:`toposcout.compiler.parity` (exact for a small span, else importance-sampled, with
    ``max_shots`` as its sample cap); ``auto`` counts unless returns would be too rare to
    count (:func:`_weighted_is_better`)."""
    _check_options(rel_se, max_shots)
    if estimator not in ESTIMATORS:
        raise ToposcoutError(f"unknown clifford estimator {estimator!r}; choose one of {', '.join(ESTIMATORS)}",
                             field="estimator")
    t0 = time.perf_counter()
    twin = clifford_circuit(sched, profile, switches)
    if twin.checked and estimator != "returns":
        state, readout = parity_problems(twin)
        if estimator == "weighted" or (estimator == "auto" and _weighted_is_better(state, readout, rel_se, max_shots)):
            est = {"state": estimate_cancellation(state, rel_se=rel_se, max_samples=max_shots, seed=seed).to_dict(),
                   "readout": None if readout is None else estimate_cancellation(
                       readout, rel_se=rel_se, max_samples=max_shots, seed=seed + 1).to_dict()}
            return Tally(0, 0, 0, twin.checked, twin.variables, twin.rounded, time.perf_counter() - t0,
                         weighted=est)
    shots, ret, read = _sample_adaptive(twin, rel_se, max_shots, seed)
    return Tally(shots, ret, read, twin.checked, twin.variables, twin.rounded, time.perf_counter() - t0)


def figures_from_tally(tally: Tally, rel_se: float) -> dict[str, Any]:
    """The :data:`CLIFFORD_KEYS` dict of a (merged) tally."""
    if tally.weighted is not None:
        return _weighted_figures(tally, rel_se)
    f, se, upper = fidelity_from_counts(tally.returns, tally.shots, tally.scale)
    fr, ser, _upper_r = fidelity_from_counts(tally.read_returns, tally.shots, tally.scale)
    return {
        "clifford_estimator": "counted returns",
        "clifford_samples": None,
        "clifford_effective_samples": None,
        "clifford_state_fidelity": f,
        "clifford_state_fidelity_se": None if math.isnan(se) else se,
        "clifford_log10_state_fidelity": math.log10(f) if f > 0 else None,
        "clifford_read_fidelity": fr,
        "clifford_read_fidelity_se": None if math.isnan(ser) else ser,
        "clifford_shots": tally.shots,
        "clifford_returns": tally.returns,
        "clifford_upper_bound": upper,
        "clifford_rel_se_target": float(rel_se),
        "clifford_rounded_rotations": tally.rounded,
        "clifford_checked_stabilizers": tally.checked,
        "clifford_seconds": tally.seconds,
        "clifford_label": CLIFFORD_LABEL + (" (upper bound: no shot returned)" if upper else ""),
    }


def _estimator_note(state: ParityEstimate) -> str:
    if state.exact:
        return "; the twin's fidelity computed exactly (no sampling error)"
    note = (f"; a weighted average over {state.samples} sampled stabilizers "
            f"({state.effective_samples:.0f} effective)")
    if state.effective_samples < MIN_EFFECTIVE_SAMPLES:
        note += ": too few effective samples, its standard error may be too small"
    return note


def _weighted_figures(tally: Tally, rel_se: float) -> dict[str, Any]:
    state = ParityEstimate.from_dict(tally.weighted["state"])
    readout = tally.weighted["readout"]
    f, se = tally.scale * state.value, tally.scale * state.se
    ro = None if readout is None else ParityEstimate.from_dict(readout)
    if ro is None:
        fr, ser = f, se
    else:
        fr = f * ro.value
        ser = math.hypot(se * ro.value, f * ro.se)
    exact = state.exact and (ro is None or ro.exact)
    return {
        "clifford_estimator": "exact stabilizer average" if exact else "weighted stabilizer average",
        "clifford_samples": state.samples,
        "clifford_effective_samples": None if state.exact else state.effective_samples,
        "clifford_state_fidelity": f,
        "clifford_state_fidelity_se": se,
        "clifford_log10_state_fidelity": math.log10(f) if f > 0 else None,
        "clifford_read_fidelity": fr,
        "clifford_read_fidelity_se": ser,
        "clifford_shots": 0,
        "clifford_returns": None,
        "clifford_upper_bound": False,
        "clifford_rel_se_target": float(rel_se),
        "clifford_rounded_rotations": tally.rounded,
        "clifford_checked_stabilizers": tally.checked,
        "clifford_seconds": tally.seconds,
        "clifford_label": CLIFFORD_LABEL + _estimator_note(state),
    }


def clifford_figures(sched: Scheduled, profile: DeviceProfile, switches: NoiseSwitches = NoiseSwitches(), *,
                     rel_se: float = 0.05, max_shots: int = 2_000_000, seed: int = 0,
                     estimator: str = "auto") -> dict[str, Any]:
    """The Clifford estimate of one scheduled circuit: a flat dict with :data:`CLIFFORD_KEYS`.

    ``clifford_state_fidelity`` estimates the state fidelity of the variables (as
    ``state_fidelity`` of the density-matrix path); ``clifford_read_fidelity`` also counts
    a readout flip of any variable as a failure. Both come from the same shots; their
    ``_se`` is the binomial standard error (NaN -> None when no shot returned: then the
    figure is an upper bound and ``clifford_upper_bound`` is True)."""
    return figures_from_tally(clifford_tally(sched, profile, switches, rel_se=rel_se, max_shots=max_shots,
                                             seed=seed, estimator=estimator), rel_se)


def budget_from_figures(base: dict[str, Any], off: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """The ``clifford_budget_*`` fields from the all-on figures and those with each source
    off (``off[s]`` for s in two_qubit, one_qubit, idle); see :func:`clifford_budget`. A
    difference involving an upper bound (no shot returned) is not a figure: it is None, and
    ``error_budget_note`` says which sources it concerns."""
    out: dict[str, Any] = {}
    bounded = []
    for s in ("two_qubit", "one_qubit", "idle"):
        if base["clifford_upper_bound"] or off[s]["clifford_upper_bound"]:
            out[f"clifford_budget_state_{s}"] = out[f"clifford_budget_state_{s}_se"] = None
            bounded.append(s)
            continue
        out[f"clifford_budget_state_{s}"] = off[s]["clifford_state_fidelity"] - base["clifford_state_fidelity"]
        se_off = off[s]["clifford_state_fidelity_se"] or 0.0
        se_on = base["clifford_state_fidelity_se"] or 0.0
        out[f"clifford_budget_state_{s}_se"] = math.hypot(se_off, se_on)
    out["clifford_budget_readout"] = (None if base["clifford_upper_bound"] else
                                      base["clifford_state_fidelity"] - base["clifford_read_fidelity"])
    if bounded:
        out["error_budget_note"] = (f"clifford budget of {', '.join(bounded)} not computed: no shot returned with all "
                                    "noise on" + ("" if base["clifford_upper_bound"] else " or with that source off")
                                    + " (only upper bounds; a difference of bounds is not a figure)")
    return out


def clifford_budget(sched: Scheduled, profile: DeviceProfile, *, rel_se: float = 0.05,
                    max_shots: int = 2_000_000, seed: int = 0, base: dict | None = None,
                    estimator: str = "auto") -> dict[str, Any]:
    """Error budget from the Clifford estimate: ``clifford_budget_state_<s>`` = estimate with
    source ``s`` off minus estimate with all on (two_qubit, one_qubit, idle), and
    ``clifford_budget_readout`` = state minus read fidelity of the all-on run (readout needs
    no new run). ``base``: the all-on :func:`clifford_figures` if already computed."""
    on = NoiseSwitches()
    base = base or clifford_figures(sched, profile, on, rel_se=rel_se, max_shots=max_shots, seed=seed,
                                    estimator=estimator)
    off = {s: clifford_figures(sched, profile, on.without(s), rel_se=rel_se, max_shots=max_shots, seed=seed,
                               estimator=estimator)
           for s in ("two_qubit", "one_qubit", "idle")}
    return budget_from_figures(base, off)


# --- requirement ------------------------------------------------------------------------
def clifford_threshold(sched_or_compiled, profile: DeviceProfile, *, fidelity_target: float = 0.5,
                       rel_tol: float = DEFAULT_REQUIREMENT_TOLERANCE, max_evaluations: int = 40,
                       rel_se: float = 0.05,
                       max_shots: int = 2_000_000, seed: int = 0) -> dict[str, Any]:
    """The largest two-qubit error at which the Clifford estimate of the state fidelity still
    reaches ``fidelity_target``: the bisection of
    ``toposcout.compiler.metrics.threshold_two_qubit_error`` (every error rate scaled together,
    the profile's own scale replaced, same keys) on the estimate, every evaluation with the
    same ``seed`` (common random numbers, so the estimate is monotone in the scale up to
    shot noise). Extra keys: ``threshold_two_qubit_error_se`` (shot noise carried through
    the local slope: SE(F) / |dF/ds| from two more evaluations at 0.9 and 1.1 times the
    threshold scale), ``threshold_bracket_two_qubit_error`` ([lower, upper]: the bisection
    bracket), ``fidelity_at_threshold_se``, ``threshold_shots``, ``threshold_method`` and
    ``threshold_label``. ``sched_or_compiled``: a Scheduled, or a Compiled (scheduled here;
    the schedule does not depend on the noise scale)."""
    if not 0 < fidelity_target < 1:
        raise ToposcoutError(f"fidelity_target must be in (0, 1), got {fidelity_target}", field="fidelity_target")
    _check_options(rel_se, max_shots)
    base = profile.scaled(1.0)
    sched = sched_or_compiled if isinstance(sched_or_compiled, Scheduled) else schedule(sched_or_compiled, base)
    evaluations = 0
    shots_total = 0
    cache: dict[float, tuple[float, float]] = {0.0: (1.0, 0.0)}

    def fid(s: float) -> float:
        nonlocal evaluations, shots_total
        if s not in cache:
            evaluations += 1
            r = clifford_figures(sched, base.scaled(s), rel_se=rel_se, max_shots=max_shots, seed=seed)
            shots_total += r["clifford_shots"]
            cache[s] = (r["clifford_state_fidelity"], r["clifford_state_fidelity_se"] or 0.0)
        return cache[s][0]

    e2 = base.two_qubit_error
    worst = max([e2] + [dict(items).get("two_qubit_error", e2) for _p, items in base.edge_overrides])
    result = {"fidelity_target": fidelity_target, "threshold_two_qubit_error": None,
              "threshold_noise_scale": None, "upper_noise_scale": None, "fidelity_at_threshold": None,
              "evaluations": 0, "saturated": False, "threshold_two_qubit_error_se": None,
              "threshold_bracket_two_qubit_error": None, "fidelity_at_threshold_se": None,
              "threshold_shots": 0, "threshold_method": "clifford", "threshold_label": CLIFFORD_LABEL,
              "requirement_tolerance": rel_tol}
    if worst <= 0:
        return result
    s_max = 0.75 / worst
    lo, hi = bisect_noise_scale(fid, fidelity_target, s_max, rel_tol=rel_tol, max_evaluations=max_evaluations,
                                evaluations=lambda: evaluations)
    if hi is None:
        result.update(threshold_two_qubit_error=e2 * lo, threshold_noise_scale=lo,
                      fidelity_at_threshold=fid(lo), fidelity_at_threshold_se=cache[lo][1],
                      evaluations=evaluations, saturated=True, threshold_shots=shots_total,
                      threshold_bracket_two_qubit_error=[e2 * lo, None])
        return result
    se = None
    if lo > 0:
        a, b = 0.9 * lo, min(1.1 * lo, s_max)
        slope = (fid(a) - fid(b)) / (b - a)
        if slope > 0:
            se = e2 * (fidelity_target * rel_se) / slope
    result.update(threshold_two_qubit_error=e2 * lo, threshold_noise_scale=lo, upper_noise_scale=hi,
                  fidelity_at_threshold=fid(lo), fidelity_at_threshold_se=cache[lo][1],
                  evaluations=evaluations, threshold_two_qubit_error_se=se,
                  threshold_bracket_two_qubit_error=[e2 * lo, e2 * hi], threshold_shots=shots_total)
    return result
