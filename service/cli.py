"""The ``toposcout`` command line.

``main(argv) -> int`` is a function of its argument list, so tests call it directly.
Every error a user can cause ends in a one-paragraph message on stderr and a non-zero
exit code (2 for bad input), never a traceback.
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
from pathlib import Path
from typing import Any, Sequence

from compiler.errors import ToposcoutError

EXIT_OK, EXIT_FAILED_ROWS, EXIT_BAD_INPUT = 0, 1, 2

CAUTION = ("Figures are a simulation under the stated noise model, not a promise about a device.")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse's own errors: message + exit 2, no traceback
        self.print_usage(sys.stderr)
        raise SystemExit(f"toposcout: error: {message}")


def _parser() -> argparse.ArgumentParser:
    from compiler.targets import BUILTIN_FAMILIES, GATE_SETS

    p = _Parser(prog="toposcout", description="Where does a graph-structured circuit fit, and what survives noise?")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    c = sub.add_parser("compare", help="compile (and simulate) a model on several connectivities")
    c.add_argument("model", help="model file: our JSON format, UAI (.uai) or networkx node-link JSON")
    c.add_argument("--connectivity", "-c", action="append", metavar="NAME[:SIZE]",
                   help=f"repeatable; one of {', '.join(BUILTIN_FAMILIES)}, or custom:EDGEFILE; "
                        f"default: all built-in families")
    c.add_argument("--gate-set", default="cx", choices=GATE_SETS, help="native gate set (default cx)")
    c.add_argument("--strategy", default="auto", choices=("generic", "structured", "auto"),
                   help="compilation strategy (default auto: the better of generic and structured)")
    c.add_argument("--seeds", type=int, default=5, help="transpiler seeds tried by generic (default 5)")
    c.add_argument("--family", default="clique", choices=("clique", "pairwise"), help="circuit family")
    c.add_argument("--layers", type=int, default=1, help="repetitions of block + rotations (default 1)")
    c.add_argument("--seed", type=int, default=0, help="seed of the random angles (default 0)")
    c.add_argument("--max-order", type=int, help="keep only terms of at most this order")
    c.add_argument("--profile", help="device profile name or TOML file (default: the superconducting-like class)")
    c.add_argument("--noise-scale", type=float, action="append", metavar="X",
                   help="multiply every error rate by X; repeat for a sweep (default 1)")
    c.add_argument("--fidelity-target", type=float, default=None,
                   help="with a sweep, find the largest 2q error reaching this state fidelity (default 0.5)")
    c.add_argument("--compile-only", action="store_true", help="skip the noise simulation")
    c.add_argument("--memory-budget", type=float, metavar="GIB", help="refuse simulations needing more (GiB)")
    c.add_argument("--max-variables", type=int, default=128, help="cap on the model's variables (default 128)")
    c.add_argument("--json", action="store_true", help="print rows as JSON instead of a table")
    c.add_argument("--csv", metavar="FILE", help="also write the rows as CSV")
    c.add_argument("--qasm-dir", metavar="DIR", help="write one .qasm (OpenQASM 3) and one .qpy per connectivity")
    c.add_argument("--workers", type=int, default=None, help="local worker processes (default: cores, at most 2)")
    c.add_argument("--server", metavar="URL", help="run the study on a toposcout server instead")
    c.add_argument("--token", help="bearer token for --server (default: $TOPOSCOUT_TOKEN)")

    sub.add_parser("targets", help="list connectivities, gate sets and device profiles")

    from service.bench import add_arguments as _bench_arguments

    _bench_arguments(sub.add_parser("bench", help="structured vs generic compilation on a fixed suite of models"))

    sv = sub.add_parser("serve", help="run the REST API server (settings from TOPOSCOUT_* variables)")
    sv.add_argument("--host", default=None, help="address to listen on (default 127.0.0.1)")
    sv.add_argument("--port", type=int, default=None, help="port (default 8000)")
    sv.add_argument("--allow-remote", action="store_true", default=None,
                    help="listen on a non-loopback address without tokens configured")

    w = sub.add_parser("worker", help="start Dask worker processes for a toposcout cluster")
    w.add_argument("scheduler", help="the Dask scheduler, e.g. tcp://host:8786")
    w.add_argument("--nworkers", type=int, default=1, help="worker processes, one task at a time each (default 1)")
    w.add_argument("--memory-limit", default="4GiB", help="memory limit per process, e.g. 4GiB (default 4GiB)")
    w.add_argument("--threads", type=int, default=None,
                   help="simulator (OpenMP) threads per process (default: cores / nworkers)")
    w.add_argument("--host", default=None, help="address to listen on (default: the scheduler's route)")
    w.add_argument("--name", default=None, help="worker name shown by the scheduler")
    return p


def _rows_table(rows: list[dict]) -> str:
    cols = [("connectivity", "connectivity"), ("strategy", "strategy"), ("phys", "physical_qubits"),
            ("active", "active_qubits"), ("2q", "two_qubit_gates"), ("swaps", "swaps"), ("depth", "depth"),
            ("2q-depth", "two_qubit_depth"), ("1q", "one_qubit_gates"), ("compile s", "compile_seconds")]
    if any("state_fidelity" in r for r in rows):
        cols += [("scale", "noise_scale"), ("F state", "state_fidelity"), ("F hell", "hellinger_fidelity"),
                 ("TVD", "tvd"), ("KL", "kl_ideal_noisy"), ("ESP", "esp"), ("us", "duration_us"),
                 ("loss 2q/1q/idle/ro", "_budget")]
    if any(r.get("threshold_two_qubit_error") is not None for r in rows):
        cols.append(("2q err @F", "threshold_two_qubit_error"))

    def cell(r: dict, key: str) -> str:
        if key == "_budget":
            parts = [r.get(k) for k in ("budget_two_qubit", "budget_one_qubit", "budget_idle", "budget_readout")]
            return "/".join("-" if p is None else f"{p:.3f}" for p in parts) if any(p is not None for p in parts) else ""
        v = r.get(key)
        if v is None:
            return ""
        if isinstance(v, float):
            return f"{v:.4g}"
        return str(v)

    body = []
    for r in rows:
        if r.get("error"):
            body.append([r.get("connectivity") or "?", "error: " + r["error"]])
        else:
            body.append([cell(r, k) for _, k in cols])
    full = [b for b in body if len(b) == len(cols)]
    widths = [max([len(h)] + [len(b[i]) for b in full]) for i, (h, _) in enumerate(cols)]
    lines = ["  ".join(h.ljust(w) for (h, _), w in zip(cols, widths))]
    for b in body:
        if len(b) == len(cols):
            lines.append("  ".join(x.ljust(w) for x, w in zip(b, widths)))
        else:
            lines.append(f"{b[0]}  {b[1]}")
    return "\n".join(lines)


def _flatten(row: dict) -> dict:
    out = {}
    for k, v in row.items():
        out[k] = json.dumps(v, sort_keys=True) if isinstance(v, (dict, list)) else v
    return out


def write_csv(rows: list[dict], fh) -> None:
    keys: list[str] = []
    for r in rows:
        for k in r:
            if k not in keys:
                keys.append(k)
    w = csv.DictWriter(fh, fieldnames=keys)
    w.writeheader()
    for r in rows:
        w.writerow(_flatten(r))


def _sort_key(r: dict):
    return (r.get("error") is not None, r.get("two_qubit_gates") or 0, r.get("depth") or 0,
            str(r.get("connectivity")), r.get("noise_scale") or 0)


def _compare(args, out, err) -> int:
    from compiler.model import Limits, load_model
    from compiler.study import make_tasks

    limits = Limits(max_variables=args.max_variables)
    model = load_model(args.model, limits=limits)
    if args.max_order is not None:
        if args.max_order < 1:
            raise ToposcoutError("--max-order must be at least 1", field="max_order")
        d = model.to_dict()
        d["max_order"] = args.max_order
        model = model.from_dict(d, limits=limits)
    options: dict[str, Any] = dict(gate_set=args.gate_set, strategy=args.strategy, seeds=args.seeds,
                                   family=args.family, layers=args.layers, seed=args.seed,
                                   compile_only=args.compile_only, profile=args.profile)
    if args.memory_budget is not None:
        options["memory_budget_bytes"] = int(args.memory_budget * 2**30)
    scales = args.noise_scale or [1.0]
    if len(scales) > 1 or args.fidelity_target is not None:
        options["fidelity_target"] = 0.5 if args.fidelity_target is None else args.fidelity_target
    if args.profile and Path(args.profile).suffix == ".toml":
        from compiler.profiles import load_profile

        options["profile"] = load_profile(args.profile).to_dict()
    tasks = make_tasks(model, args.connectivity, noise_scales=scales, **options)
    show_progress = not args.json and hasattr(err, "isatty") and err.isatty()
    if args.server:
        from service.client import Client

        import os

        client = Client(args.server, token=args.token or os.environ.get("TOPOSCOUT_TOKEN"))
        rows = client.run_tasks(model, tasks, progress=show_progress)
    else:
        from service.runner import run_tasks

        rows = run_tasks(tasks, workers=args.workers, progress=show_progress)
    rows.sort(key=_sort_key)
    if args.qasm_dir:
        _write_circuits(tasks, rows, Path(args.qasm_dir))
    if args.csv:
        with open(args.csv, "w", newline="", encoding="utf-8") as fh:
            write_csv(rows, fh)
    if args.json:
        json.dump({"model": model.name, "caution": CAUTION, "rows": rows}, out, indent=2, default=str)
        out.write("\n")
    else:
        out.write(f"model {model.name}: {model.num_variables} variables, {len(model.cliques)} cliques\n")
        out.write(_rows_table(rows) + "\n")
        if any("state_fidelity" in r for r in rows):
            out.write(CAUTION + "\n")
    failed = [r for r in rows if r.get("error")]
    return EXIT_FAILED_ROWS if failed and len(failed) == len(rows) else EXIT_OK


def _write_circuits(tasks: list[dict], rows: list[dict], folder: Path) -> None:
    """Recompile each connectivity's best row deterministically and write QASM 3 + QPY."""
    from compiler.ansatz import build_ansatz
    from compiler.compile import compile_ansatz, qasm3_text, qpy_bytes
    from compiler.model import Model
    from compiler.targets import get_gate_set, make_connectivity

    folder.mkdir(parents=True, exist_ok=True)
    done = set()
    for t in tasks:
        spec = t["connectivity"]
        m = Model.from_dict(t["model"])
        conn = make_connectivity(spec["family"], m.num_variables, size=spec["size"], edges=spec["edges"])
        if conn.name in done:
            continue
        done.add(conn.name)
        a = build_ansatz(m, family=t.get("family", "clique"), layers=t.get("layers", 1), seed=t.get("seed", 0))
        c = compile_ansatz(a, conn, get_gate_set(t.get("gate_set", "cx")), strategy=t.get("strategy", "auto"),
                           seeds=t.get("seeds", 5))
        (folder / f"{conn.name}.qasm").write_text(qasm3_text(c), encoding="utf-8")
        (folder / f"{conn.name}.qpy").write_bytes(qpy_bytes(c))


def _targets(out) -> int:
    from compiler.targets import connectivity_catalogue, gate_set_catalogue

    out.write("Connectivities (FAMILY[:SIZE]):\n")
    for name, e in connectivity_catalogue().items():
        out.write(f"  {name:<11} {e['description']}\n  {'':<11} sized: {e['sizing']}; size: {e['size']}\n")
    out.write("\nGate sets (--gate-set):\n")
    for name, e in gate_set_catalogue().items():
        out.write(f"  {name:<11} {e['description']}\n")
    try:
        from compiler.profiles import profile_catalogue
    except ImportError:
        return EXIT_OK
    out.write("\nDevice profiles (--profile NAME or a TOML file; typical values from memory, not a real device):\n")
    for name, desc in profile_catalogue().items():
        out.write(f"  {name:<20} {desc}\n")
    return EXIT_OK


def main(argv: Sequence[str] | None = None, *, out=None, err=None) -> int:
    """Run the CLI on ``argv`` (default ``sys.argv[1:]``); returns the exit code."""
    out = out or sys.stdout
    err = err or sys.stderr
    try:
        args = _parser().parse_args(argv)
    except SystemExit as exc:
        if isinstance(exc.code, str):
            err.write(exc.code + "\n")
            return EXIT_BAD_INPUT
        return EXIT_OK if exc.code in (0, None) else EXIT_BAD_INPUT
    try:
        if args.command == "compare":
            return _compare(args, out, err)
        if args.command == "targets":
            return _targets(out)
        if args.command == "bench":
            from service.bench import run_cli

            return run_cli(args, out, err)
        if args.command == "serve":
            from service.api import serve

            return serve(host=args.host, port=args.port, allow_remote=args.allow_remote, err=err)
        if args.command == "worker":
            from service.dask_executor import run_worker

            return run_worker(args.scheduler, nworkers=args.nworkers, memory_limit=args.memory_limit,
                              threads=args.threads, host=args.host, name=args.name)
    except ToposcoutError as exc:
        where = f" [{exc.field}]" if exc.field else ""
        err.write(f"toposcout: error{where}: {exc}\n")
        return EXIT_BAD_INPUT
    except OSError as exc:
        err.write(f"toposcout: error: {exc.strerror or exc}: {exc.filename or ''}\n")
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        err.write("toposcout: interrupted\n")
        return 130
    return EXIT_BAD_INPUT


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
