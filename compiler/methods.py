"""Which simulation method computes a row's noise figures, what it costs, and the row itself.

Methods (``METHODS``; see README "Simulation methods"):

* ``density-matrix``: exact (``toposcout.compiler.metrics.noise_figures``), 16 * 4**n bytes for
  n active qubits; refused past the memory budget.
* ``trajectories``: Monte Carlo wave function (``toposcout.compiler.trajectories``), every
  figure with a standard error; statevector up to 26 active qubits, matrix product state
  beyond (or when a statevector does not fit the memory budget); from 16 active qubits also
  when a 2-trajectory MPS pilot (bond cap 16) says matrix product states are cheaper (weakly
  entangled circuits such as chains: 0.005 s per 20-qubit trajectory against 0.3-0.5 s).
* ``clifford``: the stabilizer estimate of the Clifford twin (``toposcout.compiler.clifford``),
  any size; an *estimate* of the state fidelity, labelled so.
* ``auto``: density-matrix within the memory budget, else trajectories when the cost model
  (:func:`trajectory_cost`) says they finish within the time budget, else clifford. The row
  records ``method`` and ``method_reason`` (with the estimates that decided).

A row never loses what was computed: when the noise figures cannot be computed (memory,
time budget, a forced method that cannot do the row, a simulator failure) the compile figures
stay and ``noise_error`` says why and which method would work at what estimated cost.

The cost model (calibrated on this 2-core machine with benchmarks/bench_scale.py, one run;
order of magnitude only): a statevector trajectory takes ``ops * (SV_PER_OP + SV_PER_OP_AMP *
2**n)`` seconds (ops: instructions of the scheduled circuit, delays included); an MPS
trajectory's cost depends on the entanglement reached, so it is measured on a pilot of
:data:`MPS_PILOT` trajectories at bond cap :data:`MPS_PILOT_BOND` before the run (scaled by
(256/16)^3 when the pilot reaches its cap); trajectories needed for a standard error SE
are ``F (1 - F) / SE**2`` with F estimated by the ESP (a trajectory's fidelity is close to 1
or to 0, so its variance is about F (1 - F)).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any, Mapping

from toposcout.compiler.errors import CapacityError, ModelError, ToposcoutError
from toposcout.compiler.metrics import clique_indices, esp, marginal, noise_figures, threshold_two_qubit_error
from toposcout.compiler.noise import SOURCES, NoiseSwitches, Scheduled, operation_errors, schedule
from toposcout.compiler.profiles import DeviceProfile
from toposcout.compiler.simulate import default_memory_budget_bytes, estimate_memory_bytes, simulate_ideal
from toposcout.compiler import trajectories as T
from toposcout.compiler.parity import EXACT_RANK

__all__ = [
    "METHODS",
    "DEFAULT_TIME_BUDGET_SECONDS",
    "SV_PER_OP",
    "SV_PER_OP_AMP",
    "CLIFFORD_PER_SHOT_OP",
    "clifford_estimate_seconds",
    "check_method_options",
    "trajectories_needed",
    "trajectory_cost",
    "Plan",
    "plan_method",
    "budget_from_source_off",
    "budget_readout_from_run",
    "plan_noise_row",
    "method_noise_row",
]

METHODS = ("auto", "density-matrix", "trajectories", "clifford")
#: default wall time the noise figures of one row may take (``--time-budget``).
DEFAULT_TIME_BUDGET_SECONDS = 300.0
#: statevector trajectory cost per instruction: fixed part and part per amplitude (s);
#: measured 12/16/20-qubit chains: 0.0097 / 0.053 / 0.40 s per trajectory (155/207/258 ops).
SV_PER_OP = 5.7e-5
SV_PER_OP_AMP = 1.4e-9
#: clifford estimate per shot and instruction (s): 4096 shots of 258 / 525 ops in 0.028 / 0.054 s.
CLIFFORD_PER_SHOT_OP = 2.6e-8
#: the clifford estimate's default shot cap (toposcout.compiler.clifford.clifford_figures).
CLIFFORD_MAX_SHOTS = 2_000_000
#: building the twin and its detector error model, per instruction (s): 0.35 s for 3307 ops.
CLIFFORD_TWIN_PER_OP = 1.1e-4
#: one weighted stabilizer average per instruction (s): 3-4 s for the 64-variable examples'
#: 3307 / 3453 ops at a relative s.e. of 5 %.
CLIFFORD_WEIGHTED_PER_OP = 1.1e-3
#: trajectories of the MPS pilot that measures the per-trajectory cost, and its bond cap.
MPS_PILOT = 2
MPS_PILOT_BOND = 16
#: from this many active qubits a row that fits a statevector also gets an MPS pilot, and runs
#: as matrix product states when that is estimated cheaper (weakly entangled circuits).
MPS_PREFERRED_FROM_QUBITS = 16


def check_method_options(method: Any, *, precision: Any = None, trajectories: Any = None,
                         time_budget_seconds: Any = None) -> None:
    """Raise ModelError naming the option for a bad method, precision, trajectory count or time budget."""
    if method not in METHODS:
        raise ModelError(f"unknown method {method!r}; choose one of {', '.join(METHODS)}", field="method")
    if precision is not None:
        if not _number(precision) or not 0 < precision < 1:
            raise ModelError(f"precision (the standard error of the state fidelity at which trajectories stop) "
                             f"must be a number in (0, 1), got {precision!r}; e.g. 0.01", field="precision")
    if trajectories is not None:
        if not isinstance(trajectories, int) or isinstance(trajectories, bool) or trajectories < 1 \
                or trajectories > T.MAX_TRAJECTORIES:
            raise ModelError(f"trajectories must be an integer from 1 to {T.MAX_TRAJECTORIES}, got {trajectories!r}",
                             field="trajectories")
    if precision is not None and trajectories is not None:
        raise ModelError("give either trajectories (a fixed count) or precision (stop at a standard error), "
                         "not both", field="precision")
    if time_budget_seconds is not None:
        if not _number(time_budget_seconds) or time_budget_seconds <= 0:
            raise ModelError(f"time_budget_seconds must be a number > 0, got {time_budget_seconds!r}",
                             field="time_budget_seconds")


def _number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def trajectories_needed(f_prior: float, precision: float) -> int:
    """Trajectories for a standard error ``precision`` when the fidelity is about ``f_prior``."""
    f = min(max(f_prior, 0.0), 1.0)
    return int(min(T.MAX_TRAJECTORIES, max(T.MIN_TRAJECTORIES, math.ceil(f * (1 - f) / precision**2))))


def trajectory_cost(n: int, ops: int) -> float:
    """Seconds of one statevector trajectory of ``n`` active qubits and ``ops`` instructions."""
    return ops * (SV_PER_OP + SV_PER_OP_AMP * 2.0**n)


@dataclass
class Plan:
    """The method chosen for a row, why, and what it was estimated to cost beforehand."""

    method: str | None
    reason: str
    trajectory_method: str | None = None
    trajectories: int | None = None
    estimate_seconds: float | None = None
    error: str | None = None   # set when no method can do the row
    error_field: str | None = None


def _gib(x: float) -> str:
    g = x / 2**30
    return f"{g:.2f} GiB" if g < 1e6 else f"{g:.2g} GiB"


def _duration(s: float) -> str:
    if s < 120:
        return f"{s:.3g} s"
    if s < 7200:
        return f"{s / 60:.3g} min"
    return f"{s / 3600:.3g} h"


def _clifford_available() -> bool:
    try:
        import toposcout.compiler.clifford  # noqa: F401
    except ImportError:
        return False
    return True


def clifford_estimate_seconds(variables: int, ops: int, f_prior: float) -> float:
    """Seconds of one clifford estimate (the estimator toposcout.compiler.clifford picks): the
    exact stabilizer average up to 20 variables (the span's rank is at most the variables'
    count); counted returns while rel. s.e. 5 % needs (1-F)/(F 0.05^2) shots within a quarter
    of the shot cap (F ~ ESP); else the weighted stabilizer average."""
    twin = ops * CLIFFORD_TWIN_PER_OP + 0.05
    if variables <= EXACT_RANK:
        return twin
    shots = max(4096, int(math.ceil((1 - f_prior) / max(f_prior, 1e-300) / 0.05**2)))
    if shots <= CLIFFORD_MAX_SHOTS / 4:
        return twin + shots * ops * CLIFFORD_PER_SHOT_OP
    return twin + ops * CLIFFORD_WEIGHTED_PER_OP


def plan_method(sched: Scheduled, profile: DeviceProfile, *, method: str = "auto", memory_budget_bytes: int,
                time_budget_seconds: float = DEFAULT_TIME_BUDGET_SECONDS, precision: float | None = None,
                trajectories: int | None = None, mps_pilot_seconds=None, parts: int = 1) -> Plan:
    """Choose the method of one row (see the module docstring). ``mps_pilot_seconds``: a
    callable returning the measured seconds of one MPS trajectory (called only when needed).
    ``parts``: the row's trajectories run on that many workers at once, so the time budget is
    held against the estimate divided by ``parts``."""
    n, k = sched.num_qubits, len(sched.measured)
    ops = len(sched.circuit.data)
    dm_bytes = estimate_memory_bytes(n, k)
    dm_ok = dm_bytes <= memory_budget_bytes
    dm_text = (f"density matrix of {n} active qubits needs about {_gib(dm_bytes)}, "
               f"{'within' if dm_ok else 'over'} the memory budget of {_gib(memory_budget_bytes)}")
    f_prior = esp(operation_errors(sched, profile))
    prec = precision if precision is not None else T.DEFAULT_PRECISION
    n_traj = trajectories if trajectories is not None else trajectories_needed(f_prior, prec)
    count_text = (f"{n_traj} trajectories" + ("" if trajectories is not None else
                                               f" for a standard error {prec:g} at F ~ ESP {f_prior:.3g}"))
    sv_fits = n <= T.STATEVECTOR_MAX_QUBITS and \
        T.statevector_batch_bytes(n, 1) + 16 * 2**n <= memory_budget_bytes
    traj_method = "statevector" if sv_fits else "matrix_product_state"
    traj_est: float | None = None
    # saving the variables' 2^k probabilities costs about two statevector trajectories
    # (measured on a 20-variable chain: 0.69 s against 0.29 s), for the trajectories that save it
    dist_cap = T.distribution_cap(k)
    dist_n = 0 if k > T.DISTRIBUTION_MAX_VARIABLES else n_traj if dist_cap is None else min(n_traj, dist_cap)
    mps_dist_seconds = dist_n * 2 * trajectory_cost(n, ops)

    def traj_estimate() -> float:
        nonlocal traj_est
        if traj_est is None:
            if traj_method == "statevector":
                traj_est = trajectory_cost(n, ops) * n_traj
            else:
                per = mps_pilot_seconds() if mps_pilot_seconds is not None else math.inf
                traj_est = per * n_traj + mps_dist_seconds
        return traj_est

    if (sv_fits and n >= MPS_PREFERRED_FROM_QUBITS and mps_pilot_seconds is not None
            and (method == "trajectories" or (method == "auto" and not dm_ok))):
        # a weakly entangled circuit (the pilot's bond stayed below its cap) runs far cheaper as
        # matrix product states: a 20-variable chain 0.005 s per trajectory against 0.3-0.5 s
        mps_total = mps_pilot_seconds() * n_traj + mps_dist_seconds
        if mps_total < trajectory_cost(n, ops) * n_traj:
            traj_method, traj_est = "matrix_product_state", mps_total

    def traj_text() -> str:
        on = "" if parts == 1 else f" ({_duration(traj_estimate() / parts)} on {parts} workers)"
        return (f"trajectories ({traj_method}, {count_text}) estimated at {_duration(traj_estimate())}{on} "
                f"against the time budget of {_duration(time_budget_seconds)}")

    cliff_est = clifford_estimate_seconds(k, ops, f_prior)
    cliff_text = (f"clifford (a stabilizer estimate of the state fidelity only) estimated at {_duration(cliff_est)}"
                  if _clifford_available() else "clifford is not installed here (needs toposcout.compiler.clifford "
                                                "and stim)")
    if method == "density-matrix":
        if dm_ok:
            return Plan("density-matrix", f"forced: {dm_text}", estimate_seconds=None)
        return Plan(None, "forced density-matrix cannot do this row",
                    error=f"--method density-matrix: the {dm_text}. Use --method trajectories ({traj_text()}), "
                          f"--method clifford ({cliff_text}) or --method auto; or raise --memory-budget",
                    error_field="method")
    if method == "trajectories":
        est = traj_estimate()
        if est / parts <= time_budget_seconds:
            return Plan("trajectories", f"forced: {traj_text()}", traj_method, n_traj, est)
        return Plan(None, "forced trajectories cannot do this row",
                    error=f"--method trajectories: {traj_text()}. Raise --time-budget to about "
                          f"{_duration(est * 1.2)}, ask for fewer trajectories (--precision or --trajectories), "
                          f"or use --method clifford ({cliff_text})" + ("" if not dm_ok else
                                                                          f" or --method density-matrix ({dm_text})"),
                    error_field="time_budget_seconds")
    if method == "clifford":
        if _clifford_available():
            return Plan("clifford", f"forced: {cliff_text}", estimate_seconds=cliff_est)
        return Plan(None, "clifford unavailable", error=f"--method clifford: {cliff_text}; use --method auto",
                    error_field="method")
    # auto
    if dm_ok:
        return Plan("density-matrix", f"auto: {dm_text}")
    est = traj_estimate()
    if est / parts <= time_budget_seconds:
        return Plan("trajectories", f"auto: {dm_text}; {traj_text()}", traj_method, n_traj, est)
    if _clifford_available():
        return Plan("clifford", f"auto: {dm_text}; {traj_text()}; so {cliff_text}", estimate_seconds=cliff_est)
    return Plan(None, "no method fits", error=f"no method fits this row: the {dm_text}; {traj_text()}; "
                                             f"{cliff_text}. Raise --time-budget or --memory-budget",
                error_field="time_budget_seconds")


def _base_figures(sched: Scheduled, profile: DeviceProfile) -> dict[str, Any]:
    errs = operation_errors(sched, profile)
    return {"profile": profile.name, "noise_scale": profile.noise_scale, "simulated_qubits": sched.num_qubits,
            "duration_us": sched.duration_us, "esp": esp(errs), **{f"esp_{s}": esp({s: errs[s]}) for s in SOURCES}}


def _ideal_for_trajectories(sched: Scheduled, model, traj_method: str, threads: int):
    """(ideal amplitudes or None, ideal MPS or None, ideal distribution or None, clique marginals)."""
    cliques = clique_indices(model)
    k = len(sched.measured)
    if traj_method == "statevector":
        ideal = simulate_ideal(sched, max_parallel_threads=threads)
        p = ideal.probabilities / ideal.probabilities.sum()
        return ideal.amplitudes, None, (p if k <= T.DISTRIBUTION_MAX_VARIABLES else None), \
            [marginal(p, c) for c in cliques]
    mps = T._ideal_mps(sched, threads)
    p, pcs = T._ideal_probabilities(sched, cliques, k, threads)
    return None, mps, p, pcs


def _trajectory_row(sched, profile, ansatz, plan: Plan, t: Mapping[str, Any], budget: int, threads: int,
                    started: float, time_budget: float) -> dict[str, Any]:
    model = ansatz.model
    cliques = clique_indices(model)
    amps, mps, p, pcs = _ideal_for_trajectories(sched, model, plan.trajectory_method, threads)
    kw = dict(ideal_amplitudes=amps, ideal_mps=mps, memory_budget_bytes=budget, seed=int(t.get("seed") or 0),
              max_parallel_threads=threads, method=plan.trajectory_method)
    left = time_budget - (time.perf_counter() - started)
    run = T.run_trajectories(sched, profile, cliques, n_trajectories=t.get("trajectories"),
                             precision=t.get("precision"), time_budget_seconds=max(left, 1e-3), **kw)
    out = T.trajectory_figures(sched, profile, model, run, p_ideal=p, p_cliques=pcs)
    for s in SOURCES:
        out[f"budget_{s}"] = None
    for s in SOURCES[:3]:
        out[f"budget_state_{s}"] = None
    if t.get("error_budget", True):
        left = time_budget - (time.perf_counter() - started)
        if run.seconds * 3 > left:
            out["error_budget_note"] = (f"error budget skipped: three more runs of {run.n} trajectories "
                                        f"(about {_duration(run.seconds * 3)}) exceed the time left "
                                        f"({_duration(max(left, 0))}); raise --time-budget")
        else:
            errs = operation_errors(sched, profile)
            on = NoiseSwitches()
            for s in SOURCES[:3]:
                if not errs[s] or profile.noise_scale == 0:
                    out[f"budget_{s}"] = out[f"budget_state_{s}"] = 0.0
                    continue
                off_run = T.run_trajectories(sched, profile, cliques, on.without(s), n_trajectories=run.n, **kw)
                off = T.trajectory_figures(sched, profile, model, off_run, p_ideal=p, p_cliques=pcs,
                                           switches=on.without(s))
                budget_from_source_off(out, off, s)
            budget_readout_from_run(out, sched, profile, model, run, p, pcs)
    return out


def budget_from_source_off(out: dict[str, Any], off: Mapping[str, Any], source: str) -> None:
    """The budget fields of one noise source from the trajectories run with it switched off."""
    out[f"budget_state_{source}"] = off["state_fidelity"] - out["state_fidelity"]
    out[f"budget_state_{source}_se"] = math.hypot(off["state_fidelity_se"] or 0, out["state_fidelity_se"] or 0)
    if out["hellinger_fidelity"] is not None:
        out[f"budget_{source}"] = off["hellinger_fidelity"] - out["hellinger_fidelity"]


def budget_readout_from_run(out: dict[str, Any], sched, profile, model, run, p, pcs) -> None:
    """The readout budget: the same trajectories read without readout error (readout is applied
    exactly to the averaged distributions, so no second run is needed)."""
    if out["hellinger_fidelity"] is not None:
        nr = T.trajectory_figures(sched, profile, model, run, p_ideal=p, p_cliques=pcs,
                                  switches=NoiseSwitches().without("readout"))
        out["budget_readout"] = nr["hellinger_fidelity"] - out["hellinger_fidelity"]


def _clifford_row(sched, profile, t: Mapping[str, Any]) -> dict[str, Any]:
    from toposcout.compiler.clifford import clifford_budget, clifford_figures

    seed = int(t.get("seed") or 0)
    out = clifford_figures(sched, profile, seed=seed)
    if t.get("error_budget", True):
        out.update(clifford_budget(sched, profile, seed=seed, base=out))
    return out


def plan_noise_row(out: dict[str, Any], compiled, ansatz, profile: DeviceProfile, t: Mapping[str, Any], *,
                   max_parallel_threads: int = 0, parts: int = 1) -> tuple[Scheduled, Plan]:
    """The head of :func:`method_noise_row`: schedule, the cheap figures and the method plan,
    written into ``out`` as they are computed (so a ToposcoutError raised here leaves them
    there). Also used by ``toposcout.compiler.parts`` to plan a row split across workers."""
    budget = _memory_budget(t)
    time_budget = _time_budget(t)
    method = t.get("method") or "auto"
    out.update({"method_requested": method, "method": None, "method_reason": None,
                "noise_error": None, "noise_error_field": None, "profile": profile.name})
    sched = schedule(compiled, profile)
    out.update(_base_figures(sched, profile))

    def pilot() -> float:
        # a few trajectories at a low bond cap: if the bond stays below the cap the real run
        # costs the same; if it reaches the cap, the cost is scaled by (cap ratio)^3 (MPS
        # gates cost ~ chi^3), an estimate the row states
        cliques = clique_indices(ansatz.model)
        run = T.run_trajectories(sched, profile, cliques, n_trajectories=MPS_PILOT, method="matrix_product_state",
                                 max_parallel_threads=max_parallel_threads, max_bond=MPS_PILOT_BOND,
                                 distribution_trajectories=0)  # the full distribution is estimated apart
        per = run.seconds / max(run.n, 1)
        if (run.bond_reached or 0) >= MPS_PILOT_BOND:
            per *= (T.MPS_MAX_BOND / MPS_PILOT_BOND) ** 3
        return per

    plan = plan_method(sched, profile, method=method, memory_budget_bytes=budget, time_budget_seconds=time_budget,
                       precision=t.get("precision"), trajectories=t.get("trajectories"), mps_pilot_seconds=pilot,
                       parts=parts)
    out.update(method=plan.method, method_reason=plan.reason,
               time_estimate_seconds=None if plan.estimate_seconds is None else round(plan.estimate_seconds, 3))
    if plan.error:
        out.update(noise_error=plan.error, noise_error_field=plan.error_field)
    return sched, plan


def _memory_budget(t: Mapping[str, Any]) -> int:
    return default_memory_budget_bytes() if t.get("memory_budget_bytes") is None else int(t["memory_budget_bytes"])


def _time_budget(t: Mapping[str, Any]) -> float:
    return float(t.get("time_budget_seconds") or DEFAULT_TIME_BUDGET_SECONDS)


def method_noise_row(compiled, ansatz, profile: DeviceProfile, t: Mapping[str, Any], *,
                     max_parallel_threads: int = 0) -> dict[str, Any]:
    """The noise part of one row under the task's method options (never raises a
    ToposcoutError: a failure becomes ``noise_error`` and ``noise_error_field``, keeping the
    figures already computed)."""
    started = time.perf_counter()
    budget = _memory_budget(t)
    time_budget = _time_budget(t)
    out: dict[str, Any] = {"method_requested": t.get("method") or "auto", "method": None, "method_reason": None,
                           "noise_error": None, "noise_error_field": None, "profile": profile.name}
    try:
        sched, plan = plan_noise_row(out, compiled, ansatz, profile, t, max_parallel_threads=max_parallel_threads)
        if plan.error:
            return out
        if plan.method == "density-matrix":
            out.update(noise_figures(compiled, ansatz, profile, memory_budget_bytes=budget,
                                     error_budget=t.get("error_budget", True),
                                     max_parallel_threads=max_parallel_threads))
        elif plan.method == "trajectories":
            out.update(_trajectory_row(sched, profile, ansatz, plan, t, budget, max_parallel_threads,
                                       started, time_budget))
        else:
            out.update(_clifford_row(sched, profile, t))
        if t.get("fidelity_target") is not None:
            out.update(_threshold(compiled, ansatz, sched, profile, t, budget, max_parallel_threads))
    except ToposcoutError as exc:
        out["noise_error"] = _advice(exc, out)
        out["noise_error_field"] = exc.field
    return out


def _advice(exc: ToposcoutError, out: Mapping[str, Any]) -> str:
    msg = str(exc)
    m = out.get("method")
    if isinstance(exc, CapacityError) and m == "density-matrix":
        return f"{msg}. Try --method trajectories or --method clifford"
    if isinstance(exc, CapacityError) and m == "trajectories":
        return f"{msg}. Try --method clifford, or raise --memory-budget"
    return msg


def _threshold(compiled, ansatz, sched, profile, t, budget, threads) -> dict[str, Any]:
    """The fidelity-target requirement: exact bisection within the memory budget, else the
    bisection on the clifford estimate (``threshold_method`` says which)."""
    n, k = sched.num_qubits, len(sched.measured)
    if estimate_memory_bytes(n, k) <= budget:
        r = threshold_two_qubit_error(compiled, ansatz, profile, fidelity_target=t["fidelity_target"],
                                      rel_tol=_tolerance(t), memory_budget_bytes=budget, max_parallel_threads=threads)
        r["threshold_method"] = "density-matrix"
        return r
    if not _clifford_available():
        raise CapacityError("the fidelity-target requirement needs the density matrix (over the memory budget) "
                            "or the clifford estimate (not installed)", field="fidelity_target")
    from toposcout.compiler.clifford import clifford_threshold

    return clifford_threshold(compiled, profile, fidelity_target=t["fidelity_target"], rel_tol=_tolerance(t),
                              seed=int(t.get("seed") or 0))


def _tolerance(t: Mapping[str, Any]) -> float:
    from toposcout.compiler.options import DEFAULT_REQUIREMENT_TOLERANCE

    tol = t.get("requirement_tolerance")
    return DEFAULT_REQUIREMENT_TOLERANCE if tol is None else float(tol)
