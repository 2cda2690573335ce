"""How many worker processes, and how many simulator threads each, so that they share the cores.

Light on purpose (no simulator import): a fresh worker process calls :func:`limit_threads`
before anything loads the simulator.
"""

from __future__ import annotations

import os

__all__ = ["default_workers", "threads_per_worker", "limit_threads"]


def default_workers() -> int:
    """Worker processes used by default: the cores of this machine, at most 2."""
    return max(1, min(2, os.cpu_count() or 1))


def threads_per_worker(workers: int) -> int:
    """Simulator threads for each of ``workers`` processes so that they share the cores
    instead of oversubscribing them (each would otherwise take every core)."""
    return max(1, (os.cpu_count() or 1) // max(1, workers))


def limit_threads(threads: int) -> None:
    """Cap the OpenMP/BLAS threads of this (fresh worker) process; call it before the
    simulator is imported."""
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[var] = str(threads)
