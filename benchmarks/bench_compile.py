"""Compile-time benchmark: prints wall time per connectivity (not a timed test).

    .venv/bin/python benchmarks/bench_compile.py [--strategy generic|structured|auto] [--seeds 5]

A 12-variable plaquette model (3×4 pixels, six 2×2 cliques) to every built-in
connectivity, and a 60-variable chain to line and heavy-hex.
"""

from __future__ import annotations

import argparse
import time

from compiler.ansatz import build_ansatz
from compiler.compile import compile_ansatz
from compiler.model import parse_model
from compiler.targets import BUILTIN_FAMILIES, get_gate_set, make_connectivity


def plaquette_model(rows: int, cols: int) -> dict:
    name = lambda r, c: f"p{r}_{c}"
    variables = [name(r, c) for r in range(rows) for c in range(cols)]
    cliques = [[name(r, c), name(r, c + 1), name(r + 1, c), name(r + 1, c + 1)]
               for r in range(rows - 1) for c in range(cols - 1)]
    return {"name": f"plaquettes-{rows}x{cols}", "variables": variables, "cliques": cliques}


def chain_model(n: int) -> dict:
    variables = [f"d{i}" for i in range(n)]
    return {"name": f"chain-{n}", "variables": variables,
            "cliques": [[variables[i], variables[i + 1]] for i in range(n - 1)]}


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
