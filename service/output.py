"""Rows written for people and programs: a terminal table, CSV and JSON.

The CLI and the API both write rows through here, so a column means the same in each.
"""

from __future__ import annotations

import csv
import json
from typing import IO, Any

from toposcout.compiler.rows import FIELDS, TABLE_COLUMNS, csv_columns

__all__ = ["CAUTION", "CLIFFORD_NOTE", "rows_table", "write_csv", "write_json", "neutralise_cell", "sort_rows"]

CAUTION = "Figures are a simulation under the stated noise model, not a promise about a device."
#: shown under a table with clifford figures (the label of toposcout.compiler.clifford, shortened).
CLIFFORD_NOTE = ("F clifford (est.): an estimate from the Clifford twin (angles rounded to multiples of pi/2, "
                 "Pauli-twirled noise), not the exact state fidelity; '±' its sampling error (none when the twin "
                 "is computed exactly); '<' marks an upper bound (no shot returned).")


def rows_table(rows: list[dict]) -> str:
    """The terminal table: the compile columns always, the noise columns when a row has them (with the
    standard error, clique marginals and clifford estimate when present), the method, the requirement."""
    names: list[str] = list(TABLE_COLUMNS["compile"])
    if any("state_fidelity" in r or r.get("method") for r in rows):
        names += [*TABLE_COLUMNS["noise"], "_budget"]
    if any(r.get("state_fidelity_se") is not None for r in rows):
        names.insert(names.index("state_fidelity") + 1, "state_fidelity_se")
    if any(r.get("clique_hellinger_mean") is not None for r in rows):
        names.append("_clique")
    if any(r.get("clifford_state_fidelity") is not None for r in rows):
        names.append("_clifford")
    if len({r.get("family") for r in rows if r.get("family")}) > 1:  # a family comparison: side by side
        names.insert(1, "family")
    if any(r.get("angles_fitted") for r in rows):
        names += ["angles_fitted", "fit_loss_value"]
    if any(r.get("kl_target_ideal") is not None for r in rows):
        names += ["kl_target_ideal", "kl_target_noisy"]
    if any(r.get("method") for r in rows):
        names.append("method")
    if any(r.get("threshold_two_qubit_error") is not None for r in rows):
        names += TABLE_COLUMNS["requirement"]
    if any(r.get("device") or r.get("esp_count_placement") is not None for r in rows):
        names.append("placement_objective")
    if any(r.get("esp_count_placement") is not None for r in rows):
        names += ["esp_count_placement", "esp_error_placement"]
    if any(r.get("chip_regions") for r in rows):
        names += ["chip_region_rank", "chip_region_esp"]
    if any(r.get("esp_jitter_median") is not None for r in rows):
        names.append("_jitter")
    composite = {"_budget": "loss 2q/1q/idle/ro", "_clique": "F clique mean/min", "_clifford": "F clifford (est.)",
                 "_jitter": "ESP drift p10/med/p90"}
    cols = [(composite[k], k) if k in composite else (FIELDS[k].header, k) for k in names]

    def cell(r: dict, key: str) -> str:
        if key == "_budget":
            parts = [r.get(k) for k in ("budget_two_qubit", "budget_one_qubit", "budget_idle", "budget_readout")]
            return "/".join("-" if p is None else f"{p:.3f}" for p in parts) if any(p is not None for p in parts) else ""
        if key == "_clique":
            a, b = r.get("clique_hellinger_mean"), r.get("clique_hellinger_min")
            return "" if a is None else f"{a:.4g}/{b:.4g}"
        if key == "_jitter":
            a, b, c = (r.get(k) for k in ("esp_jitter_p10", "esp_jitter_median", "esp_jitter_p90"))
            return "" if b is None else f"{a:.3g}/{b:.3g}/{c:.3g}"
        if key == "_clifford":
            f, se = r.get("clifford_state_fidelity"), r.get("clifford_state_fidelity_se")
            if f is None:
                return ""
            if r.get("clifford_upper_bound"):
                return f"<{f:.3g}"
            return f"~{f:.3g}" if r.get("clifford_estimator") == "exact stabilizer average" else f"~{f:.3g}±{se or 0:.2g}"
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
    notes = []
    for r, b in zip(rows, body):
        if len(b) == len(cols):
            lines.append("  ".join(x.ljust(w) for x, w in zip(b, widths)))
            if r.get("noise_error"):
                notes.append(f"{r.get('connectivity')} (scale {r.get('noise_scale')}): no noise figures: "
                             f"{r['noise_error']}")
        else:
            lines.append(f"{b[0]}  {b[1]}")
    if notes:
        lines += [""] + notes
    if any(r.get("clifford_state_fidelity") is not None for r in rows):
        lines.append(CLIFFORD_NOTE)
    return "\n".join(lines)


def _flatten(row: dict) -> dict:
    out = {}
    for k, v in row.items():
        out[k] = json.dumps(v, sort_keys=True) if isinstance(v, (dict, list)) else v
    return out


_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def neutralise_cell(value: Any) -> Any:
    """A CSV cell that a spreadsheet will not run as a formula: a *string* beginning with
    = + - @, a tab or a carriage return gets a leading single quote (OWASP, "CSV Injection":
    prefix such cells with '). Numbers are left as they are, so -0.5 stays a number.

    >>> neutralise_cell("=HYPERLINK(1)"), neutralise_cell("-x"), neutralise_cell(-0.5), neutralise_cell("line-4")
    ("'=HYPERLINK(1)", "'-x", -0.5, 'line-4')
    """
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        return "'" + value
    return value


def write_csv(rows: list[dict], fh) -> None:
    """One column per field in the row definition's order (fields it does not know go last);
    every text cell goes through :func:`neutralise_cell` (names and messages can come from a client)."""
    columns = csv_columns(rows)
    w = csv.writer(fh)
    w.writerow([neutralise_cell(c) for c in columns])
    for r in rows:
        flat = _flatten(r)
        w.writerow([neutralise_cell(flat.get(c, "")) for c in columns])


def _sort_key(r: dict):
    return (r.get("error") is not None, r.get("two_qubit_gates") or 0, r.get("depth") or 0,
            str(r.get("connectivity")), r.get("noise_scale") or 0)


def sort_rows(rows: list[dict]) -> list[dict]:
    """Rows in the table's order: errors last, then by two-qubit count, depth, connectivity, scale.
    With several families (a family comparison), the families of one connectivity sit together."""
    if len({r.get("family") for r in rows if r.get("family")}) > 1:
        return sorted(rows, key=lambda r: (r.get("error") is not None, str(r.get("connectivity")),
                                           r.get("noise_scale") or 0, str(r.get("family"))))
    return sorted(rows, key=_sort_key)


def write_json(model_name: str, rows: list[dict], fh: IO[str], **extra: Any) -> None:
    """The rows as one JSON document with the model's name and the caution."""
    json.dump({"model": model_name, "caution": CAUTION, **extra, "rows": rows}, fh, indent=2, default=str)
    fh.write("\n")
