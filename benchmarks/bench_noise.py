"""Benchmark of the noise study: density-matrix time and peak memory for 8..13 active qubits,
and toposcout's whole noise row against a hand-written qiskit-aer call on the same circuit.

    .venv/bin/python benchmarks/bench_noise.py            # 8..13 qubits (several minutes)
    .venv/bin/python benchmarks/bench_noise.py 8 9 10     # a subset

Each size runs in a fresh subprocess so that its peak RSS (ru_maxrss) is its own; inside it
the two variants alternate and the fastest of 3 runs is kept (1 run from 12 qubits on). The model
is a chain of overlapping triples on a line connectivity (active qubits = variables), the
superconducting-like profile at scale 1, error budget off (one density-matrix run per row).

* ``toposcout row``: ``toposcout.compiler.metrics.noise_figures`` (schedule, ideal statevector run,
  density-matrix run, all metrics).
* ``hand-written``: what a user would write with qiskit-aer alone for the same compiled
  circuit: a timed Target, ALAP + PadDelay, RelaxationNoisePass on delays, depolarizing +
  thermal-relaxation gate errors and readout errors, ``save_density_matrix`` of the measured
  qubits and one AerSimulator(method="density_matrix") run (no ideal run, no metrics).
"""

from __future__ import annotations

import json
import math
import resource
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))


def build(n: int):
    from toposcout.compiler import build_ansatz, compile_ansatz, get_gate_set, make_connectivity, parse_model

    names = [f"x{i}" for i in range(n)]
    model = parse_model({"name": f"triples{n}", "variables": names,
                         "cliques": [names[i:i + 3] for i in range(n - 2)]})
    ansatz = build_ansatz(model, seed=0)
    compiled = compile_ansatz(ansatz, make_connectivity("line", n), get_gate_set("cx"), strategy="generic", seeds=1)
    return ansatz, compiled


def hand_written(compiled, prof) -> float:
    """Plain qiskit-aer on the full-width compiled circuit; returns wall seconds."""
    import numpy as np
    from qiskit import QuantumCircuit
    from qiskit.circuit import Delay, Parameter
    from qiskit.circuit.library import CXGate, Measure, RZGate, SXGate, XGate
    from qiskit.transpiler import InstructionProperties, PassManager, Target
    from qiskit.transpiler.passes import ALAPScheduleAnalysis, PadDelay
    from qiskit_aer import AerSimulator
    from qiskit_aer.noise import (NoiseModel, ReadoutError, RelaxationNoisePass, depolarizing_error,
                                  thermal_relaxation_error)

    t0 = time.perf_counter()
    n = compiled.circuit.num_qubits
    edges = [(a, b) for a, b in compiled.connectivity.edges] + [(b, a) for a, b in compiled.connectivity.edges]
    tg = Target(num_qubits=n, dt=1e-9)
    tg.add_instruction(RZGate(Parameter("l")), {(q,): InstructionProperties(duration=0.0) for q in range(n)})
    for g in (SXGate(), XGate()):
        tg.add_instruction(g, {(q,): InstructionProperties(duration=prof.one_qubit_ns * 1e-9) for q in range(n)})
    tg.add_instruction(CXGate(), {e: InstructionProperties(duration=prof.two_qubit_ns * 1e-9) for e in edges})
    tg.add_instruction(Measure(), {(q,): InstructionProperties(duration=prof.measure_ns * 1e-9) for q in range(n)})
    tg.add_instruction(Delay(Parameter("t")), {(q,): None for q in range(n)})
    sched = PassManager([ALAPScheduleAnalysis(target=tg), PadDelay(target=tg)]).run(compiled.circuit)
    body = QuantumCircuit(n)
    for ins in sched.data:
        if ins.operation.name != "measure":
            body.append(ins.operation, ins.qubits)
    t1, t2 = prof.t1_us * 1e-6, prof.t2_us * 1e-6
    body = RelaxationNoisePass([t1] * n, [t2] * n, dt=1e-9, op_types=[Delay])(body)
    body.save_density_matrix(qubits=list(compiled.final_layout), label="rho")
    r1 = thermal_relaxation_error(t1, t2, prof.one_qubit_ns * 1e-9)
    r2 = thermal_relaxation_error(t1, t2, prof.two_qubit_ns * 1e-9)
    nm = NoiseModel(basis_gates=["cx", "rz", "sx", "x"])
    nm.add_all_qubit_quantum_error(depolarizing_error(2 * prof.one_qubit_error, 1).compose(r1), ["sx", "x"])
    nm.add_all_qubit_quantum_error(depolarizing_error(4 / 3 * prof.two_qubit_error, 2).compose(r2.expand(r2)), ["cx"])
    nm.add_all_qubit_readout_error(ReadoutError([[1 - prof.p1_given_0, prof.p1_given_0],
                                                 [prof.p0_given_1, 1 - prof.p0_given_1]]))
    res = AerSimulator(method="density_matrix", noise_model=nm).run(body).result()
    assert res.success, res.status
    rho = np.asarray(res.data(0)["rho"])
    assert rho.shape[0] == 2 ** len(compiled.final_layout)
    return time.perf_counter() - t0


def one(n: int, repeat: int) -> dict:
    """Both variants on the same compiled circuit in one process, interleaved ``repeat`` times
    (the fastest of each is kept: the machine is shared); peak RSS of the whole process."""
    from toposcout.compiler.metrics import noise_figures
    from toposcout.compiler.profiles import load_profile
    from toposcout.compiler.simulate import estimate_memory_bytes

    ansatz, compiled = build(n)
    prof = load_profile("superconducting")
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    out = {"n": n, "active": len(compiled.active_qubits()), "cx": compiled.two_qubit_gates(),
           "estimate_bytes": estimate_memory_bytes(len(compiled.active_qubits())), "rss_before": rss0,
           "row_s": math.inf, "hand_s": math.inf}
    for _ in range(repeat):
        t0 = time.perf_counter()
        f = noise_figures(compiled, ansatz, prof, error_budget=False)
        out["row_s"] = min(out["row_s"], time.perf_counter() - t0)
        out["state_fidelity"] = f["state_fidelity"]
        out["hand_s"] = min(out["hand_s"], hand_written(compiled, prof))
    out["peak_rss"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    return out


def repeats(n: int) -> int:
    return 3 if n <= 11 else 1


def main(sizes: list[int]) -> None:
    rows = []
    for n in sizes:
        p = subprocess.run([sys.executable, __file__, "--one", str(n), str(repeats(n))], capture_output=True,
                           text=True, check=True)
        r = json.loads(p.stdout.strip().splitlines()[-1])
        rows.append(r)
        print(f"n={n}: row {r['row_s']:.2f} s, hand {r['hand_s']:.2f} s", file=sys.stderr, flush=True)
    print("| active qubits | CX | toposcout row (s) | hand-written aer (s) | overhead | peak RSS (MiB) | "
          "peak over start (MiB) | estimate (MiB) | state fidelity |")
    print("|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['active']} | {r['cx']} | {r['row_s']:.2f} | {r['hand_s']:.2f} | {r['row_s'] / r['hand_s']:.2f}x | "
              f"{r['peak_rss'] / 2**20:.0f} | {(r['peak_rss'] - r['rss_before']) / 2**20:.0f} | "
              f"{r['estimate_bytes'] / 2**20:.0f} | {r['state_fidelity']:.3f} |")


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--one":
        print(json.dumps(one(int(sys.argv[2]), int(sys.argv[3]))))
    else:
        main([int(a) for a in sys.argv[1:]] or list(range(8, 14)))
