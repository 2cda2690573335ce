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
    _compare_arguments(c)

    f = sub.add_parser("fit", help="fit a model's angles to its target (KL) or to samples (MMD)")
    f.add_argument("model", help="model file: our JSON format, UAI (.uai) or networkx node-link JSON")
    f.add_argument("--family", default="clique", choices=("clique", "pairwise"), help="circuit family")
    f.add_argument("--layers", type=int, default=1, help="repetitions of block + rotations (default 1)")
    f.add_argument("--seed", type=int, default=0, help="seed of the random starts (default 0)")
    _fit_arguments(f, compare=False)
    f.add_argument("--out", metavar="FILE", help="write the fitted model here (default: MODEL.fitted.json)")
    f.add_argument("--in-place", action="store_true", help="write the fitted parameters into MODEL itself")
    f.add_argument("--plot", metavar="FILE", help="the loss curve as a PNG or SVG file")
    f.add_argument("--json", action="store_true", help="print the fit report as JSON")

    sub.add_parser("targets", help="list connectivities, gate sets and device profiles")

    _bench_arguments(sub.add_parser("bench", help="structured vs generic compilation on a fixed suite of models"))

    sv = sub.add_parser("serve", help="run the REST API server (settings from TOPOSCOUT_* variables)")
    sv.add_argument("--host", default=None, help="address to listen on (default 127.0.0.1)")
    sv.add_argument("--port", type=int, default=None, help="port (default 8000)")
    sv.add_argument("--allow-remote", action="store_true", default=None,
                    help="listen on a non-loopback address without tokens configured")
    sv.add_argument("--workers", type=int, default=1, dest="api_workers", metavar="N",
                    help="uvicorn API processes sharing the store (default 1); the compute worker processes "
                         "are TOPOSCOUT_WORKERS")

    w = sub.add_parser("worker", help="start worker processes: queue workers on a database, or Dask workers",
                       description="With a database URL (sqlite:///..., postgresql+psycopg://...): a queue "
                                   "worker that takes tasks from that store with a lease and runs them in "
                                   "--nworkers compute processes (TOPOSCOUT_DASK_ADDRESS set: on that Dask "
                                   "cluster). With a Dask scheduler address (tcp://host:8786): Dask workers "
                                   "joining it.")
    _worker_arguments(w)
    return p

def _compare_arguments(c: argparse.ArgumentParser) -> None:
    """compare: the model, targets and study options; then device, method and output options."""
    c.add_argument("model", help="model file: our JSON format, UAI (.uai) or networkx node-link JSON")
    c.add_argument("--connectivity", "-c", action="append", metavar="NAME[:SIZE]",
                   help=f"repeatable; one of {', '.join(BUILTIN_FAMILIES)}, or custom:EDGEFILE (named by its stem) or "
                        f"custom:NAME=EDGEFILE; "
                        f"default: all built-in families")
    c.add_argument("--gate-set", default="cx", choices=GATE_SETS, help="native gate set (default cx)")
    c.add_argument("--strategy", default=None, choices=("generic", "structured", "auto"),
                   help="compilation strategy (default auto: the better of generic and structured; with --device "
                        "one row per generic and structured)")
    c.add_argument("--seeds", type=int, default=5,
                   help=f"transpiler seeds tried by generic, {LIMITS['seeds'].describe()} (default 5)")
    c.add_argument("--family", action="append", choices=("clique", "pairwise"),
                   help="circuit family; repeat for rows of each (family, connectivity) (default clique)")
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
    _compare_device_and_method_arguments(c)
    _compare_output_arguments(c)

def _compare_device_and_method_arguments(c: argparse.ArgumentParser) -> None:
    """compare: a device, placement and regions; the simulation method and its budgets."""
    c.add_argument("--device", metavar="FILE",
                   help="a device file (TOML: chip, coordinates, per-qubit and per-coupler figures) or an example "
                        "device name; fixes the connectivity and the profile")
    c.add_argument("--placement", choices=("errors", "count"), default=None,
                   help="placement objective: errors (highest estimated success probability under per-element "
                        "figures; the default when there are any) or count (fewest two-qubit gates)")
    c.add_argument("--regions", type=int, metavar="K",
                   help="compile K placements spread over the chip, rank them by ESP, simulate the best 3")
    c.add_argument("--jitter", type=float, metavar="SIGMA",
                   help="redraw every error rate and coherence time log-normally (sigma) and report the ESP spread")
    c.add_argument("--jitter-samples", type=int, default=100, metavar="N", help="redraws for --jitter (default 100)")
    c.add_argument("--plot", metavar="FILE.svg",
                   help="with --device: draw the chip shaded by error, with the best row's placement on top")
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

def _compare_output_arguments(c: argparse.ArgumentParser) -> None:
    """compare: where rows go (table, JSON, CSV, circuits), workers, fitting, a server."""
    c.add_argument("--json", action="store_true", help="print rows as JSON instead of a table")
    c.add_argument("--csv", metavar="FILE", help="also write the rows as CSV")
    c.add_argument("--qasm-dir", metavar="DIR", help="write one .qasm (OpenQASM 3) and one .qpy per connectivity")
    c.add_argument("--workers", type=int, default=None, help="local worker processes (default: cores, at most 2)")
    c.add_argument("--fit", action="store_true",
                   help="fit each family's angles to the target first (options below; cached by model, family, "
                        "layers, loss, data and seed), then run the study with the fitted angles")
    _fit_arguments(c, compare=True)
    c.add_argument("--server", metavar="URL", help="run the study on a toposcout server instead")
    c.add_argument("--token", help="bearer token for --server (default: $TOPOSCOUT_TOKEN)")
    c.add_argument("--label", help="with --server: a label for the study (the study list shows and filters it)")

def _worker_arguments(w: argparse.ArgumentParser) -> None:
    """worker: a queue worker on a database, or Dask workers joining a scheduler."""
    w.add_argument("scheduler", metavar="scheduler",
                   help="a database URL (queue worker) or a Dask scheduler address tcp://host:8786 (Dask workers)")
    w.add_argument("--nworkers", type=int, default=None,
                   help="worker processes, one task at a time each (default: 1 for Dask; TOPOSCOUT_WORKERS "
                        "for a queue worker)")
    w.add_argument("--parent-pid", type=int, default=None, help=argparse.SUPPRESS)  # serve's own worker
    w.add_argument("--memory-limit", default="4GiB", help="memory limit per process, e.g. 4GiB (default 4GiB)")
    w.add_argument("--threads", type=int, default=None,
                   help="simulator (OpenMP) threads per process (default: cores / nworkers)")
    w.add_argument("--host", default=None, help="address to listen on (default: the scheduler's route)")
    w.add_argument("--name", default=None, help="worker name shown by the scheduler")


def _fit_arguments(p: argparse.ArgumentParser, *, compare: bool) -> None:
    pre = "with --fit: " if compare else ""
    p.add_argument("--loss", default=None, metavar="kl|mmd",
                   help=pre + "kl to the exact target of the factor tables, or mmd to --data (default: mmd with "
                              "--data, else kl)")
    p.add_argument("--data", metavar="FILE.csv", help=pre + "samples: one 0/1 column per variable, header = names")
    p.add_argument("--kernel-bandwidths", type=float, nargs="+", metavar="SIGMA",
                   help=pre + "MMD Gaussian kernel bandwidths over the Hamming distance (default 0.5 1 2)")
    p.add_argument("--restarts", type=int, default=3, help=pre + "seeded random starts (default 3)")
    p.add_argument("--max-iter", type=int, default=500, help=pre + "iterations per restart (default 500)")
    p.add_argument("--tol", type=float, default=1e-10,
                   help=pre + "stop a restart when the loss improves by less than tol*max(1,|loss|) (default 1e-10)")
    p.add_argument("--optimizer", default="lbfgs", choices=("lbfgs", "adam"), help=pre + "default lbfgs (L-BFGS-B)")
    if compare:
        p.add_argument("--fit-cache", metavar="DIR", help="folder of cached fits (default ~/.cache/toposcout/fits)")
        p.add_argument("--no-fit-cache", action="store_true", help="always fit again; cache nothing")


_FIT_FLAGS = {"loss": "--loss", "data": "--data", "kernel_bandwidths": "--kernel-bandwidths",
              "restarts": "--restarts", "max_iter": "--max-iter", "tol": "--tol", "optimizer": "--optimizer",
              "layers": "--layers", "family": "--family", "factors": "--loss", "variables": "model"}


def _fit_settings(args, model):
    """The fit options of ``args`` checked (the option named in the error), samples read."""
    from toposcout.service.fitting import FitSettings, read_samples  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    try:
        samples = read_samples(args.data, model) if args.data else None
        loss = args.loss or ("mmd" if args.data else "kl")
        settings = FitSettings(loss=loss, layers=args.layers, restarts=args.restarts, max_iter=args.max_iter,
                               tol=args.tol, optimizer=args.optimizer, seed=args.seed,
                               bandwidths=tuple(args.kernel_bandwidths or FitSettings.bandwidths),
                               samples=samples)
        families = (args.family or ["clique"]) if not isinstance(args.family, str) else [args.family]
        for fam in families:
            settings.check(model, fam)
    except ToposcoutError as exc:
        field = exc.field or ""
        if field.startswith("data"):
            flag = f"--data {args.data}" if args.data else "--data"
            raise ToposcoutError(f"{flag}: {exc}", field=field) from None
        flag = _FIT_FLAGS.get(field, field)
        if field == "factors" and not args.data:
            raise ToposcoutError(f"{exc}; or give --data FILE.csv", field="--data") from None
        raise ToposcoutError(f"{flag}: {exc}", field=flag) from None
    return settings


def _fit_progress(err, total: int, label: str = "fit"):
    """A tqdm bar on a terminal showing the loss; returns (callback, close)."""
    if not (hasattr(err, "isatty") and err.isatty()):
        return None, lambda: None
    from tqdm import tqdm  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    bar = tqdm(total=total, desc=label, unit="it", leave=False, file=err)

    def cb(event):
        bar.update(1)
        bar.set_postfix(restart=event["restart"], loss=f"{event['loss']:.4g}", best=f"{event['best']:.4g}")

    return cb, bar.close


def _fit(args, out, err) -> int:
    from toposcout.compiler.fit import fit_model, with_parameters  # lazily: each command loads what it needs; keeps `toposcout --help` fast
    from toposcout.compiler.model import load_model  # lazily: each command loads what it needs; keeps `toposcout --help` fast
    from toposcout.service.fitting import format_report, loss_curve_image  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    src = Path(args.model)
    model = load_model(src)
    if args.in_place and args.out:
        raise ToposcoutError("give --out FILE or --in-place, not both", field="--out")
    if args.in_place and src.suffix.lower() != ".json":
        raise ToposcoutError("--in-place rewrites a JSON model; this input is not one (use --out FILE.json)",
                             field="--in-place")
    dest = src if args.in_place else Path(args.out) if args.out else src.with_name(src.stem + ".fitted.json")
    if not args.in_place and dest.resolve() == src.resolve():
        raise ToposcoutError("--out is the input file; use --in-place to overwrite it", field="--out")
    if args.plot and Path(args.plot).suffix.lower() not in (".png", ".svg"):
        raise ToposcoutError("--plot needs a .png or .svg file name", field="--plot")
    settings = _fit_settings(args, model)
    cb, close = _fit_progress(err, settings.restarts * settings.max_iter)
    try:
        result = fit_model(model, family=args.family, layers=settings.layers, loss=settings.loss,
                           samples=settings.samples, bandwidths=settings.bandwidths, restarts=settings.restarts,
                           max_iter=settings.max_iter, tol=settings.tol, optimizer=settings.optimizer,
                           seed=settings.seed, progress=cb)
    finally:
        close()
    report = result.report()
    if result.interrupted:  # Ctrl-C: nothing is written; the best so far is reported
        report["parameters"] = result.parameters
        if args.json:
            out.write(json.dumps(report, indent=1) + "\n")
        else:
            out.write(format_report(report) + "\n")
            out.write("nothing written; best parameters so far:\n" + json.dumps(result.parameters) + "\n")
        return 130
    fitted = with_parameters(model, result.parameters)
    text = json.dumps(fitted.to_dict(), indent=2) + "\n"
    tmp = dest.with_name(dest.name + ".tmp")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(dest)
    if args.plot:
        Path(args.plot).write_bytes(loss_curve_image(report, Path(args.plot).suffix.lower()[1:]))
    report["out"] = str(dest)
    if args.json:
        out.write(json.dumps(report, indent=1) + "\n")
    else:
        out.write(format_report(report) + "\n")
        out.write(f"wrote {dest}\n")
        if args.family != "clique" or settings.layers != 1:
            out.write(f"(angles for --family {args.family} --layers {settings.layers}: run compare with the same "
                      "options)\n")
    return EXIT_OK


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
    from toposcout.compiler.bench import STRATEGY_ORDER, format_table, run_bench  # lazily: each command loads what it needs; keeps `toposcout --help` fast

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
    model = _compare_model(args)
    device = _device_options(args)
    options = _compare_options(args)
    tasks = _compare_tasks(args, model, options, device, out, err)
    rows = _compare_run(args, model, tasks, err)
    return _compare_report(args, model, device, tasks, rows, out)


def _compare_model(args):
    """The model of ``compare``, with ``--max-order`` applied."""
    from toposcout.compiler.model import Limits, load_model  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    limits = Limits(max_variables=args.max_variables)
    model = load_model(args.model, limits=limits)
    if args.max_order is not None:
        if args.max_order < 1:
            raise ToposcoutError("--max-order must be at least 1", field="max_order")
        d = model.to_dict()
        d["max_order"] = args.max_order
        model = model.from_dict(d, limits=limits)
    return model


def _compare_options(args) -> dict[str, Any]:
    """Task options from the command line, each checked before any work (errors name the option)."""
    options: dict[str, Any] = dict(gate_set=args.gate_set, strategy=args.strategy or "auto", seeds=args.seeds,
                                   layers=args.layers, seed=args.seed,
                                   compile_only=args.compile_only, profile=args.profile, method=args.method,
                                   time_budget_seconds=args.time_budget, trajectories=args.trajectories,
                                   precision=args.precision)
    from toposcout.compiler.methods import check_method_options  # lazily: keeps --help fast

    try:
        check_method_options(args.method, precision=args.precision, trajectories=args.trajectories,
                             time_budget_seconds=args.time_budget)
    except ToposcoutError as exc:  # name the command-line option, not the task field
        flag = {"method": "--method", "precision": "--precision", "trajectories": "--trajectories",
                "time_budget_seconds": "--time-budget"}.get(exc.field or "", exc.field)
        raise ToposcoutError(f"{flag}: {exc}", field=flag) from None
    if args.memory_budget is not None:
        options["memory_budget_bytes"] = int(args.memory_budget * 2**30)
    if args.fidelity_target is not None:  # else make_tasks applies the one default (compiler.options)
        options["fidelity_target"] = args.fidelity_target
    if args.requirement_tolerance is not None:
        options["requirement_tolerance"] = args.requirement_tolerance
    if args.profile:
        from toposcout.compiler.profiles import load_profile  # lazily: each command loads what it needs; keeps `toposcout --help` fast

        profiles = [load_profile(p).to_dict() if Path(p).suffix == ".toml" else p for p in args.profile]
        options["profile"] = profiles[0] if len(profiles) == 1 else profiles
    if args.qasm_dir:
        options["keep_circuit"] = True  # the rows bring their compiled circuits for the files
    return options


def _compare_tasks(args, model, options: dict[str, Any], device, out, err) -> list[dict]:
    """The study's tasks (per strategy, family, connectivity, profile and scale; fitted first with --fit)."""
    from toposcout.compiler.study import make_tasks  # lazily: keeps --help fast

    scales = args.noise_scale or [1.0]
    try:
        if device is not None:
            options.update(device=device.to_dict(), profile=None)
            if args.gate_set == "cx" and "--gate-set" not in (args.argv or ()):
                options["gate_set"] = device.native_gate
        options.update(placement=args.placement, regions=args.regions, jitter=args.jitter,
                       jitter_samples=args.jitter_samples)
        # a device fixes the connectivity; with no --strategy its rows compare both strategies
        strategies = [options["strategy"]] if args.strategy or device is None else ["generic", "structured"]
        connectivities = None if device is not None else args.connectivity
        families = args.family or ["clique"]

        def build(**extra: Any) -> list[dict]:
            return [t for st in strategies for t in make_tasks(model, connectivities, noise_scales=scales,
                                                               **{**options, "strategy": st, **extra})]

        if args.fit and args.server:  # the server fits (in its workers): the tasks carry the fit request
            settings = _fit_settings(args, model)
            request = {"loss": settings.loss, "restarts": settings.restarts, "max_iter": settings.max_iter,
                       "tol": settings.tol, "optimizer": settings.optimizer, "seed": settings.seed,
                       "bandwidths": list(settings.bandwidths),
                       "samples": None if settings.samples is None else [int(x) for x in settings.samples]}
            tasks = [t for fam in families for t in build(family=fam, fit_request=request)]
        elif args.fit:
            from toposcout.service.fitting import FitCache, default_cache_dir, fitted_tasks, format_report  # lazily: each command loads what it needs; keeps `toposcout --help` fast

            settings = _fit_settings(args, model)
            cache = FitCache(None if args.no_fit_cache else (args.fit_cache or default_cache_dir()))
            cb, close = _fit_progress(err, settings.restarts * settings.max_iter * len(families), "fit")
            tasks, reports = [], []
            try:
                for st in strategies:  # one fit per family: the cache answers the second strategy
                    got, reps = fitted_tasks(model, connectivities, families, settings, cache, noise_scales=scales,
                                             progress=(lambda fam, e: cb(e)) if cb else None,
                                             **{**options, "strategy": st})
                    tasks += got
                    reports = reports or reps
            finally:
                close()
            if not args.json:
                for rep in reports:
                    out.write(format_report(rep) + "\n")
        else:
            tasks = [t for fam in families for t in build(family=fam)]
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
    return tasks


def _compare_run(args, model, tasks: list[dict], err) -> list[dict]:
    """Rows of the tasks: on a server with --server, else in local worker processes."""
    show_progress = not args.json and hasattr(err, "isatty") and err.isatty()
    if args.server:
        from toposcout.service.client import Client  # lazily: each command loads what it needs; keeps `toposcout --help` fast

        client = Client(args.server, token=args.token or os.environ.get("TOPOSCOUT_TOKEN"))
        def announce(h) -> None:  # on stderr, so --json output stays one document
            err.write(f"study {h.id}: {h.dashboard_url}\n")
            err.flush()

        rows = client.run_tasks(model, tasks, progress=show_progress, on_submit=announce, label=args.label)
    else:
        from toposcout.service.execution.runner import run_tasks  # lazily: each command loads what it needs; keeps `toposcout --help` fast

        rows = run_tasks(tasks, workers=args.workers, progress=show_progress)
    return rows


def _compare_report(args, model, device, tasks: list[dict], rows: list[dict], out) -> int:
    """Circuits, CSV, drawing, then the table or JSON; the exit code."""
    if args.qasm_dir:
        _write_circuits(tasks, rows, Path(args.qasm_dir))
        rows = [{k: v for k, v in r.items() if k != "circuit_qpy_b64"} for r in rows]
    rows = sort_rows(rows)
    if args.csv:
        with open(args.csv, "w", newline="", encoding="utf-8") as fh:
            write_csv(rows, fh)
    if args.plot and device is not None:
        from toposcout.service.web.charts import device_svg  # lazily: each command loads what it needs; keeps `toposcout --help` fast

        best = next((r for r in rows if not r.get("error")), None)
        Path(args.plot).write_text(device_svg(device, best), encoding="utf-8")
    if args.json:
        write_json(model.name, rows, out)
    else:
        out.write(f"model {model.name}: {model.num_variables} variables, {len(model.cliques)} cliques"
                  + (f"; device {device.name}: {device.num_qubits} qubits, {len(device.connectivity.edges)} couplers"
                     if device is not None else "") + "\n")
        out.write(rows_table(rows) + "\n")
        for r in rows:
            if r.get("chip_regions") and r.get("chip_region_rank") == 0:
                out.write(f"regions ({r.get('strategy')}): {r['chip_regions']} compiled and ranked by ESP; best "
                          f"{r['chip_region_esp_best']:.4g} on qubits {r['chip_region_best']}, median "
                          f"{r['chip_region_esp_median']:.4g} on {r['chip_region_median']}, worst "
                          f"{r['chip_region_esp_worst']:.4g} on {r['chip_region_worst']}\n")
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


def _device_options(args):
    """The device of ``--device`` (None without), after the placement options' checks; every
    error names its option."""
    from toposcout.compiler.regions import check_placement_options  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    try:
        check_placement_options({"placement": args.placement, "regions": args.regions, "jitter": args.jitter,
                                 "jitter_samples": args.jitter_samples})
    except ToposcoutError as exc:
        flag = "--" + (exc.field or "").replace("_", "-")
        raise ToposcoutError(f"{flag}: {exc}", field=flag) from None
    if args.device is None:
        if args.plot:
            raise ToposcoutError("--plot draws a device: give --device FILE", field="--plot")
        return None
    if args.connectivity:
        raise ToposcoutError("--device fixes the connectivity: give either --device or --connectivity",
                             field="--connectivity")
    if args.profile:
        raise ToposcoutError("--device carries its own figures (and base profile): give either --device or "
                             "--profile", field="--profile")
    if args.plot and not args.plot.endswith(".svg"):
        raise ToposcoutError(f"--plot: {args.plot!r} must end in .svg", field="--plot")
    from toposcout.compiler.devices import load_device  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    try:
        return load_device(args.device)
    except ToposcoutError as exc:
        raise ToposcoutError(f"--device {args.device}: {exc}", field=exc.field) from None


def _write_circuits(tasks: list[dict], rows: list[dict], folder: Path) -> None:
    """Write each connectivity's compiled circuit as QASM 3 and QPY (the QPY keeps the layout).

    ``rows[i]`` is the row of ``tasks[i]``. A local run keeps the circuit it compiled in the row
    (``keep_circuit``); rows from a server carry none, so those are compiled again here, with
    the same task and seed, hence the same circuit."""
    import base64  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    from qiskit import qasm3, qpy  # circuit files only when --qasm-dir asks for them

    from toposcout.compiler.study import run_task  # lazily: each command loads what it needs; keeps `toposcout --help` fast

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


def _worker(args) -> int:
    from toposcout.service.execution.queue import is_database_url, run_queue_worker  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    if args.nworkers is not None and args.nworkers < 1:
        raise ToposcoutError("--nworkers must be at least 1", field="nworkers")
    if is_database_url(args.scheduler):
        return run_queue_worker(args.scheduler, slots=args.nworkers, parent_pid=args.parent_pid)
    from toposcout.service.execution.dask import run_worker  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    return run_worker(args.scheduler, nworkers=args.nworkers or 1, memory_limit=args.memory_limit,
                      threads=args.threads, host=args.host, name=args.name)


def _targets(out) -> int:
    from toposcout.compiler.targets import connectivity_catalogue, gate_set_catalogue  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    out.write("Connectivities (FAMILY[:SIZE]):\n")
    for name, e in connectivity_catalogue().items():
        out.write(f"  {name:<11} {e['description']}\n  {'':<11} sized: {e['sizing']}; size: {e['size']}\n")
    out.write("\nGate sets (--gate-set):\n")
    for name, e in gate_set_catalogue().items():
        out.write(f"  {name:<11} {e['description']}\n")
    try:
        from toposcout.compiler.profiles import profile_catalogue  # lazily: each command loads what it needs; keeps `toposcout --help` fast
    except ImportError:
        return EXIT_OK
    out.write("\nDevice profiles (--profile NAME or a TOML file; typical values from memory, not a real device):\n")
    for name, desc in profile_catalogue().items():
        out.write(f"  {name:<20} {desc}\n")
    from toposcout.compiler.devices import DEVICE_NAMES, load_device  # lazily: each command loads what it needs; keeps `toposcout --help` fast

    out.write("\nExample devices (--device NAME or a device file; invented chips, typical values from memory):\n")
    for name in DEVICE_NAMES:
        d = load_device(name)
        out.write(f"  {name:<20} {d.description} [{d.num_qubits} qubits, {len(d.connectivity.edges)} couplers]\n")
    return EXIT_OK


def main(argv: Sequence[str] | None = None, *, out=None, err=None) -> int:
    """Run the CLI on ``argv`` (default ``sys.argv[1:]``); returns the exit code."""
    out = out or sys.stdout
    err = err or sys.stderr
    try:
        args = _parser().parse_args(argv)
        args.argv = list(sys.argv[1:] if argv is None else argv)
    except SystemExit as exc:
        if isinstance(exc.code, str):
            err.write(exc.code + "\n")
            return EXIT_BAD_INPUT
        return EXIT_OK if exc.code in (0, None) else EXIT_BAD_INPUT
    try:
        if args.command == "compare":
            return _compare(args, out, err)
        if args.command == "fit":
            return _fit(args, out, err)
        if args.command == "targets":
            return _targets(out)
        if args.command == "bench":
            return _bench(args, out, err)
        if args.command == "serve":
            from toposcout.service.api.server import serve  # lazily: each command loads what it needs; keeps `toposcout --help` fast

            return serve(host=args.host, port=args.port, allow_remote=args.allow_remote,
                         api_workers=args.api_workers, err=err)
        if args.command == "worker":
            return _worker(args)
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
