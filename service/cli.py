"""The ``toposcout`` command line.

``main(argv) -> int`` is a function of its argument list, so tests call it directly.
Every error a user can cause ends in a one-paragraph message on stderr and a non-zero
exit code (2 for bad input), never a traceback.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import sys
from pathlib import Path
from typing import Any, Sequence

from toposcout.compiler.errors import ToposcoutError
from toposcout.compiler.options import DEFAULT_FIDELITY_TARGET, DEFAULT_REQUIREMENT_TOLERANCE, LIMITS
from toposcout.compiler.targets import BUILTIN_FAMILIES, GATE_SETS
from toposcout.service.output import CAUTION, rows_table, sort_rows, write_csv, write_json

EXIT_OK, EXIT_FAILED_ROWS, EXIT_BAD_INPUT = 0, 1, 2

# Each command imports what it needs when it runs (qiskit, FastAPI, Dask are heavy to load), so
# ``toposcout --help`` and ``toposcout targets`` stay quick: the function-local imports below are those.


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # argparse's own errors: message + exit 2, no traceback
        self.print_usage(sys.stderr)
        raise SystemExit(f"toposcout: error: {message}")


def _parser() -> argparse.ArgumentParser:
    p = _Parser(prog="toposcout", description="Where does a graph-structured circuit fit, and what survives noise?")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    c = sub.add_parser("compare", help="compile (and simulate) a model on several connectivities")
    c.add_argument("model", help="model file: our JSON format, UAI (.uai) or networkx node-link JSON")
    c.add_argument("--connectivity", "-c", action="append", metavar="NAME[:SIZE]",
                   help=f"repeatable; one of {', '.join(BUILTIN_FAMILIES)}, or custom:EDGEFILE (named by its stem) or "
                        f"custom:NAME=EDGEFILE; "
                        f"default: all built-in families")
    c.add_argument("--gate-set", default="cx", choices=GATE_SETS, help="native gate set (default cx)")
    c.add_argument("--strategy", default="auto", choices=("generic", "structured", "auto"),
                   help="compilation strategy (default auto: the better of generic and structured)")
    c.add_argument("--seeds", type=int, default=5,
                   help=f"transpiler seeds tried by generic, {LIMITS['seeds'].describe()} (default 5)")
    c.add_argument("--family", default="clique", choices=("clique", "pairwise"), help="circuit family")
    c.add_argument("--layers", type=int, default=1,
                   help=f"repetitions of block + rotations, {LIMITS['layers'].describe()} (default 1)")
    c.add_argument("--seed", type=int, default=0, help="seed of the random angles (default 0)")
    c.add_argument("--max-order", type=int, help="keep only terms of at most this order")
    c.add_argument("--profile", action="append", metavar="NAME|FILE",
                   help="device profile name or TOML file (default: the superconducting-like class); repeat to "
                        "compare device classes in one study")
    c.add_argument("--noise-scale", type=float, action="append", metavar="X",
                   help="multiply every error rate by X; repeat for a sweep (default 1)")
    c.add_argument("--fidelity-target", type=float, default=None,
                   help="find the largest 2q error reaching this state fidelity, "
                        f"{LIMITS['fidelity_target'].describe()} (default {DEFAULT_FIDELITY_TARGET} with a sweep "
                        "of two or more noise scales, else none)")
    c.add_argument("--requirement-tolerance", type=float, metavar="FRACTION",
                   help="the requirement's bisection stops when its bracket (upper - lower) / upper is below this "
                        f"(default {DEFAULT_REQUIREMENT_TOLERANCE}); rows report the bracket")
    c.add_argument("--compile-only", action="store_true", help="skip the noise simulation")
    c.add_argument("--method", default="auto", metavar="METHOD",
                   help="how noise figures are computed: auto (default: density-matrix within the memory budget, "
                        "else trajectories within the time budget, else clifford), density-matrix, trajectories, "
                        "clifford")
    c.add_argument("--time-budget", type=float, metavar="SECONDS",
                   help="wall time the noise figures of one row may take (default 300)")
    c.add_argument("--trajectories", type=int, metavar="N", help="trajectories method: run exactly N trajectories")
    c.add_argument("--precision", type=float, metavar="SE",
                   help="trajectories method: stop when the state fidelity's standard error is below SE "
                        "(default 0.01)")
    c.add_argument("--memory-budget", type=float, metavar="GIB", help="refuse simulations needing more (GiB)")
    c.add_argument("--max-variables", type=int, default=128, help="cap on the model's variables (default 128)")
    c.add_argument("--json", action="store_true", help="print rows as JSON instead of a table")
    c.add_argument("--csv", metavar="FILE", help="also write the rows as CSV")
    c.add_argument("--qasm-dir", metavar="DIR", help="write one .qasm (OpenQASM 3) and one .qpy per connectivity")
    c.add_argument("--workers", type=int, default=None, help="local worker processes (default: cores, at most 2)")
    c.add_argument("--server", metavar="URL", help="run the study on a toposcout server instead")
    c.add_argument("--token", help="bearer token for --server (default: $TOPOSCOUT_TOKEN)")
    c.add_argument("--label", help="with --server: a label for the study (the study list shows and filters it)")

    sub.add_parser("targets", help="list connectivities, gate sets and device profiles")

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


def _bench_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--quick", action="store_true", help="a small subset (three models, three connectivities)")
    p.add_argument("--strategy", action="append", choices=("generic", "structured", "auto"),
                   help="repeatable; default: generic, structured and auto")
    p.add_argument("--seeds", type=int, default=5, help="transpiler seeds 0..N-1 for generic and --qiskit-best "
                                                        "(default 5)")
    p.add_argument("--json", metavar="FILE", help="write the full result as JSON")
    p.add_argument("--markdown", action="store_true", help="print the table as Markdown")
    p.add_argument("--qiskit-best", action="store_true",
                   help="also measure qiskit's PauliEvolution synthesis plugins per cell (slow)")
    p.add_argument("--mcts-simulations", type=int, default=300,
                   help="simulation budget of the mcts plugin for --qiskit-best (default 300)")
    p.add_argument("--big", action="store_true",
                   help="also the big cells: a 100-variable chain and an 8x8 plaquette grid on heavy-hex "
                        "(structured only)")



def _bench(args, out, err) -> int:
    from toposcout.compiler.bench import STRATEGY_ORDER, format_table, run_bench

    if args.seeds < 1:
        raise ToposcoutError("--seeds must be at least 1", field="seeds")
    if args.mcts_simulations < 1:
        raise ToposcoutError("--mcts-simulations must be at least 1", field="mcts_simulations")
    tty = hasattr(err, "isatty") and err.isatty()
    result = run_bench(quick=args.quick, strategies=args.strategy or STRATEGY_ORDER, seeds=args.seeds,
                       measure_qiskit=args.qiskit_best, simulations=args.mcts_simulations, big=args.big,
                       progress=(lambda msg: (err.write(msg + "\n"), err.flush())) if tty else None)
    out.write(format_table(result, markdown=args.markdown) + "\n")
    out.write(f"({result['seconds']} s)\n")
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump(result, fh, indent=1)
            fh.write("\n")
    return 0


def _compare(args, out, err) -> int:
    from toposcout.compiler.model import Limits, load_model
    from toposcout.compiler.study import make_tasks

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
                                   compile_only=args.compile_only, profile=args.profile, method=args.method,
                                   time_budget_seconds=args.time_budget, trajectories=args.trajectories,
                                   precision=args.precision)
    from toposcout.compiler.methods import check_method_options

    try:
        check_method_options(args.method, precision=args.precision, trajectories=args.trajectories,
                             time_budget_seconds=args.time_budget)
    except ToposcoutError as exc:  # name the command-line option, not the task field
        flag = {"method": "--method", "precision": "--precision", "trajectories": "--trajectories",
                "time_budget_seconds": "--time-budget"}.get(exc.field or "", exc.field)
        raise ToposcoutError(f"{flag}: {exc}", field=flag) from None
    if args.memory_budget is not None:
        options["memory_budget_bytes"] = int(args.memory_budget * 2**30)
    scales = args.noise_scale or [1.0]
    if args.fidelity_target is not None:  # else make_tasks applies the one default (compiler.options)
        options["fidelity_target"] = args.fidelity_target
    if args.requirement_tolerance is not None:
        options["requirement_tolerance"] = args.requirement_tolerance
    if args.profile:
        from toposcout.compiler.profiles import load_profile

        profiles = [load_profile(p).to_dict() if Path(p).suffix == ".toml" else p for p in args.profile]
        options["profile"] = profiles[0] if len(profiles) == 1 else profiles
    if args.qasm_dir:
        options["keep_circuit"] = True  # the rows bring their compiled circuits for the files
    try:
        tasks = make_tasks(model, args.connectivity, noise_scales=scales, **options)
    except ToposcoutError as exc:  # name the command-line option, not the task field
        flag = _FLAGS.get(exc.field or "")
        if flag is None:
            raise
        text = str(exc)
        if text.startswith(f"{exc.field}: "):
            text = f"{flag}: {text[len(exc.field) + 2:]}"
        elif text.startswith(f"{exc.field} "):
            text = flag + text[len(exc.field):]
        else:
            text = f"{flag}: {text}"
        raise type(exc)(text, field=flag) from None
    show_progress = not args.json and hasattr(err, "isatty") and err.isatty()
    if args.server:
        from toposcout.service.client import Client

        client = Client(args.server, token=args.token or os.environ.get("TOPOSCOUT_TOKEN"))
        def announce(h) -> None:  # on stderr, so --json output stays one document
            err.write(f"study {h.id}: {h.dashboard_url}\n")
            err.flush()

        rows = client.run_tasks(model, tasks, progress=show_progress, on_submit=announce, label=args.label)
    else:
        from toposcout.service.execution.runner import run_tasks

        rows = run_tasks(tasks, workers=args.workers, progress=show_progress)
    if args.qasm_dir:
        _write_circuits(tasks, rows, Path(args.qasm_dir))
        rows = [{k: v for k, v in r.items() if k != "circuit_qpy_b64"} for r in rows]
    rows = sort_rows(rows)
    if args.csv:
        with open(args.csv, "w", newline="", encoding="utf-8") as fh:
            write_csv(rows, fh)
    if args.json:
        write_json(model.name, rows, out)
    else:
        out.write(f"model {model.name}: {model.num_variables} variables, {len(model.cliques)} cliques\n")
        out.write(rows_table(rows) + "\n")
        if any("state_fidelity" in r or r.get("method") for r in rows):
            out.write(CAUTION + "\n")
    failed = [r for r in rows if r.get("error")]
    return EXIT_FAILED_ROWS if failed and len(failed) == len(rows) else EXIT_OK


#: task fields → the ``compare`` option that sets them (errors name the option the user typed)
_FLAGS = {"seeds": "--seeds", "layers": "--layers", "seed": "--seed", "fidelity_target": "--fidelity-target",
          "requirement_tolerance": "--requirement-tolerance",
          "noise_scale": "--noise-scale", "profile": "--profile", "strategy": "--strategy", "family": "--family",
          "gate_set": "--gate-set", "method": "--method", "precision": "--precision", "trajectories": "--trajectories",
          "time_budget_seconds": "--time-budget", "connectivity": "--connectivity"}


def _write_circuits(tasks: list[dict], rows: list[dict], folder: Path) -> None:
    """Write each connectivity's compiled circuit as QASM 3 and QPY (the QPY keeps the layout).

    ``rows[i]`` is the row of ``tasks[i]``. A local run keeps the circuit it compiled in the row
    (``keep_circuit``); rows from a server carry none, so those are compiled again here, with
    the same task and seed, hence the same circuit."""
    import base64

    from qiskit import qasm3, qpy  # circuit files only when --qasm-dir asks for them

    from toposcout.compiler.study import run_task

    folder.mkdir(parents=True, exist_ok=True)
    done = set()
    for t, row in zip(tasks, rows):
        name = row.get("connectivity")
        if not name or name in done or row.get("error"):
            continue
        done.add(name)
        data = row.get("circuit_qpy_b64") or run_task({**t, "compile_only": True, "keep_circuit": True}).get(
            "circuit_qpy_b64")
        if not data:
            continue
        raw = base64.b64decode(data)
        (circuit,) = qpy.load(io.BytesIO(raw))
        (folder / f"{name}.qasm").write_text(qasm3.dumps(circuit), encoding="utf-8")
        (folder / f"{name}.qpy").write_bytes(raw)


def _targets(out) -> int:
    from toposcout.compiler.targets import connectivity_catalogue, gate_set_catalogue

    out.write("Connectivities (FAMILY[:SIZE]):\n")
    for name, e in connectivity_catalogue().items():
        out.write(f"  {name:<11} {e['description']}\n  {'':<11} sized: {e['sizing']}; size: {e['size']}\n")
    out.write("\nGate sets (--gate-set):\n")
    for name, e in gate_set_catalogue().items():
        out.write(f"  {name:<11} {e['description']}\n")
    try:
        from toposcout.compiler.profiles import profile_catalogue
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
            return _bench(args, out, err)
        if args.command == "serve":
            from toposcout.service.api.server import serve

            return serve(host=args.host, port=args.port, allow_remote=args.allow_remote, err=err)
        if args.command == "worker":
            from toposcout.service.execution.dask import run_worker

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
