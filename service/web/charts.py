"""Server-side charts of a study's rows: SVG (with ``<title>``/``<desc>``) or PNG bytes.

Every chart is drawn from plain row dicts (what ``toposcout.compiler.study.run_task`` returns and
the API serves) with matplotlib's Agg backend and its object API (no pyplot state, so
charts can be drawn from several request threads). Every chart carries a title, axis
labels with units and a caption saying the figures come from a simulation under the
named noise profile (or, for compile-only studies, from the compiler alone) and are not
a device measurement.

Chart kinds (:data:`CHART_KINDS`):

* ``gates``    two-qubit gate count and depth per connectivity;
* ``fidelity`` state fidelity and Hellinger fidelity per connectivity;
* ``budget``   the error budget: Hellinger fidelity lost to each noise source, stacked;
* ``sweep``    state fidelity against noise scale, with the fidelity target and each
  connectivity's threshold scale marked (needs two or more noise scales);
* ``fit``      the fit's loss per iteration (best restart), one line per family (fitted studies only).

:func:`connectivity_chart` draws one connectivity with the model's variables on their
physical qubits.

Examples:
    >>> rows = [{"connectivity": "line-2", "two_qubit_gates": 2, "depth": 7, "noise_scale": 1.0}]
    >>> available_charts(rows)
    ['gates']
    >>> svg = render_chart("gates", rows, fmt="svg").decode()
    >>> "<title" in svg and "not a device measurement" in svg
    True
"""

from __future__ import annotations

import io
import math
import re
import textwrap
import threading
from html import escape
from typing import Any, Iterable, Mapping, Sequence

import matplotlib
# no matplotlib.use(): the charts use the object API (Figure, savefig picks its canvas by format), so
# importing this module in a notebook leaves the notebook's backend alone
from matplotlib.figure import Figure  # noqa: E402

from toposcout.compiler.devices import parse_device
from toposcout.compiler.errors import ToposcoutError  # noqa: E402
from toposcout.compiler.targets import Connectivity, make_connectivity  # noqa: E402

__all__ = [
    "CHART_KINDS",
    "CHART_TITLES",
    "FORMATS",
    "available_charts",
    "caption",
    "chart_description",
    "render_chart",
    "connectivity_chart",
    "connectivity_for_row",
    "drawing_description",
    "usable_rows",
    "per_connectivity",
]

CHART_KINDS: tuple[str, ...] = ("gates", "fidelity", "budget", "sweep", "fit")
CHART_TITLES: dict[str, str] = {
    "gates": "Two-qubit gates and depth per connectivity",
    "fidelity": "State and Hellinger fidelity per connectivity",
    "budget": "Error budget: Hellinger fidelity lost per noise source",
    "sweep": "State fidelity against noise scale",
    "fit": "Fit of the angles: loss per iteration (best restart)",
}
FORMATS: tuple[str, ...] = ("svg", "png")

#: our colours, one per meaning, the same in every chart and drawing. Chosen by hand for this project
#: and checked with the colour-vision-deficiency simulation of Machado, Oliveira & Fernandes (2009)
#: (tests/test_dashboard_charts.py: the colours that share a chart stay apart in CAM02-UCS for
#: protanopia, deuteranopia and tritanopia at full severity).
PALETTE: dict[str, str] = {
    "two_qubit": "#a23b2a",      # two-qubit gates: their count, their budget share, couplings that carried SWAPs
    "one_qubit": "#e3b341",      # one-qubit gates
    "idle": "#2d6a9f",           # idling (T1/T2 relaxation)
    "readout": "#8fd0c8",        # readout
    "state": "#3f2a73",          # state fidelity
    "distribution": "#d4a6c8",   # Hellinger fidelity of the measured distribution
    "depth": "#8a8a8a",          # circuit depth
    "placed": "#1d3557",         # drawing: a qubit holding a variable
    "routing": "#a8c5e0",        # drawing: a qubit used for routing only
    "unused": "#e6e6e6",         # drawing: a qubit no gate touches
    "ink": "#222222",            # reference lines: totals, targets, bounds
}
#: the chart groups whose colours appear together (the colour-blindness test checks each group)
PALETTE_GROUPS: dict[str, tuple[str, ...]] = {
    "budget": ("two_qubit", "one_qubit", "idle", "readout"),
    "fidelity": ("state", "distribution"),
    "gates": ("two_qubit", "depth"),
    "drawing": ("placed", "routing", "unused", "two_qubit"),
}
_BUDGET = (("budget_two_qubit", "two-qubit gates", PALETTE["two_qubit"]),
           ("budget_one_qubit", "one-qubit gates", PALETTE["one_qubit"]),
           ("budget_idle", "idling (T1/T2)", PALETTE["idle"]),
           ("budget_readout", "readout", PALETTE["readout"]))
_GREY = "#9a9a9a"  # outline of an unused qubit
_MARKERS = ("o", "s", "^", "D", "v", "P", "X")  # distinct shapes keep overlapping curves apart


def usable_rows(rows: Iterable[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
    """Rows that finished without an error (API rows that are still pending are dropped)."""
    out = []
    for r in rows:
        if r.get("error") or r.get("status") in ("pending", "failed", "cancelled"):
            continue
        if r.get("two_qubit_gates") is None:
            continue
        out.append(r)
    return out


def _profile_of(rows: Sequence[Mapping[str, Any]]) -> str | None:
    names = sorted({str(r["profile"]) for r in rows if r.get("profile")})
    return ", ".join(names) if names else None


def caption(rows: Sequence[Mapping[str, Any]], *, kind: str = "gates") -> str:
    """The caption every chart carries: what the figures are and what they are not."""
    profile = _profile_of(usable_rows(rows))
    if profile and kind != "gates":
        return (f"Simulation under the noise profile '{profile}' (invented typical values), "
                f"not a device measurement.")
    if profile:
        return (f"Compiled circuits of a study simulated under the noise profile '{profile}'; "
                f"compiler figures, not a device measurement.")
    return "Compiler figures of a compile-only study (no noise simulated); not a device measurement."


def per_connectivity(rows: Sequence[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
    """One row per connectivity (the one nearest noise scale 1), in first-seen order."""
    best: dict[str, Mapping[str, Any]] = {}
    for r in rows:
        name = str(r.get("connectivity"))
        d = abs(float(r.get("noise_scale") or 1.0) - 1.0)
        if name not in best or d < abs(float(best[name].get("noise_scale") or 1.0) - 1.0):
            best[name] = r
    return list(best.values())


def available_charts(rows: Iterable[Mapping[str, Any]]) -> list[str]:
    """The chart kinds the rows can fill, in :data:`CHART_KINDS` order."""
    ok = usable_rows(rows)
    if not ok:
        return []
    kinds = ["gates"]
    if any(r.get("state_fidelity") is not None for r in ok):
        kinds.append("fidelity")
    if any(r.get(k) is not None for r in ok for k, _, _ in _BUDGET):
        kinds.append("budget")
    scales = {float(r["noise_scale"]) for r in ok if r.get("state_fidelity") is not None
              and r.get("noise_scale") is not None}
    if len(scales) >= 2:
        kinds.append("sweep")
    if any(r.get("fit_curve") for r in ok):
        kinds.append("fit")
    return kinds


def chart_description(kind: str, rows: Iterable[Mapping[str, Any]]) -> str:
    """A one-paragraph text equivalent of a chart (its alt text and SVG ``<desc>``)."""
    ok = usable_rows(rows)
    per = per_connectivity(ok)
    if kind == "gates":
        body = "; ".join(f"{r['connectivity']}: {r['two_qubit_gates']} two-qubit gates, depth {r.get('depth')}"
                         for r in per)
    elif kind == "fidelity":
        several = len({k[0] for k, _ in facets(ok)}) > 1
        body = "; ".join(f"{_facet_title(key, several)}: " + "; ".join(
            f"{r['connectivity']}: state fidelity {_fmt(r.get('state_fidelity'))}, "
            f"Hellinger fidelity {_fmt(r.get('hellinger_fidelity'))}" for r in g) for key, g in facets(ok))
    elif kind == "fit":
        body = "; ".join(f"{fam}: {len(c)} iterations, final {r.get('fit_loss')} loss {_fmt(c[-1])}"
                         for fam, (r, c) in _fit_curves(ok).items())
    elif kind == "budget":
        several = len({k[0] for k, _ in facets(ok)}) > 1
        body = "; ".join(f"{_facet_title(key, several)}: " + "; ".join(
            f"{r['connectivity']}: " + ", ".join(f"{label} {_fmt(r.get(k))}" for k, label, _ in _BUDGET)
            + f", total loss {_fmt(None if r.get('hellinger_fidelity') is None else 1 - r['hellinger_fidelity'])}"
            for r in g) for key, g in facets(ok)) + f" ({BUDGET_NOTE})"
    elif kind == "sweep":
        parts = []
        for name, pts in _sweep_series(ok).items():
            s = ", ".join(f"{x:g}x -> {_fmt(y)}" for x, y in pts)
            thr = _threshold_of(name, ok)
            parts.append(f"{name}: {s}" + (f"; target reached up to noise scale {thr:.3g}" if thr else ""))
        body = "; ".join(parts)
    else:
        raise ToposcoutError(f"unknown chart {kind!r}; choose one of {', '.join(CHART_KINDS)}", field="chart")
    return f"{CHART_TITLES[kind]}. {body}. {caption(ok, kind=kind)}"


def _fmt(v: Any) -> str:
    return "n/a" if v is None else f"{float(v):.3f}"


def render_chart(kind: str, rows: Iterable[Mapping[str, Any]], *, fmt: str = "svg") -> bytes:
    """Draw chart ``kind`` of the rows as SVG or PNG bytes.

    Raises ToposcoutError (field ``chart``) for an unknown kind or format, or when the rows
    cannot fill the chart (e.g. ``sweep`` with a single noise scale).
    """
    if fmt not in FORMATS:
        raise ToposcoutError(f"unknown chart format {fmt!r}; choose svg or png", field="format")
    ok = usable_rows(rows)
    fig = chart_figure(kind, ok)
    return _save(fig, fmt, CHART_TITLES[kind], chart_description(kind, ok))


def chart_figure(kind: str, rows: Iterable[Mapping[str, Any]]) -> Figure:
    """Chart ``kind`` of the rows as a matplotlib Figure (what the dashboard serves; the notebook
    client's ``StudyHandle.plot`` shows it). Raises ToposcoutError as :func:`render_chart`."""
    if kind not in CHART_KINDS:
        raise ToposcoutError(f"unknown chart {kind!r}; choose one of {', '.join(CHART_KINDS)}", field="chart")
    ok = usable_rows(rows)
    if kind not in available_charts(ok):
        need = {"gates": "at least one finished row", "fidelity": "a noise simulation (not compile-only)",
                "fit": "fitted angles (a fit block)",
                "budget": "a noise simulation with the error budget",
                "sweep": "finished noisy rows at two or more noise scales"}[kind]
        raise ToposcoutError(f"the chart {kind!r} needs {need}; this study has none", field="chart")
    draw = {"gates": _draw_gates, "fidelity": _draw_fidelity, "budget": _draw_budget, "sweep": _draw_sweep,
            "fit": _draw_fit}[kind]
    per = per_connectivity(ok)
    panels = len(facets(ok)) if kind in ("fidelity", "budget") else 1
    width = max(6.4, panels * (1.1 * len(per) + 1.5) + 1.0) if kind != "sweep" else 7.0
    fig = Figure(figsize=(min(width, 14.0), 4.6), layout="constrained")
    draw(fig, ok)
    fig.suptitle(CHART_TITLES[kind], fontsize=11)
    _caption(fig, caption(ok, kind=kind))
    return fig


def _caption(fig: Figure, text: str) -> None:
    width_chars = int(fig.get_figwidth() * 15)
    fig.supxlabel(textwrap.fill(text, width_chars), fontsize=8, style="italic", color="#444444")


def _names(per: Sequence[Mapping[str, Any]]) -> list[str]:
    return [str(r["connectivity"]) for r in per]


def _fit_curves(rows) -> dict[str, tuple[Mapping[str, Any], list[float]]]:
    """One (row, loss curve) per family (every row of a family carries the same fit)."""
    out: dict[str, tuple[Mapping[str, Any], list[float]]] = {}
    for r in rows:
        if r.get("fit_curve") and str(r.get("family")) not in out:
            out[str(r.get("family"))] = (r, [float(v) for v in r["fit_curve"]])
    return out


def _draw_fit(fig: Figure, rows) -> None:
    ax = fig.subplots()
    curves = _fit_curves(rows)
    values = [v for _, c in curves.values() for v in c]
    for fam, (r, c) in curves.items():
        ax.plot(range(1, len(c) + 1), c, label=f"{fam} (final {c[-1]:.3g})")
    if values and min(values) > 0:
        ax.set_yscale("log")
    loss = next((r.get("fit_loss") for r, _ in curves.values()), "kl")
    ax.set_ylabel("KL(target ‖ model) (nats)" if loss == "kl" else "unbiased MMD² to the samples")
    ax.set_xlabel("iteration (count)")
    ax.legend(fontsize=8)


def _draw_gates(fig: Figure, rows) -> None:
    per = per_connectivity(rows)
    names = _names(per)
    ax1, ax2 = fig.subplots(1, 2)
    x = range(len(per))
    bars = ax1.bar(x, [r["two_qubit_gates"] for r in per], color=PALETTE["two_qubit"])
    ax1.bar_label(bars, fontsize=8)
    lb = next((r.get("lower_bound_two_qubit") for r in per if r.get("lower_bound_two_qubit") is not None), None)
    if lb is not None:
        ax1.axhline(lb, color=PALETTE["ink"], linestyle=":", linewidth=1, label=f"lower bound ({lb})")
        ax1.legend(fontsize=8, loc="upper left")
    ax1.set_ylabel("two-qubit gates (count)")
    ax1.set_title("Two-qubit gate count", fontsize=10)
    bars = ax2.bar(x, [r.get("depth") or 0 for r in per], color=PALETTE["depth"], label="depth")
    ax2.bar_label(bars, fontsize=8)
    ax2.set_ylabel("circuit depth (layers of gates)")
    ax2.set_title("Depth (without measurement)", fontsize=10)
    for ax in (ax1, ax2):
        ax.set_xticks(list(x), names, rotation=30, ha="right", fontsize=8)
        ax.set_xlabel("connectivity (instance)")
        ax.margins(y=0.15)


def facets(rows: Sequence[Mapping[str, Any]]) -> list[tuple[tuple[str | None, float], list[Mapping[str, Any]]]]:
    """The rows grouped by (profile, noise scale), one row per connectivity in each group, in
    first-seen order: rows of different scales or profiles are never compared side by side."""
    groups: dict[tuple[str | None, float], dict[str, Mapping[str, Any]]] = {}
    for r in rows:
        key = (str(r["profile"]) if r.get("profile") else None, float(r.get("noise_scale") or 0.0))
        groups.setdefault(key, {}).setdefault(str(r.get("connectivity")), r)
    return [(k, list(v.values())) for k, v in groups.items()]


def _facet_title(key: tuple[str | None, float], several_profiles: bool) -> str:
    profile, scale = key
    return f"noise scale {scale:g}x" + (f", profile {profile}" if several_profiles and profile else "")


def _draw_fidelity(fig: Figure, rows) -> None:
    groups = [(k, [r for r in g if r.get("state_fidelity") is not None]) for k, g in facets(rows)]
    groups = [(k, g) for k, g in groups if g]
    several = len({k[0] for k, _ in groups}) > 1
    axes = fig.subplots(1, len(groups), sharey=True, squeeze=False)[0]
    w = 0.38
    for ax, (key, per) in zip(axes, groups):
        xs = list(range(len(per)))
        b1 = ax.bar([i - w / 2 for i in xs], [r["state_fidelity"] for r in per], w, color=PALETTE["state"],
                    label="state fidelity")
        b2 = ax.bar([i + w / 2 for i in xs], [r.get("hellinger_fidelity") or 0 for r in per], w,
                    color=PALETTE["distribution"], label="Hellinger fidelity")
        ax.bar_label(b1, fmt="%.3f", fontsize=7)
        ax.bar_label(b2, fmt="%.3f", fontsize=7)
        ax.set_xticks(xs, _names(per), rotation=30, ha="right", fontsize=8)
        ax.set_title(_facet_title(key, several), fontsize=9)
        ax.set_xlabel("connectivity (instance)")
        ax.set_ylim(0, 1.12)
    axes[0].set_ylabel("fidelity (dimensionless, 0 to 1)")
    axes[0].legend(fontsize=8, loc="upper right", ncols=2)


#: how the budget chart says what its bars are (also in the README's error-budget paragraph)
BUDGET_NOTE = ("each bar is a separate estimate: the Hellinger fidelity regained when only that source is "
               "switched off; sources interact, so the bars are not stacked and need not add up to the total loss")


def _draw_budget(fig: Figure, rows) -> None:
    groups = [(k, [r for r in g if any(r.get(b) is not None for b, _, _ in _BUDGET)]) for k, g in facets(rows)]
    groups = [(k, g) for k, g in groups if g]
    several = len({k[0] for k, _ in groups}) > 1
    axes = fig.subplots(1, len(groups), sharey=True, squeeze=False)[0]
    w = 0.8 / len(_BUDGET)
    top = 1e-9
    for ax, (key, per) in zip(axes, groups):
        xs = list(range(len(per)))
        for j, (bkey, label, colour) in enumerate(_BUDGET):
            vals = [max(0.0, float(r.get(bkey) or 0.0)) for r in per]
            ax.bar([i - 0.4 + w * (j + 0.5) for i in xs], vals, w, color=colour, label=label)
            top = max([top] + vals)
        for i, r in enumerate(per):
            if r.get("hellinger_fidelity") is not None:
                loss = 1 - r["hellinger_fidelity"]
                ax.plot([i - 0.42, i + 0.42], [loss] * 2, color=PALETTE["ink"], linewidth=1.2, linestyle="--",
                        label="total loss (1 - Hellinger fidelity)" if i == 0 else None)
                top = max(top, loss)
        ax.set_xticks(xs, _names(per), rotation=30, ha="right", fontsize=8)
        ax.set_title(_facet_title(key, several), fontsize=9)
        ax.set_xlabel("connectivity (instance)")
    axes[0].set_ylabel("Hellinger fidelity (absolute, 0 to 1)")
    axes[0].set_ylim(0, top * 1.6)  # room for the legend above the tallest bar
    axes[0].legend(fontsize=8, loc="upper left", ncols=2, title=textwrap.fill(BUDGET_NOTE, 70), title_fontsize=7)


def _series_key(r: Mapping[str, Any], rows) -> str:
    """A sweep curve: a connectivity, and its profile when the study has several."""
    several = len({x.get("profile") for x in rows if x.get("profile")}) > 1
    return str(r.get("connectivity")) + (f" ({r.get('profile')})" if several and r.get("profile") else "")


def _sweep_series(rows) -> dict[str, list[tuple[float, float]]]:
    series: dict[str, list[tuple[float, float]]] = {}
    for r in rows:
        if r.get("state_fidelity") is None or r.get("noise_scale") is None:
            continue
        series.setdefault(_series_key(r, rows), []).append((float(r["noise_scale"]), float(r["state_fidelity"])))
    return {k: sorted(v) for k, v in series.items()}


def _threshold_of(name: str, rows) -> float | None:
    return next((r.get("threshold_noise_scale") for r in rows if _series_key(r, rows) == name
                 and r.get("threshold_noise_scale") is not None), None)


def _draw_sweep(fig: Figure, rows) -> None:
    ax = fig.subplots()
    series = _sweep_series(rows)
    colours = matplotlib.colormaps["tab10"]
    for i, (name, pts) in enumerate(series.items()):
        c = colours(i % 10)
        thr = _threshold_of(name, rows)
        ax.plot([p[0] for p in pts], [p[1] for p in pts], marker=_MARKERS[i % len(_MARKERS)], color=c, label=name,
                linestyle=("-", "--", "-.", ":")[i % 4], markersize=7 - (i % 3), markerfacecolor="none" if i % 2 else c)
        if thr is not None:  # the marker has its own legend entry, saying what it marks
            ax.axvline(thr, color=c, linestyle=(0, (2, 2)), linewidth=1,
                       label=f"{name}: threshold {thr:.3g}x (largest scale reaching the target)")
            ax.annotate(f"threshold {thr:.3g}x", (thr, 0.03 + 0.06 * (i % 4)), color=c, fontsize=7,
                        ha="right", va="bottom", xytext=(-3, 0), textcoords="offset points")
    target = next((r.get("fidelity_target") for r in rows if r.get("fidelity_target") is not None), None)
    if target is not None:
        ax.axhline(target, color=PALETTE["ink"], linestyle=":", linewidth=1.2, label=f"fidelity target {target:g}")
    ax.set_xlabel("noise scale (multiple of the profile's error rates)")
    ax.set_ylabel("state fidelity (dimensionless, 0 to 1)")
    ax.set_ylim(0, 1.05)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8, loc="lower left")


# --- connectivity drawings ---------------------------------------------------------------

def connectivity_for_row(row: Mapping[str, Any], request: Mapping[str, Any] | None = None) -> Connectivity:
    """Rebuild the connectivity a row was compiled on from its name (``grid-3x4``, ...).

    A ``custom`` connectivity is rebuilt from the edge lists in the study's request.
    """
    name = str(row.get("connectivity") or "")
    if (request or {}).get("device"):  # a device study: the chip of its device file

        dev = parse_device(request["device"])
        if dev.name == name:
            return dev.connectivity
    family = row.get("connectivity_family") or next(
        (f for f in ("all-to-all", "heavy-hex", "line", "ring", "grid", "custom") if name.startswith(f + "-")), None)
    n = int(row.get("variables") or 1)
    if family == "custom":
        from toposcout.compiler.study import resolve_connectivities  # the names the study gave its rows

        try:
            _specs, conns = resolve_connectivities((request or {}).get("connectivities") or [], n)
        except ToposcoutError:
            conns = []
        for c in conns:
            if c.family == "custom" and c.name == name:
                return c
        raise ToposcoutError(f"cannot rebuild the custom connectivity {name!r}: its edges are not in the request",
                             field="connectivity")
    if not family or not name.startswith(family + "-"):
        raise ToposcoutError(f"cannot tell the family of connectivity {name!r}", field="connectivity")
    return make_connectivity(family, n, size=name[len(family) + 1:])


def _active_guess(row: Mapping[str, Any]) -> set[int]:
    act = set((row.get("layout") or {}).values()) | set((row.get("final_layout") or {}).values())
    for e in (row.get("swap_edges") or {}):
        a, b = e.split("-")
        act.update((int(a), int(b)))
    return act


def drawing_description(row: Mapping[str, Any], conn: Connectivity, active: Iterable[int] | None = None) -> str:
    """Text equivalent of a connectivity drawing (its alt text and SVG ``<desc>``)."""
    layout = row.get("layout") or {}
    act = set(active) if active is not None else _active_guess(row)
    placed = ", ".join(f"{v} on q{p}" for v, p in layout.items())
    swaps, dropped = _swaps_on(row, set(active) if active is not None else None)
    sw = (", ".join(f"q{a}-q{b} ({n})" for (a, b), n in swaps.items())) if swaps else "none"
    if dropped:
        sw += f" ({dropped} recorded SWAP coupling(s) outside the qubits the circuit uses are not shown)"
    idle = conn.num_qubits - len(act)
    return (f"Connectivity {conn.name} ({conn.num_qubits} qubits, {len(conn.edges)} couplings). "
            f"Variables placed: {placed}. Couplings that carried SWAPs: {sw}. "
            f"{idle} idle qubit{'s' if idle != 1 else ''} greyed. {caption([row], kind='gates')}")


def connectivity_chart(row: Mapping[str, Any], conn: Connectivity, *, active: Iterable[int] | None = None,
                       fmt: str = "svg") -> bytes:
    """Draw ``conn`` with the row's variables on their initial physical qubits.

    active: default None: the qubits the circuit touches are guessed from the layouts and
        the SWAP edges; pass the compiled circuit's active qubits when known. Qubits not
        active are drawn grey (idle). Couplings in ``row["swap_edges"]`` are highlighted
        with their SWAP count.
    """
    if fmt not in FORMATS:
        raise ToposcoutError(f"unknown chart format {fmt!r}; choose svg or png", field="format")
    fig = connectivity_figure(row, conn, active=active)
    act = set(active) if active is not None else _active_guess(row)
    return _save(fig, fmt, f"{conn.name}: variables on physical qubits",
                 drawing_description(row, conn, act if active is not None else None))


def connectivity_figure(row: Mapping[str, Any], conn: Connectivity, *, active: Iterable[int] | None = None) -> Figure:
    """The drawing of :func:`connectivity_chart` as a matplotlib Figure."""
    layout = {str(v): int(p) for v, p in (row.get("layout") or {}).items()}
    by_qubit = {p: v for v, p in layout.items()}
    act = set(active) if active is not None else _active_guess(row)
    swaps, mismatch = _swaps_on(row, act if active is not None else None)
    xy = conn.coords()
    n = conn.num_qubits
    big = n > 30
    side = 4.5 if n <= 8 else (6.0 if n <= 30 else 8.5)
    fig = Figure(figsize=(side + 1.5, side * 0.8 + 1.2), layout="constrained")
    ax = fig.subplots()
    dense = len(conn.edges) > 3 * n
    for a, b in conn.edges:
        (x1, y1), (x2, y2) = xy[a], xy[b]
        if (a, b) in swaps:
            ax.plot([x1, x2], [y1, y2], color=PALETTE["two_qubit"], linewidth=3.5, zorder=2, solid_capstyle="round")
            ax.text((x1 + x2) / 2, (y1 + y2) / 2, f"{swaps[(a, b)]} SWAP", fontsize=7, color=PALETTE["two_qubit"],
                    ha="center", va="center", zorder=5, gid=f"swap-label-{a}-{b}",
                    bbox=dict(boxstyle="round,pad=0.15", fc="white", ec=PALETTE["two_qubit"], lw=0.8))
        else:
            ax.plot([x1, x2], [y1, y2], color="#cfcfcf" if dense else "#9a9a9a",
                    linewidth=0.6 if dense else 1.2, zorder=1)
    size = 120 if big else 420
    for q in range(n):
        x, y = xy[q]
        if q in by_qubit:
            face, edge = PALETTE["placed"], PALETTE["ink"]
        elif q in act:
            face, edge = PALETTE["routing"], PALETTE["placed"]
        else:
            face, edge = PALETTE["unused"], _GREY
        ax.scatter([x], [y], s=size, c=face, edgecolors=edge, linewidths=1.2, zorder=3, gid=f"qubit-{q}")
        ax.text(x, y, str(q), fontsize=5 if big else 7, ha="center", va="center", zorder=4,
                color="white" if q in by_qubit else "#555555")
        if q in by_qubit:
            ax.annotate(by_qubit[q], (x, y), xytext=(0, 9 if big else 13), textcoords="offset points",
                        fontsize=7 if big else 8, ha="center", va="bottom", color=PALETTE["placed"], zorder=6,
                        fontweight="bold", gid=f"variable-label-{q}")  # ids: the browser test finds them
    # legend proxies
    ax.scatter([], [], s=60, c=PALETTE["placed"], edgecolors=PALETTE["ink"], label="variable placed (initial layout)")
    if act - set(by_qubit):
        ax.scatter([], [], s=60, c=PALETTE["routing"], edgecolors=PALETTE["placed"], label="used for routing only")
    if set(range(n)) - act - set(by_qubit):
        ax.scatter([], [], s=60, c=PALETTE["unused"], edgecolors=_GREY, label="idle qubit")
    if swaps:
        ax.plot([], [], color=PALETTE["two_qubit"], linewidth=3.5, label="coupling that carried SWAPs")
    ax.legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.12), ncols=2, frameon=False)
    ax.set_aspect("equal", adjustable="datalim")
    ax.margins(0.12)
    ax.set_xticks([])
    ax.set_yticks([])
    for s in ax.spines.values():
        s.set_visible(False)
    ax.set_xlabel("drawing position (qubit spacing, no physical distance)", fontsize=8)
    ax.set_ylabel("drawing position (qubit spacing)", fontsize=8)
    title = f"{conn.name}: variables on physical qubits"
    note = (f"\n({mismatch} recorded SWAP coupling(s) touch qubits the circuit never uses; not drawn)"
            if mismatch else "")
    ax.set_title(title + note, fontsize=10)
    _caption(fig, caption([row], kind="gates"))
    return fig


def _swaps_on(row: Mapping[str, Any], active: set[int] | None) -> tuple[dict[tuple[int, int], int], int]:
    """SWAP counts per coupling; with the circuit's active qubits known, couplings outside them are dropped
    (and counted) rather than drawn where no SWAP can have been."""
    out: dict[tuple[int, int], int] = {}
    dropped = 0
    for e, n in (row.get("swap_edges") or {}).items():
        a, b = sorted(int(x) for x in e.split("-"))
        if active is not None and not {a, b} <= active:
            dropped += 1
            continue
        out[(a, b)] = int(n)
    return out, dropped


# --- output ------------------------------------------------------------------------------

_SVG_OPEN = re.compile(rb"<svg\b[^>]*>")
_SAVE_LOCK = threading.Lock()  # rc_context changes process-wide settings: one save at a time


def _save(fig: Figure, fmt: str, title: str, desc: str) -> bytes:
    buf = io.BytesIO()
    if fmt == "png":
        fig.savefig(buf, format="png", dpi=110, metadata={"Title": title, "Description": desc})
        return buf.getvalue()
    with _SAVE_LOCK, matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": "toposcout"}):
        fig.savefig(buf, format="svg", metadata={"Date": None, "Title": title, "Description": desc})
    svg = buf.getvalue()
    m = _SVG_OPEN.search(svg)
    if m is None:  # pragma: no cover - matplotlib always writes an <svg> element
        return svg
    open_tag = m.group(0)[:-1] + b' role="img" aria-labelledby="chart-title chart-desc">'
    extra = (f'<title id="chart-title">{escape(title)}</title>'
             f'<desc id="chart-desc">{escape(desc)}</desc>').encode()
    return svg[:m.start()] + open_tag + extra + svg[m.end():]


# --- a device drawing: the chip at its coordinates, shaded by error -----------------------------
#: our own sequential scale (pale yellow -> teal -> deep indigo): lightness falls monotonically and
#: the hue runs along the blue-yellow axis, which red-green colour-vision deficiencies keep apart.
DEVICE_SCALE = ("#fbf6cf", "#cfe6a8", "#8fcfa0", "#52b0a0", "#2f8798", "#2b5e8c", "#2a3a74", "#1f1b4d")


def _scale_colour(x: float) -> str:
    """Colour of ``x`` in [0, 1] on :data:`DEVICE_SCALE` (linear interpolation between stops)."""
    x = min(max(x, 0.0), 1.0) * (len(DEVICE_SCALE) - 1)
    i = min(int(x), len(DEVICE_SCALE) - 2)
    f = x - i
    a = [int(DEVICE_SCALE[i][k:k + 2], 16) for k in (1, 3, 5)]
    b = [int(DEVICE_SCALE[i + 1][k:k + 2], 16) for k in (1, 3, 5)]
    return "#" + "".join(f"{round(u + (v - u) * f):02x}" for u, v in zip(a, b))


def _log_position(v: float, lo: float, hi: float) -> float:

    if hi <= lo or v <= 0:
        return 0.0
    return (math.log10(max(v, lo)) - math.log10(lo)) / (math.log10(hi) - math.log10(lo))


def device_svg(device, row: Mapping[str, Any] | None = None, *, width: int = 760) -> str:
    """The device at its coordinates: couplers shaded by two-qubit error, qubits by readout error
    (both log scales, legends with units), and, from ``row``, the placed variables (outlined,
    labelled) and the couplers where routing put SWAPs (dashed). Plain SVG text."""

    prof = device.profile
    pts = device.coords()
    xs, ys = [p[0] for p in pts], [p[1] for p in pts]
    span = max(max(xs) - min(xs), max(ys) - min(ys), 1e-9)
    margin, legend_h = 40, 110
    scale = (width - 2 * margin) / span
    height = int((max(ys) - min(ys)) * scale + 2 * margin + legend_h)

    def xy(q):
        return margin + (pts[q][0] - min(xs)) * scale, margin + (max(ys) - pts[q][1]) * scale

    e2 = {e: prof.edge(*e).two_qubit_error for e in device.connectivity.edges}
    ro = {q: (prof.qubit(q).p1_given_0 + prof.qubit(q).p0_given_1) / 2 for q in range(device.num_qubits)}
    lo2, hi2 = max(min(e2.values(), default=1e-4), 1e-6), max(max(e2.values(), default=1e-2), 1e-5)
    lor, hir = max(min(ro.values()), 1e-6), max(max(ro.values()), 1e-5)
    if hi2 <= lo2:
        hi2 = lo2 * 10
    if hir <= lor:
        hir = lor * 10
    layout = dict((row or {}).get("layout") or {})
    placed = {int(p): v for v, p in layout.items()}
    swaps = {tuple(sorted(int(x) for x in k.split("-"))) for k in ((row or {}).get("swap_edges") or {})}
    r = max(6.0, min(16.0, scale * 0.28))
    out = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
           f'viewBox="0 0 {width} {height}" font-family="sans-serif" font-size="11">',
           f"<title>Device {escape(device.name)}: couplers and qubits shaded by error</title>",
           f"<desc>{device.num_qubits} qubits, {len(e2)} couplers. Coupler colour: two-qubit error (average gate "
           "infidelity, log scale); qubit colour: readout error (mean of p(1|0) and p(0|1), log scale). "
           + ("Outlined qubits hold the row's variables; dashed couplers carry SWAPs. " if row else "")
           + "Figures from the device file, not a measurement.</desc>",
           '<rect width="100%" height="100%" fill="white"/>']
    for (a, b), e in sorted(e2.items()):
        (x1, y1), (x2, y2) = xy(a), xy(b)
        out.append(f'<line x1="{x1:.1f}" y1="{y1:.1f}" x2="{x2:.1f}" y2="{y2:.1f}" stroke-width="{r * 0.7:.1f}" '
                   f'stroke="{_scale_colour(_log_position(e, lo2, hi2))}" stroke-linecap="round">'
                   f"<title>coupler {a}-{b}: two-qubit error {e:.3g}</title></line>")
    for a, b in sorted(swaps):
        if (a, b) in e2:
            (x1, y1), (x2, y2) = xy(a), xy(b)
            out.append(f'<line x1="{x1:.1f}" y1="{y1:.1f}" x2="{x2:.1f}" y2="{y2:.1f}" stroke="#d0006f" '
                       f'stroke-width="2.5" stroke-dasharray="5,3"><title>SWAPs on {a}-{b}</title></line>')
    for q in range(device.num_qubits):
        x, y = xy(q)
        fill = _scale_colour(_log_position(ro[q], lor, hir))
        p = prof.qubit(q)
        ring = ' stroke="#d0006f" stroke-width="3.5"' if q in placed else ' stroke="#444" stroke-width="1"'
        label = escape(str(placed[q])) if q in placed else str(q)
        dark = _log_position(ro[q], lor, hir) > 0.55
        out.append(f'<circle cx="{x:.1f}" cy="{y:.1f}" r="{r:.1f}" fill="{fill}"{ring}>'
                   f"<title>qubit {q}: readout error {ro[q]:.3g}, T1 {p.t1_us:.3g} us, T2 {p.t2_us:.3g} us, "
                   f"1q error {p.one_qubit_error:.3g}" + (f"; holds {escape(str(placed[q]))}" if q in placed else "")
                   + "</title></circle>")
        out.append(f'<text x="{x:.1f}" y="{y + 4:.1f}" text-anchor="middle" '
                   f'fill="{"white" if dark else "black"}">{label}</text>')
    # legends
    y0 = height - legend_h + 20
    for k, (title, lo, hi) in enumerate((("two-qubit error (average gate infidelity), couplers", lo2, hi2),
                                         ("readout error (mean of p(1|0), p(0|1)), qubits", lor, hir))):
        yy = y0 + k * 45
        out.append(f'<text x="{margin}" y="{yy - 4}">{escape(title)}, log scale</text>')
        steps = 40
        w = (width - 2 * margin) / 2 / steps
        for i in range(steps):
            out.append(f'<rect x="{margin + i * w:.1f}" y="{yy}" width="{w + 0.5:.1f}" height="12" '
                       f'fill="{_scale_colour(i / (steps - 1))}"/>')
        out.append(f'<text x="{margin}" y="{yy + 25}">{lo:.2g}</text>')
        out.append(f'<text x="{margin + steps * w:.1f}" y="{yy + 25}" text-anchor="end">{hi:.2g}</text>')
        mid = 10 ** ((math.log10(lo) + math.log10(hi)) / 2)
        out.append(f'<text x="{margin + steps * w / 2:.1f}" y="{yy + 25}" text-anchor="middle">{mid:.2g}</text>')
    if row:
        out.append(f'<text x="{width / 2 + 20:.0f}" y="{y0 + 8}">outlined: qubits holding variables '
                   f'(label = variable)</text>')
        out.append(f'<text x="{width / 2 + 20:.0f}" y="{y0 + 26}">dashed: couplers with SWAPs</text>')
    out.append("</svg>")
    return "\n".join(out)
