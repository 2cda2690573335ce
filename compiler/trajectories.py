"""Quantum trajectories: the noise study past the density matrix, with standard errors.

Monte Carlo wave function method (Dalibard, Castin & Molmer, PRL 68, 580 (1992)): each
*trajectory* is one run of the noisy circuit in which every noise channel picks one of its
Kraus branches at random (qiskit-aer does this per shot); the mean of |psi_k><psi_k| over
trajectories is an unbiased estimate of the density matrix. The noise is exactly the density
matrix path's (``toposcout.compiler.noise.build_noise_model`` + ``noisy_circuit``), readout error
is applied exactly to the estimated distributions (as in ``toposcout.compiler.metrics``).

* ``statevector`` (up to :data:`STATEVECTOR_MAX_QUBITS` active qubits): every trajectory's
  state is saved (``save_statevector(pershot=True)``, 16 * 2**n bytes each, so shots run in
  batches sized to the memory budget).
* ``matrix_product_state`` beyond: every trajectory's MPS is saved
  (``save_matrix_product_state(pershot=True)``) and its overlap with the ideal MPS contracted;
  the bond-dimension cap and truncation threshold used, and the largest bond reached, go in
  the row. The MPS state fidelity is that of the whole active register (variables and SWAP
  ancillas): equal to the variables' fidelity without ancillas, a lower bound with them
  (``state_fidelity_scope`` says which).

Estimators (N trajectories, see README "Simulation methods"):

* ``state_fidelity`` = mean_k Tr(sigma rho_k) with sigma the ideal state of the variables and
  rho_k the k-th trajectory's; equals mean_k |<psi|psi_k>|^2 for a pure ideal state; unbiased,
  ``state_fidelity_se`` = sample standard deviation / sqrt(N).
* the noisy distribution q (and each clique marginal) is the mean of the trajectories'
  distributions: unbiased. Figures that are non-linear in q (Hellinger fidelity, TVD, KL,
  MMD, clique Hellinger fidelities) are plug-in estimates and biased, by O(1/N): Hellinger
  fidelity low (sqrt is concave), TVD, KL and MMD high (convex). Their standard error and bias
  are jackknife estimates over :data:`GROUPS` groups of trajectories (``<figure>_se``,
  ``<figure>_bias``; the figure itself is not corrected).
* figures over the whole distribution need 2**k numbers per group: computed for k up to
  :data:`DISTRIBUTION_MAX_VARIABLES` variables, None beyond (the clique marginals remain).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any, Callable, Sequence

import numpy as np
from qiskit_aer import AerSimulator

from toposcout.compiler.errors import CapacityError, ToposcoutError
from toposcout.compiler.options import LIMITS
from toposcout.compiler.metrics import (
    apply_readout,
    clique_figures,
    clique_indices,
    hellinger_fidelity,
    kl_divergence,
    log10,
    marginal,
    mmd,
    total_variation_distance,
)
from toposcout.compiler.noise import NoiseSwitches, Scheduled, build_noise_model, noisy_circuit, readout_matrices
from toposcout.compiler.profiles import DeviceProfile
from toposcout.compiler.simulate import _run, reduce_statevector, simulate_ideal

__all__ = [
    "STATEVECTOR_MAX_QUBITS",
    "DISTRIBUTION_MAX_VARIABLES",
    "DISTRIBUTION_TRAJECTORIES",
    "distribution_cap",
    "GROUPS",
    "DEFAULT_PRECISION",
    "MAX_TRAJECTORIES",
    "MPS_MAX_BOND",
    "MPS_TRUNCATION",
    "trajectory_method_for",
    "statevector_batch_bytes",
    "mps_overlap",
    "jackknife",
    "TrajectoryRun",
    "run_trajectories",
    "trajectory_figures",
]

#: largest active register simulated as a statevector (16 * 2**26 bytes = 1 GiB per state).
STATEVECTOR_MAX_QUBITS = 26
#: whole-distribution figures (Hellinger, TVD, KL, MMD) up to this many variables.
DISTRIBUTION_MAX_VARIABLES = 20
#: with the matrix-product-state method, the variables' full distribution (2^k probabilities
#: per trajectory, far more than the trajectory itself costs: 0.76 s against 0.004 s for a
#: 20-variable chain) is saved for the first this many trajectories only, once k is above
#: DISTRIBUTION_CAP_FROM_VARIABLES; the state fidelity and the clique marginals use them all.
DISTRIBUTION_TRAJECTORIES = 128
DISTRIBUTION_CAP_FROM_VARIABLES = 12
#: jackknife groups of trajectories.
GROUPS = 20
#: default stopping rule: standard error of the state fidelity below this.
DEFAULT_PRECISION = 0.01
#: hard cap on trajectories of one run.
MAX_TRAJECTORIES = int(LIMITS["trajectories"].high)  # the one table of limits
#: matrix-product-state bond-dimension cap and singular-value truncation threshold.
MPS_MAX_BOND = 256
MPS_TRUNCATION = 1e-10
#: fewest trajectories before a precision stop is trusted (the SE itself is an estimate).
MIN_TRAJECTORIES = 32


def trajectory_method_for(n_active: int) -> str:
    """``statevector`` up to :data:`STATEVECTOR_MAX_QUBITS` active qubits, else ``matrix_product_state``."""
    return "statevector" if n_active <= STATEVECTOR_MAX_QUBITS else "matrix_product_state"


def statevector_batch_bytes(n: int, shots: int) -> int:
    """Memory of one statevector batch: the running state plus every saved state."""
    return 16 * 2**n * (shots + 2)


def mps_overlap(a, b) -> complex:
    """<a|b> of two qiskit-aer MPS in Vidal form (``(gammas, lambdas)``, ``gammas[i] =
    (G0, G1)`` for qubit i = 0, 1, ...; ``lambdas[i]`` between qubits i and i+1)."""
    ga, la = a
    gb, lb = b
    env = np.ones((1, 1), dtype=complex)
    n = len(ga)
    for i in range(n):
        new = 0
        for s in (0, 1):
            x = np.asarray(ga[i][s], dtype=complex)
            y = np.asarray(gb[i][s], dtype=complex)
            if i < n - 1:
                x = x * np.asarray(la[i])[None, :]
                y = y * np.asarray(lb[i])[None, :]
            new = new + x.conj().T @ env @ y
        env = new
    return complex(env[0, 0])


def jackknife(sums: np.ndarray, counts: np.ndarray, f: Callable[[np.ndarray], float]) -> tuple[float, float, float]:
    """``(f(mean), se, bias)``: delete-one-group jackknife of a function of a mean.

    ``sums[g]`` is the sum of group g's samples (any trailing shape), ``counts[g]`` its size.
    se = sqrt((G-1)/G * sum_g (f_-g - mean f_-g)^2), bias = (G-1) (mean f_-g - f(mean))
    (Efron & Tibshirani, An Introduction to the Bootstrap, 1993, chapter 11)."""
    keep = counts > 0
    sums, counts = sums[keep], counts[keep]
    total, n = sums.sum(axis=0), counts.sum()
    full = f(total / n)
    g = len(counts)
    if g < 2:
        return full, math.nan, math.nan
    loo = np.array([f((total - sums[i]) / (n - counts[i])) for i in range(g)])
    mean = float(np.mean(loo))
    se = math.sqrt((g - 1) / g * float(np.sum((loo - mean) ** 2)))
    return full, se, (g - 1) * (mean - full)


@dataclass
class TrajectoryRun:
    """What the trajectories gave, before readout: per-trajectory fidelities, group sums of the
    variables' distribution (None past DISTRIBUTION_MAX_VARIABLES) and of each clique marginal."""

    method: str
    fidelities: list[float]
    dist_sums: np.ndarray | None
    clique_sums: list[np.ndarray]
    counts: np.ndarray
    seconds: float
    stop: str
    scope: str
    bond_reached: int | None = None
    #: group sizes behind ``dist_sums`` when fewer trajectories saved the full distribution
    #: (None: the same as ``counts``)
    dist_counts: np.ndarray | None = None

    @property
    def distribution_counts(self) -> np.ndarray:
        return self.counts if self.dist_counts is None else self.dist_counts

    @property
    def n(self) -> int:
        return len(self.fidelities)

    def fidelity(self) -> tuple[float, float]:
        f = np.asarray(self.fidelities)
        se = float(np.std(f, ddof=1) / math.sqrt(len(f))) if len(f) > 1 else math.nan
        return float(np.mean(f)), se


def _ideal_mps(sched: Scheduled, threads: int, max_bond: int = MPS_MAX_BOND):
    circ = sched.circuit.copy()
    circ.save_matrix_product_state(label="m")
    sim = AerSimulator(method="matrix_product_state", max_parallel_threads=threads,
                       matrix_product_state_max_bond_dimension=max_bond,
                       matrix_product_state_truncation_threshold=MPS_TRUNCATION)
    return _run(sim, circ).data(0)["m"]


def _ideal_probabilities(sched: Scheduled, cliques: Sequence[Sequence[int]], k: int, threads: int):
    """Ideal distribution (k <= DISTRIBUTION_MAX_VARIABLES, else None) and clique marginals with MPS."""
    circ = sched.circuit.copy()
    if k <= DISTRIBUTION_MAX_VARIABLES:
        circ.save_probabilities(qubits=list(sched.measured), label="p")
    for i, c in enumerate(cliques):
        circ.save_probabilities(qubits=[sched.measured[v] for v in c], label=f"c{i}")
    sim = AerSimulator(method="matrix_product_state", max_parallel_threads=threads,
                       matrix_product_state_max_bond_dimension=MPS_MAX_BOND,
                       matrix_product_state_truncation_threshold=MPS_TRUNCATION)
    d = _run(sim, circ).data(0)
    p = np.asarray(d["p"]) if "p" in d else None
    return p, [np.asarray(d[f"c{i}"]) for i in range(len(cliques))]


def _run_shots(sim: AerSimulator, circ, shots: int, seed: int):
    try:
        result = sim.run(circ, shots=shots, seed_simulator=seed).result()
    except Exception as exc:  # Aer raises AerError for unknown instructions
        raise ToposcoutError(f"trajectory simulation failed: {exc}", field="circuit") from exc
    if not result.success:
        status = f"{result.status}; " + "; ".join(str(getattr(r, "status", "")) for r in result.results or [])
        if "memory" in status.lower():
            raise CapacityError(f"trajectory simulation refused by the simulator: {status}",
                                field="memory_budget_bytes")
        raise ToposcoutError(f"trajectory simulation failed: {status}", field="circuit")
    return result


def distribution_cap(k: int, parts: int = 1) -> int | None:
    """Trajectories (of one of ``parts`` parts of a row) that save the full distribution of ``k``
    variables with matrix product states: all (None) up to
    :data:`DISTRIBUTION_CAP_FROM_VARIABLES`, else :data:`DISTRIBUTION_TRAJECTORIES` shared out."""
    if k <= DISTRIBUTION_CAP_FROM_VARIABLES:
        return None
    return int(math.ceil(DISTRIBUTION_TRAJECTORIES / parts))


def run_trajectories(sched: Scheduled, profile: DeviceProfile, cliques: Sequence[Sequence[int]],
                     switches: NoiseSwitches = NoiseSwitches(), *, ideal_amplitudes: np.ndarray | None = None,
                     ideal_mps=None, n_trajectories: int | None = None, precision: float | None = None,
                     max_trajectories: int = MAX_TRAJECTORIES, time_budget_seconds: float | None = None,
                     memory_budget_bytes: int = 4 * 2**30, seed: int = 0, max_parallel_threads: int = 0,
                     method: str | None = None, max_bond: int = MPS_MAX_BOND,
                     seed_offset: int = 0, distribution_trajectories: int | None = None) -> TrajectoryRun:
    """Run trajectories in batches until ``n_trajectories`` are done, or (without it) until
    the state fidelity's standard error is below ``precision`` (default
    :data:`DEFAULT_PRECISION`), at most ``max_trajectories``, stopping early when
    ``time_budget_seconds`` would be exceeded by the next batch. ``cliques``: variable indices
    of each clique. The statevector path needs ``ideal_amplitudes``
    (``IdealState.amplitudes``), the MPS path ``ideal_mps`` (computed when None).
    ``max_bond``: the MPS bond-dimension cap (a low cap makes a cheap cost pilot).
    ``seed_offset``: trajectory k of this run takes the seed of trajectory ``seed_offset + k``
    of the unsplit run, so parts of one row given offsets ``p * cap`` (cap: each part's
    ``max_trajectories``) take consecutive, non-overlapping seed ranges.
    ``distribution_trajectories``: with MPS, how many trajectories save the variables' full
    distribution (default: :func:`distribution_cap`)."""
    n, k = sched.num_qubits, len(sched.measured)
    method = method or trajectory_method_for(n)
    if n_trajectories is None and precision is None:
        precision = DEFAULT_PRECISION
    target = n_trajectories if n_trajectories is not None else max_trajectories
    circ = noisy_circuit(sched, profile, switches)
    nm = build_noise_model(sched, profile, switches)
    with_dist = k <= DISTRIBUTION_MAX_VARIABLES
    clique_q = [[sched.measured[v] for v in c] for c in cliques]
    plain = None  # the MPS circuit without the full-distribution save (after the cap)
    if method == "statevector":
        if ideal_amplitudes is None:
            raise ToposcoutError("statevector trajectories need the ideal amplitudes", field=None)
        m = np.asarray(ideal_amplitudes)
        cols = [b for b in range(m.shape[1]) if np.linalg.norm(m[:, b]) > 1e-12]
        m_nz = m[:, cols]
        per_shot = statevector_batch_bytes(n, 1) - statevector_batch_bytes(n, 0)
        max_batch = max(1, min(64, int(memory_budget_bytes // 2 // per_shot) - 2))
        if statevector_batch_bytes(n, 1) > memory_budget_bytes:
            raise CapacityError(f"statevector trajectories of {n} active qubits need "
                                f"{statevector_batch_bytes(n, 1) / 2**30:.2f} GiB, over the memory budget of "
                                f"{memory_budget_bytes / 2**30:.2f} GiB", field="memory_budget_bytes")
        circ.save_statevector(label="psi", pershot=True)
        sim = AerSimulator(method="statevector", noise_model=nm, max_parallel_threads=max_parallel_threads)
        scope = "variables"
    elif method == "matrix_product_state":
        if ideal_mps is None:
            ideal_mps = _ideal_mps(sched, max_parallel_threads, max_bond)
        max_batch = 32
        circ.save_matrix_product_state(label="m", pershot=True)
        for i, qs in enumerate(clique_q):
            circ.save_probabilities(qubits=qs, label=f"c{i}", pershot=True)
        if with_dist:
            plain = circ.copy()
            circ.save_probabilities(qubits=list(sched.measured), label="p", pershot=True)
            if distribution_trajectories is None:
                distribution_trajectories = distribution_cap(k)
        sim = AerSimulator(method="matrix_product_state", noise_model=nm, max_parallel_threads=max_parallel_threads,
                           matrix_product_state_max_bond_dimension=max_bond,
                           matrix_product_state_truncation_threshold=MPS_TRUNCATION)
        scope = "variables" if n == k else "active register (variables and ancillas: a lower bound)"
    else:
        raise ToposcoutError(f"unknown trajectory method {method!r}", field="method")

    dist_cap = distribution_trajectories if method == "matrix_product_state" and with_dist else None
    if dist_cap is not None and dist_cap < 0:
        raise ToposcoutError(f"distribution_trajectories must be at least 0, got {dist_cap}",
                             field="distribution_trajectories")
    fids: list[float] = []
    dist_sums = np.zeros((GROUPS, 2**k)) if with_dist else None
    dist_counts = np.zeros(GROUPS, dtype=int)
    clique_sums = [np.zeros((GROUPS, 2 ** len(c))) for c in cliques]
    counts = np.zeros(GROUPS, dtype=int)
    bond = 0
    started = time.perf_counter()
    batch, stop = min(8, target), ""
    while True:
        t0 = time.perf_counter()
        saving = with_dist and (dist_cap is None or int(dist_counts.sum()) < dist_cap)
        if saving and dist_cap is not None:
            batch = min(batch, dist_cap - int(dist_counts.sum()))
        run_circ = plain if (plain is not None and not saving) else circ
        # Aer seeds shot j of a run with seed_simulator + j: consecutive batches take
        # consecutive seed ranges so no trajectory repeats another
        data = _run_shots(sim, run_circ, batch, (seed * 1_000_003 + seed_offset + len(fids)) % 2**31).data(0)
        for j in range(batch):
            g = len(fids) % GROUPS
            if method == "statevector":
                phi = reduce_statevector(np.asarray(data["psi"][j]), sched.measured, n)
                fids.append(float(np.sum(np.abs(m_nz.conj().T @ phi) ** 2)))
                pk = np.sum(np.abs(phi) ** 2, axis=1)
                if with_dist:
                    dist_sums[g] += pk
                    dist_counts[g] += 1
                for i, c in enumerate(cliques):
                    clique_sums[i][g] += marginal(pk, c)
            else:
                mps = data["m"][j]
                bond = max(bond, max((len(x) for x in mps[1]), default=1))
                fids.append(abs(mps_overlap(ideal_mps, mps)) ** 2)
                if saving:
                    dist_sums[g] += np.asarray(data["p"][j])
                    dist_counts[g] += 1
                for i in range(len(cliques)):
                    clique_sums[i][g] += np.asarray(data[f"c{i}"][j])
            counts[g] += 1
        batch_seconds = time.perf_counter() - t0
        done = len(fids)
        if n_trajectories is not None and done >= n_trajectories:
            stop = f"{done} trajectories requested"
            break
        if precision is not None and done >= MIN_TRAJECTORIES:
            f = np.asarray(fids)
            se = float(np.std(f, ddof=1) / math.sqrt(done))
            if se < precision:
                stop = f"state-fidelity standard error {se:.3g} < {precision:g}"
                break
        if done >= target:
            stop = f"at the cap of {target} trajectories"
            break
        per = batch_seconds / batch
        batch = int(min(max_batch, target - done, max(1, 2 * batch)))
        if precision is not None and done >= MIN_TRAJECTORIES:
            # trajectories the current variance says are still needed
            var = float(np.var(fids, ddof=1))
            need = int(math.ceil(var / precision**2)) - done
            batch = int(max(1, min(batch, max(need, 1))))
        if time_budget_seconds is not None:
            left = time_budget_seconds - (time.perf_counter() - started)
            if per * batch > left:
                batch = int(left // per) if per > 0 else batch
                if batch < 1:
                    stop = f"time budget of {time_budget_seconds:g} s reached after {done} trajectories"
                    break
    return TrajectoryRun(method=method, fidelities=fids, dist_sums=dist_sums, clique_sums=clique_sums,
                         counts=counts, seconds=time.perf_counter() - started, stop=stop, scope=scope,
                         bond_reached=bond if method == "matrix_product_state" else None,
                         dist_counts=None if (dist_counts == counts).all() else dist_counts)


def _finite(x: float) -> float | None:
    return float(x) if x is not None and math.isfinite(x) else None


def trajectory_figures(sched: Scheduled, profile: DeviceProfile, model, run: TrajectoryRun, *,
                       p_ideal: np.ndarray | None, p_cliques: Sequence[np.ndarray],
                       switches: NoiseSwitches = NoiseSwitches()) -> dict[str, Any]:
    """Row fields of one :class:`TrajectoryRun` (readout applied with ``switches``)."""
    mats = readout_matrices(sched, profile, switches)
    f, f_se = run.fidelity()
    out: dict[str, Any] = {
        "state_fidelity": min(max(f, 0.0), 1.0), "state_fidelity_se": _finite(f_se),
        "log10_state_fidelity": log10(f), "state_fidelity_scope": run.scope,
        "trajectories": run.n, "trajectory_method": run.method, "trajectory_seconds": round(run.seconds, 3),
        "trajectories_stop": run.stop,
        "distribution_trajectories": (int(run.distribution_counts.sum()) if run.dist_sums is not None and
                                      p_ideal is not None else None),
    }
    if run.method == "matrix_product_state":
        out.update(mps_max_bond_dimension=MPS_MAX_BOND, mps_truncation_threshold=MPS_TRUNCATION,
                   mps_bond_dimension_reached=run.bond_reached,
                   mps_truncated=bool(run.bond_reached is not None and run.bond_reached >= MPS_MAX_BOND))
    figs = {"hellinger_fidelity": hellinger_fidelity, "tvd": total_variation_distance,
            "kl_ideal_noisy": kl_divergence, "mmd": mmd}
    if run.dist_sums is not None and p_ideal is not None and run.distribution_counts.sum() > 1:
        for name, fn in figs.items():
            val, se, bias = jackknife(run.dist_sums, run.distribution_counts,
                                      lambda q, fn=fn: fn(p_ideal, apply_readout(q / q.sum(), mats)))
            out[name], out[f"{name}_se"], out[f"{name}_bias"] = _finite(val), _finite(se), _finite(bias)
    else:
        for name in figs:
            out[name] = out[f"{name}_se"] = out[f"{name}_bias"] = None
    fs, ses = [], []
    for c, sums, pc in zip(clique_indices(model), run.clique_sums, p_cliques):
        sub = [mats[v] for v in c]
        val, se, _bias = jackknife(sums, run.counts, lambda q: hellinger_fidelity(pc, apply_readout(q / q.sum(), sub)))
        fs.append(val)
        ses.append(se if math.isfinite(se) else 0.0)
    out.update(clique_figures(model, fs, ses))
    return out
