"""Compile-time benchmark: prints wall time per connectivity (not a timed test).

    .venv/bin/python benchmarks/bench_compile.py [--strategy generic|structured|auto] [--seeds 5]

A 12-variable plaquette model (3×4 pixels, six 2×2 cliques) to every built-in
connectivity, and a 60-variable chain to line and heavy-hex.
"""

from __future__ import annotations

import argparse
import time

from toposcout.compiler.ansatz import build_ansatz
from toposcout.compiler.compile import compile_ansatz
from toposcout.compiler.model import parse_model
from toposcout.compiler.targets import BUILTIN_FAMILIES, get_gate_set, make_connectivity
from toposcout.compiler.bench import chain_model, plaquette_model


def bench(model_dict: dict, families, strategy: str, seeds: int) -> float:
    model = parse_model(model_dict)
    ansatz = build_ansatz(model)
    total = 0.0
    for fam in families:
        conn = make_connectivity(fam, model.num_variables)
        t0 = time.perf_counter()
        c = compile_ansatz(ansatz, conn, get_gate_set("cx"), strategy=strategy, seeds=seeds)
        dt = time.perf_counter() - t0
        total += dt
        f = c.figures()
        print(f"{model.name:<16} {conn.name:<14} {c.strategy:<10} 2q={f['two_qubit_gates']:<6} "
              f"swaps={f['swaps']:<5} depth={f['depth']:<6} wall={dt:7.2f} s")
    print(f"{model.name:<16} total wall {total:.2f} s")
    return total


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--strategy", default="generic")
    ap.add_argument("--seeds", type=int, default=5)
    a = ap.parse_args()
    bench(plaquette_model(3, 4), BUILTIN_FAMILIES, a.strategy, a.seeds)
    bench(chain_model(60), ("line", "heavy-hex"), a.strategy, a.seeds)


if __name__ == "__main__":
    main()
