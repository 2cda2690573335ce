"""Shared fixtures: the example models and small helpers."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from qiskit.quantum_info import Statevector

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"
EXAMPLE_FILES = sorted(p for p in EXAMPLES.iterdir() if p.suffix in (".json", ".uai"))


@pytest.fixture(params=[p.name for p in EXAMPLE_FILES])
def example_path(request) -> Path:
    return EXAMPLES / request.param


def logical_distribution(ansatz) -> np.ndarray:
    """Ideal output distribution of the logical circuit (little-endian over variables)."""
    return Statevector(ansatz.circuit(measure=False)).probabilities()


def compiled_distribution(compiled) -> np.ndarray:
    """Ideal output distribution of a compiled circuit over the model's variables.

    Bit i of the result is the physical qubit measured into clbit i.
    """
    qc = compiled.circuit.remove_final_measurements(inplace=False)
    return Statevector(qc).probabilities(qargs=list(compiled.final_layout))
