"""``toposcout bench``: structured vs generic compilation on a fixed suite of models.

The suite's model generators live here (and only here); ``benchmarks/*.py`` import them.

Per (model, connectivity, strategy) cell the bench records the two-qubit count, depth,
two-qubit depth and wall-clock compile time; per (model, connectivity) pair the ratios
structured / generic and strategy / LB, where LB is the number of distinct terms of order
>= 2 (each needs at least one two-qubit gate to put its parity on a wire). Every ratio is
computed from the counts of this run.

The "best qiskit" reference per constrained cell is the minimum of (a) the figure measured
once for the suite's four models (:data:`PLUGIN_BEST_REFERENCE`, qiskit 2.6, mcts up to 2000 simulations),
(b) the generic ladder pipeline of this run and, with ``--qiskit-best``, (c) what this bench
measures itself: the diagonal block as one ``PauliEvolutionGate`` (the same angles), every
high-level-synthesis plugin qiskit offers for it (:data:`QISKIT_CONFIGS`; mcts with
``--mcts-simulations`` simulations), optimization level 3, transpiler seeds 0..seeds-1.

``--big`` adds a 100-variable chain and an 8x8 plaquette grid on heavy-hex, compiled with the
structured strategy only (qiskit's level-3 pipeline needs minutes per seed there).

Examples:
    >>> m = plaquette_model(3, 3)
    >>> len(m["variables"]), len(m["cliques"]), lower_bound(m)
    (9, 4, 40)
    >>> lower_bound(triangle_model(3, 3)), lower_bound(ring_triples_model(10))
    (24, 30)
"""

from __future__ import annotations

import statistics
import time
from itertools import combinations
from typing import Any, Callable, Iterable, Sequence

import numpy as np

__all__ = [
    "CONNECTIVITY_FAMILIES_BENCHED",
    "CONSTRAINED",
    "PLUGIN_BEST_REFERENCE",
    "QISKIT_CONFIGS",
    "chain_model",
    "plaquette_model",
    "triangle_model",
    "ring_triples_model",
    "random_clique_model",
    "lower_bound",
    "suite_models",
    "big_models",
    "qiskit_best",
    "run_bench",
    "format_table",
    "STRATEGY_ORDER",
]

CONNECTIVITY_FAMILIES_BENCHED = ("line", "ring", "grid", "heavy-hex", "all-to-all")
CONSTRAINED = ("line", "ring", "grid", "heavy-hex")
STRATEGY_ORDER = ("generic", "structured", "auto")

#: best routed two-qubit count over qiskit's PauliEvolution synthesis plugins, measured for the
#: suite's four models (qiskit 2.6, cx gate set, seeds 0..4, mcts up to 2000 simulations). Reference figures,
#: not results of this tool; keyed by the suite's model names.
PLUGIN_BEST_REFERENCE: dict[str, dict[str, int]] = {
    "plaquettes-3x3": {"line": 184, "grid": 112, "heavy-hex": 152, "all-to-all": 66},
    "plaquettes-3x4": {"line": 288, "grid": 185, "heavy-hex": 246, "all-to-all": 92},
    "triangles-3x3": {"line": 84, "grid": 57, "heavy-hex": 75, "all-to-all": 36},
    "ring10-triples": {"line": 135, "grid": 89, "heavy-hex": 95, "all-to-all": 54},
}

#: (plugin, options) pairs of qiskit's PauliEvolution high-level synthesis measured by --qiskit-best;
#: "mcts" gets num_simulations from the bench budget.
QISKIT_CONFIGS: tuple[tuple[str, dict], ...] = (
    ("default", {}),
    ("basic", {"preserve_order": True}),
    ("basic", {"preserve_order": False}),
    ("rustiq", {"preserve_order": True}),
    ("rustiq", {"preserve_order": False}),
    ("mcts", {"preserve_order": True}),
    ("mcts", {"preserve_order": False}),
)


# ---------------------------------------------------------------- model generators

def chain_model(n: int) -> dict:
    """``n`` variables d0..d{n-1}, pair cliques (d_i, d_{i+1})."""
    v = [f"d{i}" for i in range(n)]
    return {"name": f"chain-{n}", "variables": v, "cliques": [[v[i], v[i + 1]] for i in range(n - 1)]}


def _pixel(r: int, c: int) -> str:
    return f"p{r}_{c}"


def plaquette_model(rows: int, cols: int) -> dict:
    """A rows x cols pixel grid (row-major variables) with every 2x2 plaquette a clique."""
    v = [_pixel(r, c) for r in range(rows) for c in range(cols)]
    cl = [[_pixel(r, c), _pixel(r, c + 1), _pixel(r + 1, c), _pixel(r + 1, c + 1)]
          for r in range(rows - 1) for c in range(cols - 1)]
    return {"name": f"plaquettes-{rows}x{cols}", "variables": v, "cliques": cl}


def triangle_model(rows: int, cols: int) -> dict:
    """A rows x cols grid, each square cut along its diagonal into two triangle cliques."""
    v = [_pixel(r, c) for r in range(rows) for c in range(cols)]
    cl = []
    for r in range(rows - 1):
        for c in range(cols - 1):
            cl.append([_pixel(r, c), _pixel(r, c + 1), _pixel(r + 1, c + 1)])
            cl.append([_pixel(r, c), _pixel(r + 1, c), _pixel(r + 1, c + 1)])
    return {"name": f"triangles-{rows}x{cols}", "variables": v, "cliques": cl}


def ring_triples_model(n: int) -> dict:
    """A ring of ``n`` variables, each three consecutive ones a clique."""
    v = [f"r{i}" for i in range(n)]
    return {"name": f"ring{n}-triples", "variables": v,
            "cliques": [[v[i], v[(i + 1) % n], v[(i + 2) % n]] for i in range(n)]}


def random_clique_model(n: int, cliques: int, *, seed: int, min_size: int = 2, max_size: int = 4) -> dict:
    """``cliques`` random cliques of ``min_size..max_size`` of ``n`` variables (numpy seed);
    a variable left out is paired with a random other one."""
    rng = np.random.default_rng(seed)
    v = [f"x{i}" for i in range(n)]
    out: list[list[str]] = []
    for _ in range(cliques):
        k = int(rng.integers(min_size, max_size + 1))
        out.append([v[int(i)] for i in sorted(rng.choice(n, size=k, replace=False))])
    used = {x for c in out for x in c}
    for i in range(n):
        if v[i] not in used:
            j = int(rng.choice([k for k in range(n) if k != i]))
            out.append([v[min(i, j)], v[max(i, j)]])
            used.update((v[i], v[j]))
    return {"name": f"random-cliques-{n}-s{seed}", "variables": v, "cliques": out}


def lower_bound(model: dict) -> int:
    """Distinct subsets of order >= 2 of the model's cliques (one layer)."""
    seen: set[frozenset] = set()
    for c in model["cliques"]:
        for k in range(2, len(c) + 1):
            seen.update(frozenset(s) for s in combinations(c, k))
    return len(seen)


def suite_models(quick: bool = False) -> list[dict]:
    """The fixed suite (``quick``: three small models for tests)."""
    if quick:
        return [chain_model(6), triangle_model(2, 3), plaquette_model(3, 3)]
    return [
        chain_model(8),
        chain_model(16),
        triangle_model(3, 3),
        triangle_model(4, 4),
        plaquette_model(3, 3),
        plaquette_model(3, 4),
        plaquette_model(4, 4),
        ring_triples_model(10),
        ring_triples_model(14),
        random_clique_model(12, 8, seed=1),
    ]


def big_models() -> list[dict]:
    """The big cells' models (compiled to heavy-hex only)."""
    return [chain_model(100), plaquette_model(8, 8)]


# ---------------------------------------------------------------- measurements

def _two_qubit(circuit) -> int:
    return sum(1 for ins in circuit.data if ins.operation.num_qubits == 2)


def _evolution_circuit(ansatz):
    """One layer's logical circuit with the diagonal block as a PauliEvolutionGate."""
    from qiskit import QuantumCircuit
    from qiskit.circuit.library import PauliEvolutionGate
    from qiskit.quantum_info import SparsePauliOp

    n = ansatz.num_qubits
    qc = QuantumCircuit(n, n)
    qc.h(range(n))
    for layer in range(ansatz.layers):
        # exp(-i θ Z_S) for every term = exp(-i t H) with H = Σ θ Z_S and t = 1
        op = SparsePauliOp.from_sparse_list(
            [("Z" * len(s), list(s), th) for s, th in ansatz.layer_terms(layer)], num_qubits=n)
        qc.append(PauliEvolutionGate(op, time=1.0), range(n))
        for q, (th, ph, la) in enumerate(ansatz.rotations[layer]):
            qc.u(th, ph, la, q)
    qc.measure(range(n), range(n))
    return qc


def qiskit_best(ansatz, connectivity, gate_set, *, seeds: int = 5, simulations: int = 300) -> dict:
    """Best two-qubit count over :data:`QISKIT_CONFIGS` x transpiler seeds 0..seeds-1 (level 3).

    Returns {"two_qubit_gates": best, "config": "plugin(opts) seed s", "per_config": {label: best},
    "seconds": wall time}.
    """
    from qiskit.transpiler import generate_preset_pass_manager
    from qiskit.transpiler.passes import HLSConfig

    from toposcout.compiler.targets import build_target

    qc = _evolution_circuit(ansatz)
    target = build_target(connectivity, gate_set)
    start = time.perf_counter()
    per: dict[str, int] = {}
    best: tuple[int, str] | None = None
    for plugin, opts in QISKIT_CONFIGS:
        label = plugin + ("" if "preserve_order" not in opts else
                          ("(ordered)" if opts["preserve_order"] else "(reordered)"))
        for seed in range(seeds):
            o = dict(opts)  # qiskit adds keys to the dict it is given: a fresh copy per run
            if plugin == "mcts":
                o["num_simulations"] = simulations
            pm = generate_preset_pass_manager(3, target=target, seed_transpiler=seed,
                                              hls_config=HLSConfig(PauliEvolution=[(plugin, o)]))
            two = _two_qubit(pm.run(qc))
            per[label] = min(per.get(label, two), two)
            if best is None or two < best[0]:
                best = (two, f"{label} seed {seed}")
    return {"two_qubit_gates": best[0], "config": best[1], "per_config": per,
            "seconds": round(time.perf_counter() - start, 3)}


def _ratio(a, b) -> float | None:
    if a is None or b is None or b == 0:
        return None
    return round(a / b, 4)


def _median(xs: Iterable[float | None]) -> float | None:
    xs = [x for x in xs if x is not None]
    return round(statistics.median(xs), 4) if xs else None


def _cell(model_name, n, lb, conn, strategy, compiled, wall) -> dict:
    f = compiled.figures()
    return {
        "model": model_name, "variables": n, "lb": lb, "family": conn.family, "connectivity": conn.name,
        "strategy": strategy, "winner": f["strategy"] if strategy == "auto" else strategy,
        "two_qubit_gates": f["two_qubit_gates"], "depth": f["depth"], "two_qubit_depth": f["two_qubit_depth"],
        "swaps": f["swaps"], "compile_seconds": round(wall, 4),
        "ratio_lb": _ratio(f["two_qubit_gates"], lb),
    }


def run_bench(
    *,
    quick: bool = False,
    strategies: Sequence[str] = STRATEGY_ORDER,
    seeds: int = 5,
    measure_qiskit: bool = False,
    simulations: int = 300,
    big: bool = False,
    gate_set: str = "cx",
    progress: Callable[[str], None] | None = None,
) -> dict[str, Any]:
    """Run the suite; returns the JSON-able result (see the module docstring)."""
    from toposcout.compiler import __version__
    from toposcout.compiler.ansatz import build_ansatz
    from toposcout.compiler.compile import compile_ansatz
    from toposcout.compiler.model import parse_model
    from toposcout.compiler.targets import get_gate_set, make_connectivity

    gs = get_gate_set(gate_set)
    families = ("line", "grid", "all-to-all") if quick else CONNECTIVITY_FAMILIES_BENCHED
    strategies = [s for s in STRATEGY_ORDER if s in strategies]
    say = progress or (lambda msg: None)
    started = time.perf_counter()

    plan = [(m, families, False) for m in suite_models(quick)]
    if big and "structured" in strategies:
        # structured only: qiskit's level-3 pipeline needs minutes per seed on these cells
        plan += [(m, ("heavy-hex",), True) for m in big_models()]

    models, cells, pairs, measured = [], [], [], []
    for mdict, fams, is_big in plan:
        name, lb = mdict["name"], lower_bound(mdict)
        model = parse_model(mdict)
        ansatz = build_ansatz(model)
        models.append({"name": name, "variables": list(mdict["variables"]), "cliques": mdict["cliques"],
                       "lb": lb, "big": is_big})
        for fam in fams:
            conn = make_connectivity(fam, model.num_variables)
            by: dict[str, dict] = {}
            for s in (("structured",) if is_big else strategies):
                t0 = time.perf_counter()
                c = compile_ansatz(ansatz, conn, gs, strategy=s, seeds=seeds)
                cell = _cell(name, model.num_variables, lb, conn, s, c, time.perf_counter() - t0)
                cells.append(cell)
                by[s] = cell
                say(f"{name:<20} {conn.name:<14} {s:<10} 2q {cell['two_qubit_gates']:>5}  "
                    f"depth {cell['depth']:>5}  {cell['compile_seconds']:7.2f} s")
            g, st, au = by.get("generic"), by.get("structured"), by.get("auto")
            pair: dict[str, Any] = {"model": name, "variables": model.num_variables, "lb": lb, "family": fam,
                                    "connectivity": conn.name, "big": is_big}
            for s, cell in by.items():
                pair[f"{s}_two_qubit_gates"] = cell["two_qubit_gates"]
                pair[f"{s}_depth"] = cell["depth"]
            pair["structured_over_generic"] = _ratio(st and st["two_qubit_gates"], g and g["two_qubit_gates"])
            pair["depth_structured_over_generic"] = _ratio(st and st["depth"], g and g["depth"])
            if au:
                pair["auto_winner"] = au["winner"]
            if g and au:
                pair["auto_worse_than_generic"] = ((au["two_qubit_gates"], au["depth"])
                                                   > (g["two_qubit_gates"], g["depth"]))
            # the best qiskit reference for this cell
            refs: dict[str, int] = {}
            if name in PLUGIN_BEST_REFERENCE and fam in PLUGIN_BEST_REFERENCE[name]:
                refs["reference"] = PLUGIN_BEST_REFERENCE[name][fam]
            if g:
                refs["generic"] = g["two_qubit_gates"]
            if measure_qiskit and not is_big:
                q = qiskit_best(ansatz, conn, gs, seeds=seeds, simulations=simulations)
                refs["measured"] = q["two_qubit_gates"]
                measured.append({"model": name, "family": fam, "connectivity": conn.name, **q})
                say(f"{name:<20} {conn.name:<14} qiskit best {q['two_qubit_gates']:>5}  ({q['config']}, "
                    f"{q['seconds']:.1f} s)")
            # a reference counts only if it includes a plugin search (the reference figure or a measurement)
            if "reference" in refs or "measured" in refs:
                best = min(refs.values())
                pair["qiskit_best"] = best
                pair["qiskit_best_source"] = "+".join(k for k, v in refs.items() if v == best)
                pair["structured_over_qiskit_best"] = _ratio(st and st["two_qubit_gates"], best)
            else:
                pair["qiskit_best"] = None
                pair["qiskit_best_source"] = None
                pair["structured_over_qiskit_best"] = None
            pairs.append(pair)

    small = [p for p in pairs if not p["big"]]
    cons = [p for p in small if p["family"] in CONSTRAINED]
    medians: dict[str, Any] = {
        "structured_over_generic_constrained": _median(p["structured_over_generic"] for p in cons),
        "structured_over_generic_all": _median(p["structured_over_generic"] for p in small),
        "depth_structured_over_generic": _median(p["depth_structured_over_generic"] for p in small),
        "structured_over_qiskit_best_constrained": _median(p["structured_over_qiskit_best"] for p in cons),
        "qiskit_best_cells": sum(1 for p in cons if p["structured_over_qiskit_best"] is not None),
        "ratio_lb": {s: {fam: _median(c["ratio_lb"] for c in cells
                                      if c["strategy"] == s and c["family"] == fam and c["variables"] <= 16)
                         for fam in families} for s in strategies},
    }
    for s in strategies:
        mine = [c for c in cells if c["strategy"] == s and c["variables"] <= 16]
        medians[f"{s}_depth"] = _median(c["depth"] for c in mine)
        medians[f"{s}_two_qubit_gates"] = _median(c["two_qubit_gates"] for c in mine)
        medians[f"{s}_compile_seconds"] = _median(c["compile_seconds"] for c in mine)

    checks: dict[str, Any] = {}
    if "generic" in strategies and "auto" in strategies:
        bad = [f"{p['model']}/{p['connectivity']}" for p in small if p.get("auto_worse_than_generic")]
        checks["auto_not_worse_than_generic"] = {"ok": not bad, "violations": bad}
    if "structured" in strategies:
        a2a = [c for c in cells if c["strategy"] == "structured" and c["family"] == "all-to-all"]
        over = [f"{c['model']} {c['two_qubit_gates']} > 1.5 x {c['lb']}" for c in a2a
                if c["two_qubit_gates"] > 1.5 * c["lb"]]
        checks["all_to_all_structured_within_1_5_lb"] = {
            "ok": bool(a2a) and not over, "violations": over,
            "max_ratio_lb": max((c["ratio_lb"] for c in a2a), default=None)}
        q = medians["structured_over_qiskit_best_constrained"]
        checks["median_structured_over_qiskit_best"] = {
            "ok": q is not None and q <= 0.75, "stretch_ok": q is not None and q <= 0.6, "median": q,
            "cells": medians["qiskit_best_cells"], "target": 0.75, "stretch": 0.6}
        slow = [c for c in cells if c["strategy"] == "structured" and c["variables"] <= 16
                and c["compile_seconds"] >= 2.0]
        checks["structured_compile_under_2s_to_16_variables"] = {
            "ok": not slow, "violations": [f"{c['model']}/{c['connectivity']} {c['compile_seconds']} s" for c in slow],
            "max_seconds": max((c["compile_seconds"] for c in cells
                                if c["strategy"] == "structured" and c["variables"] <= 16), default=None)}
        if big:
            bc = [c for c in cells if c["strategy"] == "structured" and c["variables"] > 16
                  and c["model"] in {m["name"] for m in big_models()}]
            checks["big_structured_under_60s"] = {
                "ok": bool(bc) and all(c["compile_seconds"] < 60 for c in bc),
                "cells": {f"{c['model']}/{c['connectivity']}": c["compile_seconds"] for c in bc}}
    if "generic" in strategies and "structured" in strategies:
        d = medians["depth_structured_over_generic"]
        checks["median_depth_structured_le_generic"] = {"ok": d is not None and d <= 1.0, "median_ratio": d}
    if "auto" in strategies:
        slow = [c for c in cells if c["strategy"] == "auto" and c["variables"] <= 16 and c["compile_seconds"] >= 2.0]
        checks["auto_compile_under_2s_to_16_variables"] = {
            "ok": not slow,
            "violations": [f"{c['model']}/{c['connectivity']} {c['compile_seconds']} s" for c in slow]}

    return {
        "toposcout_version": __version__,
        "gate_set": gate_set,
        "seeds": seeds,
        "strategies": strategies,
        "families": list(families),
        "quick": quick,
        "big": big,
        "qiskit_best_measured": measure_qiskit,
        "mcts_simulations": simulations if measure_qiskit else None,
        "seconds": round(time.perf_counter() - started, 2),
        "models": models,
        "cells": cells,
        "pairs": pairs,
        "qiskit_measurements": measured,
        "medians": medians,
        "checks": checks,
    }


# ---------------------------------------------------------------- output

def format_table(result: dict, *, markdown: bool = False) -> str:
    """One row per (model, connectivity); then medians and checks."""
    strategies = result["strategies"]
    by = {(c["model"], c["connectivity"], c["strategy"]): c for c in result["cells"]}
    head = ["model", "connectivity", "LB"]
    for s in strategies:
        head += ([f"{s} 2q / depth / 2q-depth / s"] if markdown else
                 [f"{s} 2q", f"{s} depth", f"{s} 2q-depth", f"{s} s"])
    head += ["str/gen", "str/LB", "qiskit best", "str/best"]
    rows = []
    for p in result["pairs"]:
        r = [p["model"], p["connectivity"], str(p["lb"])]
        for s in strategies:
            c = by.get((p["model"], p["connectivity"], s))
            if c is None:
                r += ["-"] if markdown else ["-"] * 4
                continue
            win = f" ({c['winner'][0]})" if s == "auto" else ""
            parts = [f"{c['two_qubit_gates']}{win}", str(c["depth"]), str(c["two_qubit_depth"]),
                     f"{c['compile_seconds']:.2f}"]
            r += [" / ".join(parts)] if markdown else parts
        st = by.get((p["model"], p["connectivity"], "structured"))
        fmt = lambda x: "-" if x is None else f"{x:.2f}"  # noqa: E731
        r += [fmt(p["structured_over_generic"]), fmt(st and st["ratio_lb"]),
              "-" if p["qiskit_best"] is None else f"{p['qiskit_best']} ({p['qiskit_best_source']})",
              fmt(p["structured_over_qiskit_best"])]
        rows.append(r)
    if markdown:
        lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
        lines += ["| " + " | ".join(r) + " |" for r in rows]
    else:
        widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(head)]
        lines = ["  ".join(h.ljust(w) for h, w in zip(head, widths))]
        lines += ["  ".join(x.ljust(w) for x, w in zip(r, widths)) for r in rows]
    m = result["medians"]
    lines.append("")
    lines.append("medians (suite cells up to 16 variables):")
    for k, v in m.items():
        if k != "ratio_lb":
            lines.append(f"  {k}: {v}")
    for s, fams in m["ratio_lb"].items():
        lines.append(f"  {s} 2q / LB by family: " + ", ".join(f"{f} {v}" for f, v in fams.items()))
    lines.append("targets (met / not met; target, then what was measured):")
    for k, v in result["checks"].items():
        lines.append(f"  {'met    ' if v['ok'] else 'not met'}  {check_sentence(k, v)}")
    return "\n".join(lines)


#: each check of the suite as a user reads it: what is compared, and the target
CHECK_GOALS: dict[str, tuple[str, str]] = {
    "auto_not_worse_than_generic": ("auto vs generic, two-qubit gates per cell", "no cell where auto uses more"),
    "all_to_all_structured_within_1_5_lb": ("structured on all-to-all, two-qubit gates / lower bound",
                                            "at most 1.5 in every cell"),
    "median_structured_over_qiskit_best": ("structured / best qiskit synthesis, median two-qubit gates",
                                           "at most 0.75 (stretch goal 0.6)"),
    "structured_compile_under_2s_to_16_variables": ("structured compile time, models up to 16 variables",
                                                    "under 2 s per cell"),
    "big_structured_under_60s": ("structured compile time, big cells", "under 60 s per cell"),
    "median_depth_structured_le_generic": ("structured / generic, median depth", "at most 1.0"),
    "auto_compile_under_2s_to_16_variables": ("auto compile time, models up to 16 variables", "under 2 s per cell"),
}


def check_sentence(key: str, v: dict) -> str:
    """One check as a sentence: what, the target, what was measured (and where it was missed)."""
    what, goal = CHECK_GOALS.get(key, (key.replace("_", " "), "see the JSON"))
    if "median" in v:
        measured = f"median {v['median']}" + (f" over {v['cells']} cells" if v.get("cells") is not None else "")
    elif "median_ratio" in v:
        measured = f"median {v['median_ratio']}"
    elif "max_ratio_lb" in v:
        measured = f"largest {v['max_ratio_lb']}"
    elif "max_seconds" in v:
        measured = f"slowest {v['max_seconds']} s"
    elif "cells" in v and isinstance(v["cells"], dict):
        measured = f"slowest {max(v['cells'].values(), default=None)} s"
    else:
        measured = f"{len(v.get('violations') or [])} cells missed"
    missed = v.get("violations") or []
    tail = f"; missed in {', '.join(missed[:5])}{' ...' if len(missed) > 5 else ''}" if missed else ""
    return f"{what}: target {goal}; measured {measured}{tail}"
