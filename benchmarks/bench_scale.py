"""Benchmark of the noise study at device scale: trajectories, matrix product states, clifford.

    .venv/bin/python benchmarks/bench_scale.py            # the targets (tens of minutes)
    .venv/bin/python benchmarks/bench_scale.py --quick    # smaller cases (a few minutes)
    .venv/bin/python benchmarks/bench_scale.py --cases plaq64-grid,plaq64-heavy-hex --skip-cost-law   # some cases

Prints, for each case, the row's method, its figures with standard errors and its wall time
against its speed target (the device-scale targets), then the cost law of each method (seconds against active
qubits and two-qubit count). Models are chains of pairs on a line (active qubits = variables)
and the 8x8 2x2-plaquette example (examples/parking-bays-64.json), the superconducting-like
profile at scale 1, structured compilation, one seed. Every figure is a simulation under the
stated noise model, and the trajectory and clifford figures are estimates with their errors.

Cases (full / --quick):

* ``traj20``: 20-variable chain, ``method=trajectories`` (statevector) to a state-fidelity
  standard error of 0.01, no error budget. Target < 5 min. Quick: 16 variables, SE 0.02.
* ``mps40``: 40-variable chain, trajectories (matrix product state: past 26 qubits) to SE 0.01.
  Target < 5 min. Quick: SE 0.02.
* ``plaq64``: the 8x8 plaquette model on grid and heavy-hex, ``method=clifford`` (what ``auto``
  picks at this size), relative s.e. 5 %, with the error budget. Target < 60 s each. Quick: grid only.
* cost law: seconds per trajectory (statevector, MPS), per density-matrix run, per clifford
  estimate, at several sizes.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def chain(n: int) -> dict:
    names = [f"x{i}" for i in range(n)]
    return {"name": f"chain{n}", "variables": names, "cliques": [names[i:i + 2] for i in range(n - 1)]}


def row(model, connectivity: str, **options) -> tuple[dict, float]:
    from toposcout.compiler.study import make_tasks, run_task

    t = make_tasks(model, [connectivity], seeds=1, strategy="structured", **options)[0]
    t0 = time.perf_counter()
    r = run_task(t)
    return r, time.perf_counter() - t0


def fmt(r: dict, key: str) -> str:
    v, se = r.get(key), r.get(f"{key}_se")
    if v is None:
        return "-"
    return f"{v:.4g}" + (f" ± {se:.2g}" if se is not None else "")


def case_line(name: str, r: dict, seconds: float, target: float) -> str:
    f = fmt(r, "state_fidelity") if r.get("state_fidelity") is not None else "~" + fmt(r, "clifford_state_fidelity")
    extra = ""
    if r.get("trajectories"):
        extra = f", {r['trajectories']} trajectories ({r['trajectory_method']}"
        if r.get("mps_bond_dimension_reached") is not None:
            extra += f", bond reached {r['mps_bond_dimension_reached']} of cap {r['mps_max_bond_dimension']}"
        extra += ")"
    if r.get("clifford_estimator"):
        f_c, se_c = r.get("clifford_state_fidelity"), r.get("clifford_state_fidelity_se")
        reached = "upper bound (no return)" if r.get("clifford_upper_bound") else f"rel. s.e. {se_c / f_c:.3f}"
        drawn = (f"{r['clifford_shots']} shots" if r["clifford_estimator"] == "counted returns" else
                 f"{r['clifford_samples']} samples, ESS {r.get('clifford_effective_samples') or 0:.0f}")
        budget = "/".join(f"{r[k]:.2g}" if r.get(k) is not None else "-" for k in
                          ("clifford_budget_state_two_qubit", "clifford_budget_state_one_qubit",
                           "clifford_budget_state_idle", "clifford_budget_readout"))
        extra = (f", {r['clifford_estimator']}, {drawn}, {reached}, budget 2q/1q/idle/readout {budget}, "
                 f"compile {r.get('compile_seconds') or 0:.1f} s")
    clique = fmt(r, "clique_hellinger_mean")
    verdict = "met" if seconds < target else "MISSED"
    return (f"| {name} | {r.get('connectivity')} | {r.get('active_qubits')} | {r.get('two_qubit_gates')} | "
            f"{r.get('method')} | {f}{extra} | {clique} | {seconds:.1f} | < {target:g} s: {verdict} |")


def cost_law(quick: bool) -> list[str]:
    from toposcout.compiler import build_ansatz, compile_ansatz, get_gate_set, make_connectivity, parse_model
    from toposcout.compiler import trajectories as T
    from toposcout.compiler.clifford import clifford_figures
    from toposcout.compiler.metrics import clique_indices, noise_figures
    from toposcout.compiler.noise import schedule
    from toposcout.compiler.profiles import load_profile
    from toposcout.compiler.simulate import simulate_ideal

    prof = load_profile("superconducting")
    lines = ["| method | active qubits | 2q gates | seconds | per |", "|---|---|---|---|---|"]

    def compiled(n):
        m = parse_model(chain(n))
        a = build_ansatz(m, seed=0)
        return m, a, compile_ansatz(a, make_connectivity("line", n), get_gate_set("cx"), strategy="structured", seeds=1)

    for n in ((8, 10) if quick else (8, 10, 11, 12)):
        m, a, c = compiled(n)
        t0 = time.perf_counter()
        noise_figures(c, a, prof, error_budget=False)
        lines.append(f"| density-matrix | {n} | {c.two_qubit_gates()} | {time.perf_counter() - t0:.3g} | row |")
    for n in ((10, 14, 16) if quick else (10, 14, 16, 18, 20, 22)):
        m, a, c = compiled(n)
        s = schedule(c, prof)
        ideal = simulate_ideal(s)
        run = T.run_trajectories(s, prof, clique_indices(m), ideal_amplitudes=ideal.amplitudes, n_trajectories=16,
                                 method="statevector")
        lines.append(f"| trajectories (statevector) | {n} | {c.two_qubit_gates()} | {run.seconds / run.n:.3g} | "
                     f"trajectory |")
    for n in ((20, 40) if quick else (20, 40, 60, 80)):
        m, a, c = compiled(n)
        s = schedule(c, prof)
        run = T.run_trajectories(s, prof, clique_indices(m), n_trajectories=16, method="matrix_product_state")
        lines.append(f"| trajectories (MPS, bond {run.bond_reached}) | {n} | {c.two_qubit_gates()} | "
                     f"{run.seconds / run.n:.3g} | trajectory |")
    for n in ((20, 40, 64) if quick else (20, 40, 64, 100)):
        m, a, c = compiled(n)
        s = schedule(c, prof)
        r = clifford_figures(s, prof)
        lines.append(f"| clifford | {n} | {c.two_qubit_gates()} | {r['clifford_seconds']:.3g} | estimate "
                     f"({r['clifford_shots']} shots) |")
    return lines


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="smaller cases (a few minutes)")
    p.add_argument("--skip-cost-law", action="store_true")
    p.add_argument("--only-cost-law", action="store_true", help="print only the cost-law table")
    p.add_argument("--json", metavar="FILE", help="also write the rows as JSON")
    p.add_argument("--cases", default=None, help="comma-separated case names to run (default: all)")
    args = p.parse_args(argv)
    from toposcout.compiler.model import load_model

    q = args.quick
    cases = [
        ("traj16" if q else "traj20", chain(16 if q else 20), "line",
         dict(method="trajectories", precision=0.02 if q else 0.01, error_budget=False, time_budget_seconds=3600), 300),
        ("mps40", chain(40), "line",
         dict(method="trajectories", precision=0.02 if q else 0.01, error_budget=False, time_budget_seconds=3600), 300),
    ]
    plaq = load_model(ROOT / "examples" / "parking-bays-64.json").to_dict()
    for conn in (("grid",) if q else ("grid", "heavy-hex")):
        cases.append((f"plaq64-{conn}", plaq, conn, dict(method="clifford"), 60))
    if args.only_cost_law:
        print("\n".join(cost_law(q)))
        return 0
    if args.cases:
        wanted = set(args.cases.split(","))
        unknown = wanted - {c[0] for c in cases}
        if unknown:
            p.error(f"--cases: unknown case(s) {sorted(unknown)}; known: {[c[0] for c in cases]}")
        cases = [c for c in cases if c[0] in wanted]
    print("| case | connectivity | active | 2q | method | state fidelity | clique Hellinger mean | s | target |")
    print("|---|---|---|---|---|---|---|---|---|")
    rows = []
    for name, model, conn, opts, target in cases:
        r, s = row(model, conn, **opts)
        rows.append({"case": name, "seconds": s, **r})
        print(case_line(name, r, s, target), flush=True)
        if r.get("noise_error"):
            print(f"  noise_error: {r['noise_error']}")
    if not args.skip_cost_law:
        print()
        print("\n".join(cost_law(q)))
    if args.json:
        Path(args.json).write_text(json.dumps(rows, indent=1, default=str))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
