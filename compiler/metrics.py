"""What survives of the model's distribution: fidelities, distances, ESP and an error budget.

Definitions (``p`` = ideal distribution over the model's variables, ``q`` = noisy one, both
little-endian over ``model.variables``; ancilla/SWAP qubits are traced out):

* ``state_fidelity`` = <psi|rho|psi> of the variables' pre-measurement state (``psi`` from a
  statevector run of the same compiled circuit, ``rho`` from the density-matrix run).
* the *measured* noisy distribution ``q`` is diag(rho) passed through each variable's
  readout confusion matrix (exact, no shot noise).
* ``hellinger_fidelity`` = (sum_x sqrt(p_x q_x))**2 (the convention of
  ``qiskit.quantum_info.hellinger_fidelity``); ``tvd`` = 1/2 sum |p - q|;
  ``kl_ideal_noisy`` = KL(p || q) in nats; ``mmd`` = sqrt((p-q)^T K (p-q)) with K the mean of
  three Gaussian kernels exp(-|x-y|^2 / (2 sigma^2)) of the bit vectors, sigma = 0.5, 1, 2
  (for bit vectors |x-y|^2 is the Hamming distance h, so K = mean exp(-h / (2 sigma^2)), a
  positive-definite kernel; a mixture over several bandwidths is common practice).
* ``esp`` (estimated success probability) = product over every operation of (1 - error):
  gates (profile average infidelity), idle windows (average infidelity of their relaxation)
  and readout ((p(1|0) + p(0|1)) / 2 per variable); see ``toposcout.compiler.noise.operation_errors``.
* error budget: ``budget_<source>`` = Hellinger fidelity with that source switched off minus
  the Hellinger fidelity with all sources on (re-simulated for two_qubit, one_qubit, idle;
  readout needs no new simulation). The Hellinger fidelity of the *measured* distribution is
  used because readout error cannot change the state fidelity. The four budgets need not add
  up to 1 - hellinger_fidelity (sources interact). ``budget_state_<source>`` is the same
  for the state fidelity (two_qubit, one_qubit, idle).
* clique marginals: for each clique of the model, the Hellinger fidelity between the ideal
  and the measured noisy marginal distribution on the clique's variables
  (``clique_hellinger``: one ``{"clique": [names], "fidelity": F}`` per clique;
  ``clique_hellinger_mean`` / ``_min`` / ``_worst`` (names joined by ","). They stay
  informative when the global fidelity of a large model is ~0.
* ``log10_state_fidelity`` = log10 of the state fidelity (None when it is 0).
"""

from __future__ import annotations

import math
import time
from typing import Any, Sequence

import numpy as np

from toposcout.compiler.options import DEFAULT_REQUIREMENT_TOLERANCE
from toposcout.compiler.errors import ToposcoutError
from toposcout.compiler.model import target_distribution
from toposcout.compiler.noise import SOURCES, NoiseSwitches, Scheduled, operation_errors, readout_matrices, schedule
from toposcout.compiler.profiles import DeviceProfile
from toposcout.compiler.simulate import (
    IdealState,
    check_memory,
    default_memory_budget_bytes,
    simulate_ideal,
    simulate_noisy,
)

__all__ = [
    "bisect_noise_scale",
    "MMD_BANDWIDTHS",
    "probabilities_from_rho",
    "apply_readout",
    "hellinger_fidelity",
    "total_variation_distance",
    "kl_divergence",
    "mmd",
    "esp",
    "noise_figures",
    "threshold_two_qubit_error",
    "FIGURE_KEYS",
    "marginal",
    "clique_indices",
    "clique_figures",
    "log10",
]

MMD_BANDWIDTHS = (0.5, 1.0, 2.0)

#: keys of :func:`noise_figures` (all present; values None where undefined).
FIGURE_KEYS = (
    "profile", "noise_scale", "simulated_qubits", "duration_us", "memory_estimate_bytes",
    "state_fidelity", "hellinger_fidelity", "tvd", "kl_ideal_noisy", "mmd",
    "esp", "esp_two_qubit", "esp_one_qubit", "esp_idle", "esp_readout",
    "budget_two_qubit", "budget_one_qubit", "budget_idle", "budget_readout",
    "budget_state_two_qubit", "budget_state_one_qubit", "budget_state_idle",
    "kl_target_ideal", "kl_target_noisy", "simulate_seconds",
    "log10_state_fidelity", "clique_hellinger_mean", "clique_hellinger_min", "clique_hellinger_worst",
    "clique_hellinger",
)


# --- distributions ----------------------------------------------------------------------
def _normalise(p: np.ndarray) -> np.ndarray:
    p = np.clip(np.real(np.asarray(p, dtype=complex)), 0.0, None)
    s = p.sum()
    if s <= 0:
        raise ToposcoutError("a distribution with zero total probability", field=None)
    return p / s


def probabilities_from_rho(rho: np.ndarray) -> np.ndarray:
    """diag(rho), clipped at 0 (rounding) and renormalised."""
    return _normalise(np.diagonal(np.asarray(rho)))


def apply_readout(p: np.ndarray, matrices: Sequence[np.ndarray]) -> np.ndarray:
    """Distribution of the read bits: variable i's bit goes through ``matrices[i]``
    (row = prepared, column = read); ``p`` little-endian over the variables."""
    k = len(matrices)
    t = np.asarray(p, dtype=float).reshape([2] * k)  # axis j <-> variable k-1-j
    for i, m in enumerate(matrices):
        ax = k - 1 - i
        t = np.moveaxis(np.tensordot(t, np.asarray(m, dtype=float), axes=([ax], [0])), -1, ax)
    return t.reshape(-1)


def hellinger_fidelity(p: np.ndarray, q: np.ndarray) -> float:
    """(sum sqrt(p q))^2 of two normalised distributions."""
    bc = float(np.sum(np.sqrt(np.clip(p, 0, None) * np.clip(q, 0, None))))
    return min(bc * bc, 1.0)


def total_variation_distance(p: np.ndarray, q: np.ndarray) -> float:
    return 0.5 * float(np.sum(np.abs(np.asarray(p) - np.asarray(q))))


def kl_divergence(p: np.ndarray, q: np.ndarray) -> float:
    """KL(p || q) in nats; ``inf`` when q = 0 somewhere p > 0."""
    p = np.asarray(p, dtype=float)
    q = np.asarray(q, dtype=float)
    mask = p > 0
    if np.any(q[mask] <= 0):
        return math.inf
    return float(np.sum(p[mask] * np.log(p[mask] / q[mask])))


def _fwht(v: np.ndarray) -> np.ndarray:
    """Unnormalised Walsh-Hadamard transform of a length-2**k vector."""
    k = int(round(math.log2(v.size)))
    t = np.array(v, dtype=float).reshape([2] * k)
    for ax in range(k):
        a = np.take(t, 0, axis=ax)
        b = np.take(t, 1, axis=ax)
        t = np.stack([a + b, a - b], axis=ax)
    return t.reshape(-1)


def hamming_kernel_by_weight(k: int, bandwidths: Sequence[float] = MMD_BANDWIDTHS) -> np.ndarray:
    """g[h] = mean_sigma exp(-h / (2 sigma^2)) for Hamming distances h = 0..k (the Gaussian
    kernel of the bit vectors: their squared Euclidean distance is h)."""
    h = np.arange(k + 1, dtype=float)
    return np.mean([np.exp(-h / (2.0 * s * s)) for s in bandwidths], axis=0)


def mmd(p: np.ndarray, q: np.ndarray, bandwidths: Sequence[float] = MMD_BANDWIDTHS) -> float:
    """Maximum mean discrepancy of two distributions over k-bit strings with the Hamming
    Gaussian-mixture kernel. K[x, y] depends on x XOR y only, so (p-q)^T K (p-q) is computed
    with Walsh-Hadamard transforms in O(k 2^k) instead of forming the 4^k kernel matrix."""
    d = np.asarray(p, dtype=float) - np.asarray(q, dtype=float)
    k = int(round(math.log2(d.size)))
    weights = np.array([bin(x).count("1") for x in range(d.size)]) if k <= 16 else \
        np.unpackbits(np.arange(d.size, dtype=np.uint32).view(np.uint8)).reshape(-1, 32).sum(axis=1)
    g = hamming_kernel_by_weight(k, bandwidths)[weights]
    val = float(np.sum(_fwht(g) * _fwht(d) ** 2) / d.size)
    return math.sqrt(max(val, 0.0))


def marginal(p: np.ndarray, variables: Sequence[int]) -> np.ndarray:
    """The marginal of ``p`` (little-endian over k variables) on ``variables``, little-endian
    over them in the order given (``variables[0]`` is the least significant bit).

    >>> marginal(np.array([0.1, 0.2, 0.3, 0.4]), [1]).round(3).tolist()   # P(v1=0), P(v1=1)
    [0.3, 0.7]
    """
    p = np.asarray(p, dtype=float)
    k = int(round(math.log2(p.shape[-1])))
    lead = p.shape[:-1]
    t = p.reshape(lead + (2,) * k)  # axis len(lead)+j <-> variable k-1-j
    off = len(lead)
    keep = [off + k - 1 - v for v in reversed(list(variables))]
    drop = tuple(a for a in range(off, off + k) if a not in keep)
    s = t.sum(axis=drop) if drop else t
    # s keeps the kept axes in increasing axis order; put them in the order of ``keep``
    order = sorted(keep)
    s = np.moveaxis(s, [off + order.index(a) for a in keep], list(range(off, off + len(keep))))
    return s.reshape(lead + (2 ** len(keep),))


def clique_indices(model) -> list[tuple[int, ...]]:
    """Each clique of the model as variable indices (the model's clique order)."""
    pos = {v: i for i, v in enumerate(model.variables)}
    return [tuple(pos[v] for v in c) for c in model.cliques]


def clique_figures(model, fidelities: Sequence[float], ses: Sequence[float] | None = None) -> dict[str, Any]:
    """Row fields of the per-clique Hellinger fidelities (in the model's clique order)."""
    fs = [float(f) for f in fidelities]
    items = []
    for i, (c, f) in enumerate(zip(model.cliques, fs)):
        item: dict[str, Any] = {"clique": list(c), "fidelity": f}
        if ses is not None:
            item["se"] = float(ses[i])
        items.append(item)
    if not fs:
        return {"clique_hellinger_mean": None, "clique_hellinger_min": None, "clique_hellinger_worst": None,
                "clique_hellinger": []}
    worst = int(np.argmin(fs))
    out = {"clique_hellinger_mean": float(np.mean(fs)), "clique_hellinger_min": fs[worst],
           "clique_hellinger_worst": ",".join(model.cliques[worst]), "clique_hellinger": items}
    if ses is not None:
        out["clique_hellinger_mean_se"] = float(math.sqrt(sum(x * x for x in ses)) / len(ses))
        out["clique_hellinger_min_se"] = float(ses[worst])
    return out


def log10(x: float | None) -> float | None:
    """log10 of a fidelity (None when it is None or <= 0)."""
    if x is None or x <= 0:
        return None
    return float(math.log10(x))


def esp(errors: dict[str, list[float]]) -> float:
    """Product of (1 - e) over all listed operation errors."""
    return float(np.prod([1.0 - e for es in errors.values() for e in es]))


# --- one row --------------------------------------------------------------------------
def _finite(x: float | None) -> float | None:
    if x is None or not math.isfinite(x):
        return None
    return float(x)


def _evaluate(sched: Scheduled, profile: DeviceProfile, ideal: IdealState, switches: NoiseSwitches,
              budget: int, threads: int):
    st = simulate_noisy(sched, profile, switches, memory_budget_bytes=budget, max_parallel_threads=threads)
    f_state = ideal.fidelity_with(st.rho)
    q_state = probabilities_from_rho(st.rho)
    q_read = apply_readout(q_state, readout_matrices(sched, profile, switches))
    return st, min(max(f_state, 0.0), 1.0), q_state, q_read


def noise_figures(compiled, ansatz, profile: DeviceProfile, *, memory_budget_bytes: int | None = None,
                  error_budget: bool = True, max_parallel_threads: int = 0) -> dict[str, Any]:
    """The noise study of one compiled circuit on one device profile: a flat JSON-able dict
    with the keys :data:`FIGURE_KEYS` (see the module docstring for definitions).

    Raises CapacityError before any simulation when the active qubits need more memory than
    ``memory_budget_bytes`` (default: a fraction of this machine's RAM)."""
    budget = default_memory_budget_bytes() if memory_budget_bytes is None else int(memory_budget_bytes)
    n_active = len(compiled.active_qubits())
    est = check_memory(n_active, budget, saved_qubits=len(compiled.final_layout))
    t0 = time.perf_counter()
    sched = schedule(compiled, profile)
    ideal = simulate_ideal(sched, max_parallel_threads=max_parallel_threads)
    p = _normalise(ideal.probabilities)
    on = NoiseSwitches()
    st, f_state, _q_state, q = _evaluate(sched, profile, ideal, on, budget, max_parallel_threads)
    h_all = hellinger_fidelity(p, q)
    errs = operation_errors(sched, profile)
    out: dict[str, Any] = {
        "profile": profile.name,
        "noise_scale": profile.noise_scale,
        "simulated_qubits": st.num_qubits,
        "duration_us": sched.duration_us,
        "memory_estimate_bytes": est,
        "state_fidelity": f_state,
        "hellinger_fidelity": h_all,
        "tvd": total_variation_distance(p, q),
        "kl_ideal_noisy": _finite(kl_divergence(p, q)),
        "mmd": mmd(p, q),
        "esp": esp(errs),
        **{f"esp_{s}": esp({s: errs[s]}) for s in SOURCES},
    }
    for s in SOURCES:
        out[f"budget_{s}"] = None
    for s in SOURCES[:3]:
        out[f"budget_state_{s}"] = None
    if error_budget:
        for s in SOURCES[:3]:
            if not errs[s] or profile.noise_scale == 0:
                out[f"budget_{s}"] = 0.0
                out[f"budget_state_{s}"] = 0.0
                continue
            _st, f_off, _qs, q_off = _evaluate(sched, profile, ideal, on.without(s), budget, max_parallel_threads)
            out[f"budget_{s}"] = hellinger_fidelity(p, q_off) - h_all
            out[f"budget_state_{s}"] = f_off - f_state
        q_no_readout = apply_readout(_q_state, readout_matrices(sched, profile, on.without("readout")))
        out["budget_readout"] = hellinger_fidelity(p, q_no_readout) - h_all
    target = target_distribution(ansatz.model) if getattr(ansatz.model, "factors", ()) else None
    if target is not None and np.asarray(target).size == p.size:
        out["kl_target_ideal"] = _finite(kl_divergence(np.asarray(target), p))
        out["kl_target_noisy"] = _finite(kl_divergence(np.asarray(target), q))
    else:
        out["kl_target_ideal"] = None
        out["kl_target_noisy"] = None
    cliques = clique_indices(ansatz.model)
    out.update(clique_figures(ansatz.model, [hellinger_fidelity(marginal(p, c), marginal(q, c)) for c in cliques]))
    out["log10_state_fidelity"] = log10(f_state)
    out["simulate_seconds"] = time.perf_counter() - t0
    return {k: out[k] for k in FIGURE_KEYS}


def bisect_noise_scale(fid, fidelity_target: float, s_max: float, *, rel_tol: float, max_evaluations: int,
                       evaluations) -> tuple[float, float | None]:
    """The requirement's search on the noise scale s: ``(lo, hi)`` with ``fid(lo) >= target >
    fid(hi)`` and ``(hi - lo) / hi <= rel_tol`` (or ``evaluations()`` reached ``max_evaluations``);
    ``hi`` is None when even ``s_max`` (the largest physical scale) keeps the target. The upper
    end grows by 4x from 1 until it misses the target, then the bracket is halved (bisection:
    the fidelity falls monotonically with the noise scale, common practice)."""
    lo, hi = 0.0, min(1.0, s_max)
    while fid(hi) >= fidelity_target:
        if hi >= s_max:
            return hi, None
        lo, hi = hi, min(hi * 4.0, s_max)
    while hi - lo > rel_tol * hi and evaluations() < max_evaluations:
        mid = 0.5 * (lo + hi)
        if fid(mid) >= fidelity_target:
            lo = mid
        else:
            hi = mid
    return lo, hi


def threshold_two_qubit_error(compiled, ansatz, profile: DeviceProfile, *, fidelity_target: float = 0.5,
                              rel_tol: float = DEFAULT_REQUIREMENT_TOLERANCE, max_evaluations: int = 40,
                              memory_budget_bytes: int | None = None, max_parallel_threads: int = 0) -> dict[str, Any]:
    """The largest two-qubit error rate at which the state fidelity still reaches
    ``fidelity_target``, by bisection on the noise scale (every error rate of the profile is
    scaled together, as with ``noise_scale``; the profile's own scale is replaced).

    Returns ``threshold_two_qubit_error`` (= profile two-qubit error x threshold scale),
    ``threshold_noise_scale``, ``upper_noise_scale`` (a scale known to miss the target),
    ``fidelity_at_threshold``, ``fidelity_target``, ``evaluations``,
    ``threshold_bracket_two_qubit_error`` ([lower, upper]: the final bracket, the threshold lies
    in it; the requirement is its lower end), ``requirement_tolerance`` (``rel_tol``: the
    bisection stops when (upper - lower) / upper is below it, default 0.1 %)
    and ``saturated`` (True when even the largest physical scale keeps the target: the
    threshold is then a lower bound). Relies on the fidelity decreasing with the scale."""
    if not 0 < fidelity_target < 1:
        raise ToposcoutError(f"fidelity_target must be in (0, 1), got {fidelity_target}", field="fidelity_target")
    budget = default_memory_budget_bytes() if memory_budget_bytes is None else int(memory_budget_bytes)
    check_memory(len(compiled.active_qubits()), budget, saved_qubits=len(compiled.final_layout))
    base = profile.scaled(1.0)
    sched = schedule(compiled, base)
    ideal = simulate_ideal(sched, max_parallel_threads=max_parallel_threads)
    evaluations = 0
    cache: dict[float, float] = {0.0: 1.0}

    def fid(s: float) -> float:
        nonlocal evaluations
        if s not in cache:
            evaluations += 1
            st = simulate_noisy(sched, base.scaled(s), NoiseSwitches(), memory_budget_bytes=budget,
                                max_parallel_threads=max_parallel_threads)
            cache[s] = ideal.fidelity_with(st.rho)
        return cache[s]

    e2 = base.two_qubit_error
    worst = max([e2] + [dict(items).get("two_qubit_error", e2) for _p, items in base.edge_overrides])
    result = {"fidelity_target": fidelity_target, "threshold_two_qubit_error": None,
              "threshold_noise_scale": None, "upper_noise_scale": None, "fidelity_at_threshold": None,
              "evaluations": 0, "saturated": False, "threshold_bracket_two_qubit_error": None,
              "requirement_tolerance": rel_tol}
    if worst <= 0:
        return result
    lo, hi = bisect_noise_scale(fid, fidelity_target, 0.75 / worst, rel_tol=rel_tol,
                                max_evaluations=max_evaluations, evaluations=lambda: evaluations)
    if hi is None:
        result.update(threshold_two_qubit_error=e2 * lo, threshold_noise_scale=lo,
                      fidelity_at_threshold=fid(lo), evaluations=evaluations, saturated=True,
                      threshold_bracket_two_qubit_error=[e2 * lo, None])
        return result
    result.update(threshold_two_qubit_error=e2 * lo, threshold_noise_scale=lo, upper_noise_scale=hi,
                  fidelity_at_threshold=fid(lo), evaluations=evaluations,
                  threshold_bracket_two_qubit_error=[e2 * lo, e2 * hi])
    return result
