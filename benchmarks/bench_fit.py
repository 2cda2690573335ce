"""Fit speed: the exact evaluator against qiskit's Statevector, and whole fits at 12 and 20 variables.

Prints numbers (no pass/fail):

* evaluations per second at 12 and 20 variables: the evaluator's distribution, its loss + gradient,
  and ``qiskit.quantum_info.Statevector`` of the same (logical) circuit;
* a 12-variable model, 3 restarts, KL loss (target: under 30 s);
* a 20-variable model, 1 restart, KL loss (target: under 5 minutes).

The models are invented: a chain of overlapping triples x_i, x_{i+1}, x_{i+2} with seeded random
positive factor tables (clique family: 7 terms per triple, de-duplicated).

    .venv/bin/python benchmarks/bench_fit.py [--quick] [--max-iter-20 N]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from qiskit.quantum_info import Statevector

from toposcout.compiler.ansatz import build_ansatz
from toposcout.compiler.fit import Evaluator, KLLoss, _one_blas_thread, fit_model
from toposcout.compiler.model import parse_model, target_distribution


def triple_chain(n: int, seed: int = 0):
    v = [f"x{i}" for i in range(n)]
    rng = np.random.default_rng(seed)
    cliques = [v[i:i + 3] for i in range(n - 2)]
    factors = [{"scope": c, "values": [float(x) for x in rng.uniform(0.3, 3.0, size=8)]} for c in cliques]
    return parse_model({"name": f"triple-chain-{n}", "variables": v, "cliques": cliques, "factors": factors})


def per_second(fn, min_seconds: float = 2.0, max_calls: int = 200) -> float:
    fn()  # warm-up
    t0 = time.perf_counter()
    calls = 0
    while calls < max_calls and (calls == 0 or time.perf_counter() - t0 < min_seconds):
        fn()
        calls += 1
    return calls / (time.perf_counter() - t0)


def evaluations(n: int) -> dict:
    m = triple_chain(n)
    a = build_ansatz(m)
    ev = Evaluator(a)
    x = ev.initial()
    loss = KLLoss(target_distribution(m))
    qc = a.circuit(measure=False)
    with _one_blas_thread():
        ours = per_second(lambda: ev.probabilities(x))
        grad = per_second(lambda: ev.value_and_grad(x, loss))
    ref = per_second(lambda: Statevector(qc).probabilities(), min_seconds=2.0, max_calls=50)
    return {"n": n, "parameters": ev.size, "gates": qc.size(), "evaluator": ours, "value_and_grad": grad,
            "qiskit_statevector": ref}


def fit_once(n: int, restarts: int, max_iter: int) -> dict:
    m = triple_chain(n)
    t0 = time.perf_counter()
    r = fit_model(m, restarts=restarts, max_iter=max_iter, seed=0)
    return {"n": n, "restarts": restarts, "seconds": time.perf_counter() - t0, "kl": r.loss,
            "iterations": [x.iterations for x in r.restarts], "evaluations": [x.evaluations for x in r.restarts],
            "messages": [x.message for x in r.restarts]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="evaluations per second only")
    ap.add_argument("--max-iter-20", type=int, default=500, help="iteration cap of the 20-variable fit")
    args = ap.parse_args()
    print("evaluations per second (logical circuit, clique family, 1 layer)")
    print(f"{'vars':>5}{'params':>8}{'gates':>7}{'evaluator p':>14}{'value+grad':>12}{'qiskit Statevector':>20}"
          f"{'speed-up':>10}")
    for n in (12, 20):
        e = evaluations(n)
        print(f"{e['n']:>5}{e['parameters']:>8}{e['gates']:>7}{e['evaluator']:>14.1f}{e['value_and_grad']:>12.2f}"
              f"{e['qiskit_statevector']:>20.2f}{e['evaluator'] / e['qiskit_statevector']:>10.1f}")
    if args.quick:
        return
    for n, restarts, max_iter in ((12, 3, 500), (20, 1, args.max_iter_20)):
        f = fit_once(n, restarts, max_iter)
        print(f"fit {n} variables, {restarts} restart(s), KL: {f['seconds']:.1f} s, final KL {f['kl']:.4g} nats, "
              f"iterations {f['iterations']}, evaluations {f['evaluations']}, stop: {f['messages']}")


if __name__ == "__main__":
    main()
