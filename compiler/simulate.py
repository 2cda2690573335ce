"""Density-matrix simulation of the active qubits of a scheduled circuit, and its ideal twin.

* Only the compact circuit of :class:`toposcout.compiler.noise.Scheduled` is simulated (the physical
  qubits the compiled circuit never touches are gone, the noise model is keyed by the
  compact index).
* Noisy: ``AerSimulator(method="density_matrix")`` with the profile's noise model, idle
  relaxation after every delay; the state of the model's variables is saved just before the
  final measurement (``save_density_matrix(qubits=measured)``: variable order, little-endian).
* Ideal: ``AerSimulator(method="statevector")`` of the same compact circuit without noise.
* Memory is estimated before anything runs (:func:`estimate_memory_bytes`) and a run past
  the budget is refused with :class:`toposcout.compiler.errors.CapacityError`. The default budget is a
  fraction of this machine's RAM read with ``os.sysconf`` (:func:`default_memory_budget_bytes`);
  callers pass their own budget to override it. ``result.success`` is always checked.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
from qiskit_aer import AerSimulator

from toposcout.compiler.errors import CapacityError, ToposcoutError
from toposcout.compiler.noise import NoiseSwitches, Scheduled, build_noise_model, noisy_circuit
from toposcout.compiler.profiles import DeviceProfile

__all__ = [
    "MEMORY_FRACTION",
    "BASE_OVERHEAD_BYTES",
    "physical_memory_bytes",
    "default_memory_budget_bytes",
    "estimate_memory_bytes",
    "check_memory",
    "capacity_message",
    "NoisyState",
    "IdealState",
    "simulate_noisy",
    "simulate_ideal",
    "reduce_statevector",
]

#: default share of the machine's RAM one simulation may use.
MEMORY_FRACTION = 0.5
#: fixed overhead of one simulation on top of its arrays (simulator buffers, fused
#: superoperators, the result object): measured order of magnitude on this stack.
BASE_OVERHEAD_BYTES = 64 * 2**20


def physical_memory_bytes() -> int | None:
    """This machine's RAM from ``os.sysconf`` (None where it cannot be read)."""
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return None


def default_memory_budget_bytes(*, ram_bytes: int | None = None, fraction: float = MEMORY_FRACTION) -> int:
    """``fraction`` of ``ram_bytes`` (default: this machine's RAM; 4 GiB if unknown)."""
    ram = ram_bytes if ram_bytes is not None else physical_memory_bytes()
    if ram is None:
        ram = 4 * 2**30
    return int(ram * fraction)


def estimate_memory_bytes(n: int, saved_qubits: int | None = None) -> int:
    """Bytes a density-matrix run of ``n`` qubits may need at its peak: the state (16 * 4**n
    bytes, complex double) plus twice that again for the simulator's working copy when it
    saves a reduced or re-ordered state, the saved state of ``saved_qubits`` qubits (default
    n), the ideal statevector (16 * 2**n) and a fixed overhead.

    Measured peaks (benchmarks/bench_noise.py, ru_maxrss over the process start): 12 qubits
    ~0.9 GiB, 13 qubits ~1.0 GiB (the estimate: 1.06 and 4.06 GiB).

    >>> estimate_memory_bytes(10) // 2**20   # MiB
    128
    """
    k = n if saved_qubits is None else saved_qubits
    return 3 * 16 * 4**n + 16 * 4**k + 16 * 2**n + BASE_OVERHEAD_BYTES


def capacity_message(n: int, estimate: int, budget: int) -> str:
    return (
        f"the noise study needs a density matrix of {n} active qubits: about "
        f"{estimate / 2**30:.2f} GiB (16*4^{n} bytes plus overhead), over the memory budget of "
        f"{budget / 2**30:.2f} GiB"
    )


def check_memory(n: int, memory_budget_bytes: int | None = None, *, saved_qubits: int | None = None) -> int:
    """The estimate for ``n`` qubits; raises CapacityError past the budget (default:
    :func:`default_memory_budget_bytes`)."""
    budget = default_memory_budget_bytes() if memory_budget_bytes is None else int(memory_budget_bytes)
    est = estimate_memory_bytes(n, saved_qubits)
    if est > budget:
        raise CapacityError(capacity_message(n, est, budget), field="memory_budget_bytes")
    return est


def _run(sim: AerSimulator, circuit) -> object:
    try:
        result = sim.run(circuit).result()
    except Exception as exc:  # Aer raises AerError for unknown instructions
        raise ToposcoutError(f"simulation failed: {exc}", field="circuit") from exc
    if not result.success:
        status = str(result.status)
        for r in getattr(result, "results", []) or []:
            status += f"; {getattr(r, 'status', '')}"
        if "memory" in status.lower():
            raise CapacityError(f"simulation refused by the simulator: {status}", field="memory_budget_bytes")
        raise ToposcoutError(f"simulation failed: {status}", field="circuit")
    return result


@dataclass(frozen=True)
class NoisyState:
    """rho: density matrix of the variables (2**k x 2**k, little-endian over variables)."""

    rho: np.ndarray
    seconds: float
    num_qubits: int
    metadata: dict = field(default_factory=dict, compare=False)


@dataclass(frozen=True)
class IdealState:
    """amplitudes: 2**k x 2**a matrix (variables x other active qubits) of the ideal state;
    ``rho = amplitudes @ amplitudes^dagger`` is the ideal state of the variables."""

    amplitudes: np.ndarray
    seconds: float

    @property
    def probabilities(self) -> np.ndarray:
        return np.sum(np.abs(self.amplitudes) ** 2, axis=1)

    def fidelity_with(self, rho: np.ndarray) -> float:
        """Tr(rho_ideal rho); equals <psi|rho|psi> when the ideal state of the variables is
        pure (it is, when the other active qubits end unentangled, e.g. returned to |0>)."""
        m = self.amplitudes
        return float(np.real(np.einsum("ia,ij,ja->", m.conj(), rho, m)))


def reduce_statevector(psi: np.ndarray, measured: Sequence[int], n: int) -> np.ndarray:
    """Reshape an n-qubit little-endian statevector into a (2**k, 2**(n-k)) matrix: rows
    indexed little-endian by the qubits ``measured`` (variable order), columns by the rest."""
    measured = list(measured)
    rest = [q for q in range(n) if q not in measured]
    t = np.asarray(psi).reshape([2] * n)  # axis j <-> qubit n-1-j
    axes = [n - 1 - q for q in reversed(measured)] + [n - 1 - q for q in reversed(rest)]
    return t.transpose(axes).reshape(2 ** len(measured), 2 ** len(rest))


def simulate_noisy(sched: Scheduled, profile: DeviceProfile, switches: NoiseSwitches = NoiseSwitches(), *,
                   memory_budget_bytes: int | None = None, max_parallel_threads: int = 0) -> NoisyState:
    """Density-matrix simulation of the compact circuit with the profile's noise."""
    n = sched.num_qubits
    budget = default_memory_budget_bytes() if memory_budget_bytes is None else int(memory_budget_bytes)
    check_memory(n, budget, saved_qubits=len(sched.measured))
    circ = noisy_circuit(sched, profile, switches)
    circ.save_density_matrix(qubits=list(sched.measured), label="rho")
    sim = AerSimulator(method="density_matrix", noise_model=build_noise_model(sched, profile, switches),
                       max_memory_mb=max(1, budget // 2**20), max_parallel_threads=max_parallel_threads)
    t0 = time.perf_counter()
    result = _run(sim, circ)
    seconds = time.perf_counter() - t0
    rho = np.asarray(result.data(0)["rho"])
    meta = dict(result.results[0].metadata)
    return NoisyState(rho=rho, seconds=seconds, num_qubits=int(meta.get("num_qubits", n)),
                      metadata={k: meta[k] for k in ("num_qubits", "time_taken") if k in meta})


def simulate_ideal(sched: Scheduled, *, max_parallel_threads: int = 0) -> IdealState:
    """Statevector simulation of the same compact circuit, no noise."""
    circ = sched.circuit.copy()
    circ.save_statevector(label="psi")
    sim = AerSimulator(method="statevector", max_parallel_threads=max_parallel_threads)
    t0 = time.perf_counter()
    result = _run(sim, circ)
    seconds = time.perf_counter() - t0
    psi = np.asarray(result.data(0)["psi"])
    return IdealState(amplitudes=reduce_statevector(psi, sched.measured, sched.num_qubits), seconds=seconds)
