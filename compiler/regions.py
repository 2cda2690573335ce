"""Where on a chip a circuit goes: error-aware placement, the regions of a chip, calibration drift.

* **Placement objective** (task field ``placement``): ``count`` compiles for the fewest
  two-qubit gates (qiskit's layout by connectivity alone; our placement by Steiner cost);
  ``errors`` compiles for the highest estimated success probability under the profile's
  per-qubit and per-coupler figures (:func:`toposcout.compiler.compile.placement_weights`,
  :func:`toposcout.compiler.compile.error_properties`). The default is ``errors`` when the
  profile has per-element figures (a device file, or a profile with ``[[qubit]]`` / ``[[edge]]``
  overrides) and ``count`` otherwise. When the figures differ per element the row carries the
  ESP of *both* placements (``esp_count_placement``, ``esp_error_placement``), so what placement
  bought is visible.
* **Regions** (task fields ``regions`` = K, ``region_rank`` = r): K placements spread over the
  chip (:func:`toposcout.compiler.synthesis.placement.region_placements`), each compiled with
  the task's strategy and ranked by ESP; the row is the r-th best, with the best, median and
  worst region's ESP and qubits.
* **Drift** (``jitter`` = sigma, ``jitter_samples`` = N): every error rate and coherence time
  of the profile is redrawn N times log-normally, x exp(sigma z) with z standard normal
  (T2 clipped at 2 T1, errors at their maxima), and the ESP of the row's compiled circuit
  recomputed: median and 10th / 90th percentile.
"""

from __future__ import annotations

import json
import math
import random
from collections import OrderedDict
from typing import Any, Mapping

from toposcout.compiler.ansatz import build_ansatz
from toposcout.compiler.compile import PLACEMENTS, compile_ansatz, placement_weights
from toposcout.compiler.devices import Device, parse_device
from toposcout.compiler.errors import ModelError
from toposcout.compiler.metrics import esp
from toposcout.compiler.model import parse_model
from toposcout.compiler.noise import operation_errors, schedule
from toposcout.compiler.profiles import DeviceProfile, max_infidelity
from toposcout.compiler.synthesis.placement import region_placements
from toposcout.compiler.targets import get_gate_set, make_connectivity

__all__ = ["MAX_REGIONS", "MAX_JITTER_SAMPLES", "check_placement_options", "resolve_placement", "has_per_element",
           "compiled_esp", "placed_compilation", "jittered_profile", "jitter_figures", "random_device",
           "random_chain_model", "placement_gain"]

MAX_REGIONS = 200
MAX_JITTER_SAMPLES = 2000


def check_placement_options(t: Mapping[str, Any]) -> None:
    """Raise ModelError naming the field for a bad placement, regions or jitter option."""
    p = t.get("placement")
    if p is not None and p not in PLACEMENTS:
        raise ModelError(f"placement must be one of {', '.join(PLACEMENTS)}, got {p!r}", field="placement")
    k = t.get("regions")
    if k is not None and (not isinstance(k, int) or isinstance(k, bool) or not 1 <= k <= MAX_REGIONS):
        raise ModelError(f"regions must be an integer from 1 to {MAX_REGIONS}, got {k!r}", field="regions")
    r = t.get("region_rank", 0)
    if not isinstance(r, int) or isinstance(r, bool) or r < 0 or (k is not None and r >= k):
        raise ModelError(f"region_rank must be an integer from 0 to regions - 1, got {r!r}", field="region_rank")
    s = t.get("jitter")
    if s is not None and (isinstance(s, bool) or not isinstance(s, (int, float)) or not math.isfinite(s)
                          or not 0 <= s <= 3):
        raise ModelError(f"jitter (the log-normal sigma) must be a number from 0 to 3, got {s!r}", field="jitter")
    n = t.get("jitter_samples", 100)
    if not isinstance(n, int) or isinstance(n, bool) or not 2 <= n <= MAX_JITTER_SAMPLES:
        raise ModelError(f"jitter_samples must be an integer from 2 to {MAX_JITTER_SAMPLES}, got {n!r}",
                         field="jitter_samples")


def has_per_element(profile: DeviceProfile) -> bool:
    """True when some qubit or coupler has figures of its own."""
    return bool(profile.qubit_overrides or profile.edge_overrides)


def resolve_placement(requested: str | None, profile: DeviceProfile) -> str:
    """The placement objective of a row: the requested one, else ``errors`` when the profile has
    per-element figures and ``count`` otherwise."""
    if requested is not None:
        return requested
    return "errors" if has_per_element(profile) else "count"


def compiled_esp(compiled, profile: DeviceProfile) -> float:
    """The row's ESP of a compiled circuit (scheduled with the profile's durations)."""
    return esp(operation_errors(schedule(compiled, profile), profile))


def _compile(ansatz, conn, gate_set, t, profile, objective, placements=None):
    return compile_ansatz(ansatz, conn, gate_set, strategy=t["strategy"], seeds=t["seeds"],
                          profile=profile if objective == "errors" else None, placements=placements)


#: the ranked regions of the last region searches in this process (every rank's task of a
#: study recomputes the same deterministic list; this memo makes that once per process).
_REGIONS: "OrderedDict[str, list]" = OrderedDict()


def _ranked_regions(ansatz, conn, gate_set, t, profile, objective) -> list[tuple[float, Any, list[int]]]:
    key = json.dumps({"model": ansatz.model.to_dict(), "family": t["family"], "layers": t["layers"],
                      "seed": t["seed"], "connectivity": conn.to_dict(), "gate_set": gate_set.name,
                      "coupler_gates": [[list(p), g] for p, g in gate_set.couplers],
                      "strategy": t["strategy"], "seeds": t["seeds"], "profile": profile.to_dict(),
                      "objective": objective, "regions": t["regions"]}, sort_keys=True, default=str)
    if key in _REGIONS:
        _REGIONS.move_to_end(key)
        return _REGIONS[key]
    supports = [tuple(s) for s, _ in ansatz.layer_terms(0)] if ansatz.layers else []
    graph = conn.graph()
    weights = placement_weights(profile, conn) if objective == "errors" else None
    import networkx as nx

    if not nx.is_connected(graph):
        graph = graph.subgraph(max(nx.connected_components(graph), key=len)).copy()
    cands = region_placements(supports, graph, ansatz.num_qubits, t["regions"], weights=weights, seed=t["seed"])
    ranked = []
    for p in cands:
        c = _compile(ansatz, conn, gate_set, t, profile, objective, placements=[p])
        qubits = sorted({conn_q for conn_q in _active(c)})
        ranked.append((compiled_esp(c, profile), c, qubits))
    ranked.sort(key=lambda x: (-x[0], x[2]))
    _REGIONS[key] = ranked
    while len(_REGIONS) > 4:
        _REGIONS.popitem(last=False)
    return ranked


def _active(compiled) -> list[int]:
    c = compiled.circuit
    return sorted({c.find_bit(q).index for ins in c.data if ins.operation.name not in ("delay", "barrier")
                   for q in ins.qubits})


def placed_compilation(ansatz, conn, gate_set, t: Mapping[str, Any], profile: DeviceProfile) -> tuple[Any, dict]:
    """The row's compiled circuit under its placement objective (and region), with the
    placement fields of the row (see the module docstring)."""
    objective = resolve_placement(t.get("placement"), profile)
    fields: dict[str, Any] = {"placement_objective": objective}
    if t.get("regions"):
        ranked = _ranked_regions(ansatz, conn, gate_set, t, profile, objective)
        r = min(int(t.get("region_rank") or 0), len(ranked) - 1)
        k = len(ranked)
        med = ranked[(k - 1) // 2]
        fields.update(chip_regions=k, chip_region_rank=r, chip_region=ranked[r][2], chip_region_esp=ranked[r][0],
                      chip_region_esp_best=ranked[0][0], chip_region_esp_median=med[0],
                      chip_region_esp_worst=ranked[-1][0], chip_region_best=ranked[0][2],
                      chip_region_median=med[2], chip_region_worst=ranked[-1][2])
        return ranked[r][1], fields
    compiled = _compile(ansatz, conn, gate_set, t, profile, objective)
    if has_per_element(profile):
        other = _compile(ansatz, conn, gate_set, t, profile, "count" if objective == "errors" else "errors")
        mine, theirs = compiled_esp(compiled, profile), compiled_esp(other, profile)
        e_err, e_cnt = (mine, theirs) if objective == "errors" else (theirs, mine)
        fields.update(esp_error_placement=e_err, esp_count_placement=e_cnt,
                      placement_esp_gain=(e_err / e_cnt) if e_cnt > 0 else None)
    return compiled, fields


def jittered_profile(profile: DeviceProfile, sigma: float, rng: random.Random, qubits, edges) -> DeviceProfile:
    """The profile with every error rate and coherence time of ``qubits`` and ``edges`` redrawn
    x exp(sigma z) (independent standard normal z per figure) around the file's (unscaled)
    values; T2 clipped at 2 T1, errors at their physical maxima; durations kept. The noise
    scale is applied afterwards as always."""
    from dataclasses import replace

    if profile.noise_scale == 0:
        return profile
    f = lambda: math.exp(sigma * rng.gauss(0.0, 1.0))  # noqa: E731
    qov = []
    for q in qubits:
        raw = profile._qubit_raw(q)
        t1 = raw["t1_us"] * f()
        vals = {"t1_us": t1, "t2_us": min(raw["t2_us"] * f(), 2 * t1),
                "one_qubit_error": min(raw["one_qubit_error"] * f(), max_infidelity(1)),
                "p1_given_0": min(raw["p1_given_0"] * f(), 1.0), "p0_given_1": min(raw["p0_given_1"] * f(), 1.0),
                "one_qubit_ns": raw["one_qubit_ns"]}
        qov.append((q, tuple(sorted(vals.items()))))
    eov = []
    for a, b in edges:
        e = profile.edge(a, b)
        raw_e = e.two_qubit_error / profile.noise_scale
        eov.append(((min(a, b), max(a, b)), tuple(sorted({
            "two_qubit_error": min(raw_e * f(), max_infidelity(2)), "two_qubit_ns": e.two_qubit_ns}.items()))))
    keep_q = tuple(o for o in profile.qubit_overrides if o[0] not in set(qubits))
    keep_e = tuple(o for o in profile.edge_overrides if o[0] not in {(min(a, b), max(a, b)) for a, b in edges})
    return replace(profile, qubit_overrides=tuple(sorted(keep_q + tuple(qov))),
                   edge_overrides=tuple(sorted(keep_e + tuple(eov))))


def jitter_figures(compiled, profile: DeviceProfile, sigma: float, samples: int, seed: int = 0) -> dict:
    """Median and 10th / 90th percentile of the ESP of ``compiled`` over ``samples`` log-normal
    redraws of the figures (see :func:`jittered_profile`); the schedule is computed once
    (durations are not redrawn)."""
    import numpy as np

    sched = schedule(compiled, profile)
    qubits = list(sched.physical_qubits)
    used = set(qubits)
    edges = [(a, b) for a, b in compiled.connectivity.edges if a in used and b in used]
    rng = random.Random(seed)
    vals = [esp(operation_errors(sched, jittered_profile(profile, sigma, rng, qubits, edges)))
            for _ in range(samples)]
    q10, q50, q90 = np.percentile(vals, [10, 50, 90])
    return {"jitter_sigma": float(sigma), "jitter_samples": int(samples), "esp_jitter_median": float(q50),
            "esp_jitter_p10": float(q10), "esp_jitter_p90": float(q90)}


# --- what error-aware placement buys, on invented random chips ---------------------------------------
def random_device(rng: random.Random) -> Device:
    """A small invented chip (grid, ring, line or heavy-hex) with a log-normal-ish calibration
    table and a few outliers (about one qubit in ten with a short T1 or a poor readout, one
    coupler in ten 8x worse): the seeded cases of :func:`placement_gain`. Typical values from
    memory, no real device."""
    fam, size = rng.choice([("grid", "3x3"), ("grid", "3x4"), ("ring", "8"), ("line", "7"), ("heavy-hex", "3")])
    conn = make_connectivity(fam, 1, size=size)
    qubits = []
    for q in range(conn.num_qubits):
        t1 = 120 * math.exp(rng.gauss(0, 0.4)) * (0.15 if rng.random() < 0.1 else 1)
        qubits.append({"index": q, "t1_us": t1, "t2_us": min(t1 * 0.8 * math.exp(rng.gauss(0, 0.3)), 1.9 * t1),
                       "one_qubit_error": min(3e-4 * math.exp(rng.gauss(0, 0.5)), 0.1),
                       "p1_given_0": min(0.012 * math.exp(rng.gauss(0, 0.6)), 0.4),
                       "p0_given_1": min(0.025 * math.exp(rng.gauss(0, 0.6)) * (5 if rng.random() < 0.1 else 1), 0.5)})
    couplers = [{"qubits": list(e), "two_qubit_error": min(8e-3 * math.exp(rng.gauss(0, 0.5))
                                                           * (8 if rng.random() < 0.1 else 1), 0.3)}
                for e in conn.edges]
    return parse_device({"name": "random", "qubits": conn.num_qubits, "edges": [list(e) for e in conn.edges],
                         "base": "superconducting", "defaults": {"two_qubit_error": 0.005},
                         "coupler": couplers, "qubit": qubits})


def random_chain_model(rng: random.Random) -> dict:
    """3-5 variables in a chain of pairs, half the time with one extra triple."""
    n = rng.randint(3, 5)
    v = [f"x{i}" for i in range(n)]
    cliques = [[v[i], v[i + 1]] for i in range(n - 1)]
    if rng.random() < 0.5:
        cliques.append(rng.sample(v, 3))
    return {"variables": v, "cliques": cliques}


def placement_gain(cases: int = 32, seed: int = 2026) -> list[tuple[str, float]]:
    """(strategy, ESP(error-aware) / ESP(count-only)) for ``cases`` seeded random devices and
    models (:func:`random_device`, :func:`random_chain_model`), the strategies alternating
    structured, generic."""
    rng = random.Random(seed)
    cx = get_gate_set("cx")
    out = []
    for k in range(cases):
        dev = random_device(rng)
        ansatz = build_ansatz(parse_model(random_chain_model(rng)))
        strategy = ("structured", "generic")[k % 2]
        aware = compile_ansatz(ansatz, dev.connectivity, cx, strategy=strategy, seeds=1, profile=dev.profile)
        count = compile_ansatz(ansatz, dev.connectivity, cx, strategy=strategy, seeds=1)
        out.append((strategy, compiled_esp(aware, dev.profile) / compiled_esp(count, dev.profile)))
    return out
