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
    from qiskit.converters import circuit_to_dag, dag_to_circuit

    qc = compiled.circuit.remove_final_measurements(inplace=False)
    # Drop the wires no gate touches (a heavy-hex instance has many): they stay |0> and do
    # not change the marginal over the measured qubits.
    dag = circuit_to_dag(qc)
    keep = [qc.find_bit(q).index for q in dag.qubits if q not in set(dag.idle_wires())]
    dag.remove_qubits(*[w for w in dag.idle_wires() if w in dag.qubits])
    small = dag_to_circuit(dag)
    pos = {p: i for i, p in enumerate(keep)}
    return Statevector(small).probabilities(qargs=[pos[p] for p in compiled.final_layout])
