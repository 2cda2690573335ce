"""Structured vs generic two-qubit counts on the suite's four reference models (cx gate set).

Run: .venv/bin/python benchmarks/bench_structured.py [--generic-seeds 5] [--json out.json]
The full suite with every check is `toposcout bench` (compiler/bench.py).
Prints one row per (model, connectivity): LB, structured 2q count / depth / seconds, generic
(qiskit preset pipeline, optimization level 3, best of the seeds) 2q count / depth, ratios.
"""

from __future__ import annotations

import argparse
import json
import statistics
import time

from toposcout.compiler.ansatz import build_ansatz
from toposcout.compiler.compile import compile_generic
from toposcout.compiler.model import parse_model
from toposcout.compiler.synthesis import compile_structured
from toposcout.compiler.targets import get_gate_set, make_connectivity
from toposcout.compiler.bench import CONNECTIVITY_FAMILIES_BENCHED as FAMILIES, PLUGIN_BEST_REFERENCE, plaquette_model, ring_triples_model, triangle_model

# the suite's four reference models (generators shared with `toposcout bench`, which runs the full suite)
MODELS = {m["name"]: m for m in (plaquette_model(3, 3), plaquette_model(3, 4), triangle_model(3, 3),
                                  ring_triples_model(10))}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--generic-seeds", type=int, default=5)
    ap.add_argument("--json")
    args = ap.parse_args(argv)
    gs = get_gate_set("cx")
    rows = []
    for name, mdict in MODELS.items():
        n = len(mdict["variables"])
        a = build_ansatz(parse_model(mdict))
        lb = a.stats()["lower_bound_two_qubit"]
        for fam in FAMILIES:
            con = make_connectivity(fam, n)
            t = time.perf_counter()
            st = compile_structured(a, con, gs)
            st_s = time.perf_counter() - t
            row = {"model": name, "connectivity": con.name, "family": fam, "lb": lb,
                   "structured": st.two_qubit_gates(), "structured_depth": st.depth(),
                   "structured_seconds": round(st_s, 3), "plugin_best_reference": PLUGIN_BEST_REFERENCE[name].get(fam)}
            if args.generic_seeds > 0:
                gen = compile_generic(a, con, gs, seeds=args.generic_seeds)
                row.update(generic=gen.two_qubit_gates(), generic_depth=gen.depth())
            rows.append(row)
            best = row["plugin_best_reference"]
            print(f"{name:16s} {fam:10s} LB {lb:3d}  structured {row['structured']:4d} "
                  f"(x{row['structured'] / lb:.2f} LB"
                  + (f", {row['structured'] / best:.2f} of the reference best {best}" if best else "")
                  + f") depth {row['structured_depth']:4d} {st_s:5.2f}s"
                  + (f" | generic {row['generic']:4d} depth {row['generic_depth']:4d}" if "generic" in row else ""),
                  flush=True)
    cons = [r["structured"] / r["plugin_best_reference"] for r in rows if r["family"] != "all-to-all" and r["plugin_best_reference"]]
    print(f"median structured / reference best over constrained table cells: {statistics.median(cons):.3f}")
    a2a = [r["structured"] / r["lb"] for r in rows if r["family"] == "all-to-all"]
    print(f"all-to-all structured / LB: max {max(a2a):.2f}")
    if all("generic" in r for r in rows):
        dr = [r["structured_depth"] / r["generic_depth"] for r in rows]
        gr = [r["structured"] / r["generic"] for r in rows if r["family"] != "all-to-all"]
        print(f"median depth structured / generic: {statistics.median(dr):.3f}; "
              f"median 2q structured / generic (constrained): {statistics.median(gr):.3f}")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(rows, fh, indent=1)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
