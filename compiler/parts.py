"""One row split across workers: plan it into parts, run each part anywhere, merge the parts.

A trajectories or clifford row is a sum of independent samples (trajectories, shots), so it
can be cut into P *parts* that run on P workers at once and are added up afterwards::

    plan = plan_row(task, parts=P)          # compile, schedule, choose the method (one worker)
    results = [run_part(p) for p in plan["parts"]]    # anywhere, in parallel
    row = merge_parts(plan, results)        # the row: the same fields as run_task(task)

Rows that cannot be split (compile-only, density-matrix, a failed compile, no method fits)
come back finished from :func:`plan_row` with no parts (``plan["row"]``).

What a part is and why the merge is statistically right:

* **trajectories**: part p of P runs with ``seed_offset = p * cap`` (cap: the part's
  trajectory cap, ``ceil(MAX_TRAJECTORIES / P)``), so the parts take consecutive,
  non-overlapping ranges of the unsplit run's seeds (DEVELOPERS.md, "Simulation methods": an
  overlap would repeat trajectories and shrink the standard error falsely). A fixed count N
  is divided into near-equal shares; a precision SE becomes ``SE * sqrt(P)`` per part, so the
  pooled standard error is about SE. The merge concatenates the per-trajectory fidelities
  and adds the jackknife group sums and counts (each group stays a random share of the
  trajectories), then computes the figures exactly as the unsplit row does
  (:func:`toposcout.compiler.trajectories.trajectory_figures`).
* **clifford**: part p samples with :func:`toposcout.compiler.clifford.part_seed` (part 0:
  the row's seed), ``rel_se * sqrt(P)`` and ``max_shots / P``; the merge adds shots and
  returns (:class:`toposcout.compiler.clifford.Tally`): one binomial count of all shots.
* the error budget's source-off runs are parts too (same seeds as the all-on parts: common
  random numbers, as in the unsplit row), and so is the fidelity-target requirement (one
  part: its bisection is sequential).

A part re-creates the compiled circuit from the task (``toposcout.compiler.study`` memoises
the last compilations per process, and compilation is deterministic), so parts carry no
circuit. Plans are small dicts; part results hold numpy arrays (picklable, not JSON).
"""

from __future__ import annotations

import math
import time
from typing import Any, Mapping, Sequence

import numpy as np

from toposcout.compiler import methods as M
from toposcout.compiler import trajectories as T
from toposcout.compiler.errors import ToposcoutError
from toposcout.compiler.metrics import clique_indices
from toposcout.compiler.noise import SOURCES, NoiseSwitches, operation_errors, schedule
from toposcout.compiler.simulate import simulate_ideal

__all__ = ["plan_row", "run_part", "merge_parts", "run_split", "merge_runs"]

#: sources whose off-runs make the error budget (readout needs no run).
_BUDGET = SOURCES[:3]


def _context(task: Mapping[str, Any]):
    """(task with defaults, ansatz, compiled, profile) of a task, compiled through the memo."""
    from toposcout.compiler.ansatz import build_ansatz
    from toposcout.compiler.model import parse_model
    from toposcout.compiler.study import TASK_DEFAULTS, _compiled, _profile, connectivity_spec, task_connectivity

    t = dict(TASK_DEFAULTS)
    t.update(task)
    spec = connectivity_spec(t["connectivity"])
    model = parse_model(dict(t["model"]), "json")
    ansatz = build_ansatz(model, family=t["family"], layers=t["layers"], seed=t["seed"])
    conn, _device, gate_set = task_connectivity(t, model, spec)
    (compiled, _placed), _reused = _compiled(ansatz, conn, gate_set, t, None)
    return t, ansatz, compiled, _profile(t["profile"], t["noise_scale"])


def _shares(total: int, parts: int) -> list[int]:
    return [total // parts + (1 if i < total % parts else 0) for i in range(parts)]


def plan_row(task: Mapping[str, Any], parts: int) -> dict[str, Any]:
    """``{"row", "parts", "task", "started_at", ...}``: the row's compile figures and method
    plan, and the parts that compute its noise figures (none: ``row`` is already the whole
    row, as :func:`toposcout.compiler.study.run_task` makes it)."""
    from toposcout.compiler.study import run_task

    started = time.time()
    t0 = time.perf_counter()
    if not isinstance(parts, int) or isinstance(parts, bool) or parts < 1:
        raise ToposcoutError(f"parts must be an integer >= 1, got {parts!r}", field="parts")
    if parts == 1 or task.get("compile_only"):
        return {"row": run_task(task), "parts": [], "task": dict(task)}
    head = run_task({**task, "compile_only": True})
    if head.get("error"):
        return {"row": head, "parts": [], "task": dict(task)}
    head.pop("method", None)
    head.pop("method_reason", None)
    t, ansatz, compiled, profile = _context(task)
    out: dict[str, Any] = {}
    try:
        sched, plan = M.plan_noise_row(out, compiled, ansatz, profile, t, parts=parts)
    except ToposcoutError as exc:
        out["noise_error"] = M._advice(exc, out)
        out["noise_error_field"] = exc.field
        head.update(out)
        return {"row": head, "parts": [], "task": dict(task)}
    if plan.error:
        head.update(out)
        return {"row": head, "parts": [], "task": dict(task)}
    if plan.method not in ("trajectories", "clifford"):
        whole = run_task(task)
        whole["compile_reused"] = head.get("compile_reused")  # our own head compile is not an earlier row's
        return {"row": whole, "parts": [], "task": dict(task)}
    seed = int(t.get("seed") or 0)
    specs: list[dict[str, Any]] = []
    errs = operation_errors(sched, profile)
    budget_runs = [None]
    note = None
    if t.get("error_budget", True):
        if plan.method == "clifford":
            budget_runs += list(_BUDGET)
        elif (plan.estimate_seconds or 0) * 3 / parts > M._time_budget(t):
            note = (f"error budget skipped: three more runs (about {M._duration(plan.estimate_seconds * 3 / parts)} "
                    f"on {parts} workers) exceed the time budget ({M._duration(M._time_budget(t))}); "
                    "raise --time-budget")
        else:
            budget_runs += [s for s in _BUDGET if errs[s] and profile.noise_scale != 0]
    if plan.method == "trajectories":
        cap = int(math.ceil(T.MAX_TRAJECTORIES / parts))
        fixed = t.get("trajectories")
        counts = _shares(int(fixed), parts) if fixed is not None else [None] * parts
        prec = None if fixed is not None else float(t.get("precision") or T.DEFAULT_PRECISION) * math.sqrt(parts)
        left = max(M._time_budget(t) - (time.perf_counter() - t0), 1e-3)
        for off in budget_runs:
            for p in range(parts):
                if counts[p] == 0:
                    continue
                specs.append({"kind": "trajectories", "off": off, "part": p, "of": parts, "seed": seed,
                              "seed_offset": p * cap, "max_trajectories": cap, "n_trajectories": counts[p],
                              "precision": prec, "trajectory_method": plan.trajectory_method,
                              "time_budget_seconds": left,
                              # the row's full-distribution saves are shared out, so that
                              # splitting does not multiply that cost
                              "distribution_trajectories": T.distribution_cap(len(sched.measured), parts)})
    else:
        from toposcout.compiler.clifford import part_seed

        rel_se = 0.05 * math.sqrt(parts)
        max_shots = int(math.ceil(M.CLIFFORD_MAX_SHOTS / parts))
        for off in budget_runs:
            for p in range(parts):
                specs.append({"kind": "clifford", "off": off, "part": p, "of": parts, "seed": part_seed(seed, p),
                              "rel_se": min(rel_se, 0.99), "max_shots": max_shots})
    if t.get("fidelity_target") is not None:
        specs.append({"kind": "threshold", "off": None, "part": 0, "of": 1})
    for sp in specs:
        sp["task"] = dict(task)
    head.update(out)
    return {"row": head, "parts": specs, "task": dict(task), "started_at": started, "method": plan.method,
            "n_parts": parts, "budget_note": note, "budget_runs": budget_runs}


def run_part(part: Mapping[str, Any]) -> dict[str, Any]:
    """Run one part of :func:`plan_row`: ``{"kind", "off", "part", "result"}`` or, when the
    part hits a ToposcoutError, ``{"kind", "off", "part", "error", "field"}``."""
    head = {"kind": part["kind"], "off": part["off"], "part": part["part"]}
    try:
        t, ansatz, compiled, profile = _context(part["task"])
        sched = schedule(compiled, profile)
        switches = NoiseSwitches() if part["off"] is None else NoiseSwitches().without(part["off"])
        if part["kind"] == "trajectories":
            kw: dict[str, Any] = {}
            if part["trajectory_method"] == "statevector":
                kw["ideal_amplitudes"] = simulate_ideal(sched).amplitudes
            else:
                kw["ideal_mps"] = T._ideal_mps(sched, 0)
            run = T.run_trajectories(sched, profile, clique_indices(ansatz.model), switches,
                                     n_trajectories=part["n_trajectories"], precision=part["precision"],
                                     max_trajectories=part["max_trajectories"],
                                     time_budget_seconds=part["time_budget_seconds"],
                                     memory_budget_bytes=M._memory_budget(t), seed=part["seed"],
                                     seed_offset=part["seed_offset"], method=part["trajectory_method"],
                                     distribution_trajectories=part.get("distribution_trajectories"), **kw)
            return {**head, "result": run}
        if part["kind"] == "clifford":
            from toposcout.compiler.clifford import clifford_tally

            return {**head, "result": clifford_tally(sched, profile, switches, rel_se=part["rel_se"],
                                                     max_shots=part["max_shots"], seed=part["seed"])}
        if part["kind"] == "threshold":
            return {**head, "result": M._threshold(compiled, ansatz, sched, profile, t, M._memory_budget(t), 0)}
        raise ToposcoutError(f"unknown part kind {part['kind']!r}", field="parts")
    except ToposcoutError as exc:
        return {**head, "error": str(exc), "field": exc.field}


def merge_runs(runs: Sequence[T.TrajectoryRun], parts: int) -> T.TrajectoryRun:
    """One TrajectoryRun of the parts' runs (in part order): fidelities concatenated, group
    sums and counts added, the simulation seconds added, the largest bond kept."""
    first = runs[0]
    fids = [f for r in runs for f in r.fidelities]
    dist = None if first.dist_sums is None else np.sum([r.dist_sums for r in runs], axis=0)
    cliques = [np.sum([r.clique_sums[i] for r in runs], axis=0) for i in range(len(first.clique_sums))]
    counts = np.sum([r.counts for r in runs], axis=0)
    dist_counts = None if first.dist_sums is None else np.sum([r.distribution_counts for r in runs], axis=0)
    bonds = [r.bond_reached for r in runs if r.bond_reached is not None]
    stops = sorted({r.stop for r in runs})
    stop = f"{len(runs)} of {parts} parts: " + "; ".join(stops) if len(runs) > 1 else first.stop
    return T.TrajectoryRun(method=first.method, fidelities=fids, dist_sums=dist, clique_sums=cliques, counts=counts,
                           seconds=sum(r.seconds for r in runs), stop=stop, scope=first.scope,
                           bond_reached=max(bonds) if bonds else None,
                           dist_counts=None if dist_counts is None or (dist_counts == counts).all() else dist_counts)


def merge_parts(plan: Mapping[str, Any], results: Sequence[Mapping[str, Any]]) -> dict[str, Any]:
    """The row of a split plan from its parts' results (any order): the fields
    :func:`toposcout.compiler.study.run_task` gives the same task, plus ``row_parts``."""
    row = dict(plan["row"])
    if not plan["parts"]:
        return row
    t, ansatz, compiled, profile = _context(plan["task"])
    failed = [r for r in results if "error" in r]
    by = {}
    for r in results:
        if "error" not in r:
            by.setdefault((r["kind"], r["off"]), []).append(r)
    for v in by.values():
        v.sort(key=lambda r: r["part"])
    row["row_parts"] = plan["n_parts"]
    try:
        if plan["method"] == "trajectories":
            row.update(_merge_trajectories(plan, by, t, ansatz, compiled, profile))
        else:
            row.update(_merge_clifford(plan, by, t))
        if ("threshold", None) in by:
            row.update(by[("threshold", None)][0]["result"])
    except ToposcoutError as exc:
        row["noise_error"] = M._advice(exc, row)
        row["noise_error_field"] = exc.field
    if failed and not row.get("noise_error"):
        row["noise_error"] = M._advice(ToposcoutError(failed[0]["error"], field=failed[0]["field"]), row)
        row["noise_error_field"] = failed[0]["field"]
    if plan.get("started_at"):
        row["row_seconds"] = round(time.time() - plan["started_at"], 4)
    return row


def _merge_trajectories(plan, by, t, ansatz, compiled, profile) -> dict[str, Any]:
    sched = schedule(compiled, profile)
    model = ansatz.model
    main = by.get(("trajectories", None))
    if not main:
        raise ToposcoutError("every trajectory part of the row failed", field="parts")
    run = merge_runs([r["result"] for r in main], plan["n_parts"])
    _amps, _mps, p, pcs = M._ideal_for_trajectories(sched, model, run.method, 0)
    out = T.trajectory_figures(sched, profile, model, run, p_ideal=p, p_cliques=pcs)
    for s in SOURCES:
        out[f"budget_{s}"] = None
    for s in _BUDGET:
        out[f"budget_state_{s}"] = None
    if plan.get("budget_note"):
        out["error_budget_note"] = plan["budget_note"]
    elif t.get("error_budget", True):
        on = NoiseSwitches()
        for s in _BUDGET:
            if s not in plan["budget_runs"]:
                out[f"budget_{s}"] = out[f"budget_state_{s}"] = 0.0
                continue
            parts = by.get(("trajectories", s))
            if not parts:
                continue
            off_run = merge_runs([r["result"] for r in parts], plan["n_parts"])
            off = T.trajectory_figures(sched, profile, model, off_run, p_ideal=p, p_cliques=pcs,
                                       switches=on.without(s))
            M.budget_from_source_off(out, off, s)
        M.budget_readout_from_run(out, sched, profile, model, run, p, pcs)
    return out


def _merge_clifford(plan, by, t) -> dict[str, Any]:
    from toposcout.compiler.clifford import budget_from_figures, figures_from_tally

    def figures(off):
        parts = by.get(("clifford", off))
        if not parts:
            raise ToposcoutError("every clifford part of the row failed", field="parts")
        total = parts[0]["result"]
        for r in parts[1:]:
            total = total + r["result"]
        return figures_from_tally(total, 0.05)

    out = figures(None)
    if t.get("error_budget", True):
        out.update(budget_from_figures(out, {s: figures(s) for s in _BUDGET}))
    return out


def run_split(task: Mapping[str, Any], parts: int, *, map_parts=None) -> dict[str, Any]:
    """Plan, run the parts with ``map_parts(run_part, parts)`` (default: one after the other,
    in this process) and merge: the row of ``task`` computed in ``parts`` parts."""
    plan = plan_row(task, parts)
    if not plan["parts"]:
        return plan["row"]
    mapper = map_parts or (lambda f, xs: [f(x) for x in xs])
    return merge_parts(plan, list(mapper(run_part, plan["parts"])))
