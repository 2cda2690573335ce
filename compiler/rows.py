"""What a row is: every field a study's row can carry, with its meaning, unit and kind.

One definition read everywhere a row is shown: the API's response schema, the CLI table, the
CSV column order, the dashboard's table and the README's field table (a test compares them).
A row is a plain JSON-able dict made by :func:`toposcout.compiler.study.run_task`; a field that
does not apply to a row is absent or ``null``.

>>> FIELDS["two_qubit_gates"].unit
'gates'
>>> [f.name for f in ROW_FIELDS if f.group == "task"][:3]
['connectivity', 'connectivity_family', 'noise_scale']
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["RowField", "ROW_FIELDS", "FIELDS", "GROUPS", "TABLE_COLUMNS", "DASHBOARD_COLUMNS", "csv_columns",
           "markdown_table"]


@dataclass(frozen=True)
class RowField:
    """One field of a row.

    kind: the JSON type of a value (``int``, ``float``, ``str``, ``bool``, ``object``, ``list``);
    ``null`` is always allowed. short: the terminal table's header; label: the dashboard's."""

    name: str
    meaning: str
    unit: str = ""
    kind: str = "float"
    short: str = ""
    group: str = "noise"
    label: str = ""

    @property
    def header(self) -> str:
        """The terminal table's column header."""
        return self.short or self.name

    @property
    def title(self) -> str:
        """The dashboard's and the charts' name for the field."""
        return self.label or self.short or self.name.replace("_", " ")


#: the groups in the order a row is read: what was asked, what it compiled to, what noise does
GROUPS = {
    "task": "what the row is about",
    "logical": "the logical circuit before compilation",
    "compile": "the compiled circuit",
    "noise": "the noise study (absent with --compile-only)",
    "budget": "the error budget: what each noise source costs",
    "requirement": "the fidelity-target requirement",
    "timing": "wall-clock times and what was run",
    "outcome": "how the row ended",
}

_F = RowField
ROW_FIELDS: tuple[RowField, ...] = (
    _F("connectivity", "connectivity instance name, family and size (e.g. grid-3x3)", kind="str",
       short="connectivity", group="task"),
    _F("connectivity_family", "connectivity family (line, ring, grid, heavy-hex, all-to-all, custom)", kind="str",
       short="family", group="task"),
    _F("noise_scale", "factor on every error rate and relaxation rate of the profile", "×", short="scale",
       group="task", label="noise scale"),
    _F("gate_set", "native gate set the circuit was translated to", kind="str", short="gates", group="task"),
    _F("strategy_requested", "compilation strategy asked for (generic, structured, auto)", kind="str",
       group="task"),
    _F("strategy", "compilation strategy that produced the circuit", kind="str", short="strategy", group="task"),
    _F("model", "model name", kind="str", group="task"),
    _F("family", "ansatz family (which clique subsets get a rotation)", kind="str", group="task"),
    _F("layers", "repetitions of the rotation block and single-qubit layer", "layers", "int", group="task"),
    _F("angles_fitted", "true when this study fitted the angles to the target first (compare --fit, the API's fit "
       "block); false otherwise (see angles_source)", kind="bool", short="fitted", group="task"),
    _F("angles_source", "where the angles came from: fitted (by this study), model (the model file's parameters, "
       "e.g. written by toposcout fit; seeded where it gives none) or seeded (the seeded generator)", kind="str",
       group="task"),
    _F("fit_loss", "loss the angles were fitted by: kl (exact target) or mmd (samples)", kind="str", group="task"),
    _F("fit_loss_value", "final value of that loss after the fit (KL in nats, or unbiased MMD²)", "", group="task",
       short="fit loss"),
    _F("fit_key", "SHA-256 key of the fit (model, family, layers, loss, data, seed and optimiser options)",
       kind="str", group="task"),
    _F("fit_parameters", "the fitted angles in the model format's parameters shape (terms, rotations)",
       kind="object", group="task"),
    _F("fit_restart_losses", "final loss of each restart of the fit, in restart order", kind="list", group="task"),
    _F("fit_curve", "the fit's loss after each iteration of its best restart", kind="list", group="task"),
    _F("fit_seconds", "wall time of the fit in the worker (0 when memoised from an earlier row)", "s",
       group="timing"),
    _F("seed", "transpiler seed of the kept compilation", kind="int", group="task"),
    _F("profile", "device profile whose typical values the noise model uses", kind="str", short="profile",
       group="task"),
    _F("method_requested", "simulation method asked for (auto, density-matrix, trajectories, clifford)", kind="str",
       group="task"),
    _F("method", "simulation method that computed the noise figures", kind="str", short="method", group="task"),
    _F("method_reason", "why that method was chosen, with the estimates that decided", kind="str", group="task"),
    _F("variables", "model variables (= logical qubits)", "qubits", "int", group="logical"),
    _F("terms", "Z-string rotations in the diagonal block", "terms", "int", group="logical"),
    _F("lower_bound_two_qubit", "terms of order ≥ 2 times layers: no circuit needs fewer two-qubit gates",
       "gates", "int", group="logical"),
    _F("logical_cnots", "CNOTs of the logical circuit (CNOT ladders, before routing)", "gates", "int",
       group="logical"),
    _F("logical_depth", "depth of the logical circuit", "layers", "int", group="logical"),
    _F("physical_qubits", "qubits of the connectivity instance", "qubits", "int", "phys", "compile", label="qubits"),
    _F("active_qubits", "qubits the compiled circuit touches", "qubits", "int", "active", "compile"),
    _F("two_qubit_gates", "two-qubit gates of the compiled circuit", "gates", "int", "2q", "compile", label="2q gates"),
    _F("two_qubit_by_gate", "two-qubit gate name → count in the compiled circuit (devices whose couplers have "
       "different native gates)", "gates", "object", group="compile"),
    _F("swaps", "SWAPs routing inserted (before later optimisation merged any)", "gates", "int", "swaps",
       "compile", label="SWAPs"),
    _F("depth", "depth of the compiled circuit without measurement", "layers", "int", "depth", "compile"),
    _F("two_qubit_depth", "depth counting two-qubit gates only", "layers", "int", "2q-depth", "compile", label="2q depth"),
    _F("one_qubit_gates", "single-qubit gates of the compiled circuit", "gates", "int", "1q", "compile"),
    _F("layout", "variable → physical qubit at the start", kind="object", group="compile"),
    _F("final_layout", "variable → physical qubit where it is measured", kind="object", group="compile"),
    _F("swap_edges", "coupler \"a-b\" → SWAPs routing inserted there", kind="object", group="compile"),
    _F("placement", "how the structured strategy placed the variables", kind="str", group="compile"),
    _F("synthesis", "how the structured strategy synthesised the diagonal block", kind="str", group="compile"),
    _F("synthesis_cnots", "CNOTs the structured synthesis emitted", "gates", "int", group="compile"),
    _F("synthesis_zz", "native ZZ rotations the structured synthesis emitted", "gates", "int", group="compile"),
    _F("region_qubits", "qubits of the region the structured strategy worked in", "qubits", "int",
       group="compile"),
    _F("generic_two_qubit_gates", "two-qubit gates of the generic candidate (auto strategy)", "gates", "int",
       group="compile"),
    _F("structured_two_qubit_gates", "two-qubit gates of the structured candidate (auto strategy)", "gates",
       "int", group="compile"),
    _F("generic_depth", "depth of the generic candidate (auto strategy)", "layers", "int", group="compile"),
    _F("structured_depth", "depth of the structured candidate (auto strategy)", "layers", "int",
       group="compile"),
    _F("auto_winner", "the candidate the auto strategy kept", kind="str", group="compile"),
    _F("device", "device file whose chip and per-element figures the row uses", kind="str", short="device",
       group="task"),
    _F("placement_objective", "what placement optimised: errors (estimated success probability under the "
       "per-qubit and per-coupler figures) or count (fewest two-qubit gates)", kind="str", short="placed by",
       group="compile"),
    _F("esp_error_placement", "ESP of the error-aware compilation (rows with per-element figures)", short="ESP err",
       group="compile"),
    _F("esp_count_placement", "ESP of the count-only compilation (rows with per-element figures)", short="ESP cnt",
       group="compile"),
    _F("placement_esp_gain", "esp_error_placement / esp_count_placement: what error-aware placement bought", "×",
       group="compile"),
    _F("chip_regions", "regions of the chip compiled and ranked by ESP (--regions)", "regions", "int",
       group="compile"),
    _F("chip_region_rank", "this row's region by ESP among chip_regions (0 = best)", kind="int", short="rank",
       group="compile"),
    _F("chip_region", "physical qubits this row's region uses", kind="list", group="compile"),
    _F("chip_region_esp", "ESP of this row's region", short="ESP region", group="compile"),
    _F("chip_region_esp_best", "ESP of the best region", group="compile"),
    _F("chip_region_esp_median", "ESP of the median region", group="compile"),
    _F("chip_region_esp_worst", "ESP of the worst region", group="compile"),
    _F("chip_region_best", "physical qubits of the best region", kind="list", group="compile"),
    _F("chip_region_median", "physical qubits of the median region", kind="list", group="compile"),
    _F("chip_region_worst", "physical qubits of the worst region", kind="list", group="compile"),
    _F("jitter_sigma", "log-normal sigma of the calibration-drift redraws (--jitter)", kind="float", group="noise"),
    _F("jitter_samples", "redraws of the figures for the drift spread", "samples", "int", group="noise"),
    _F("esp_jitter_median", "median ESP of the row's circuit over the redrawn figures", group="noise"),
    _F("esp_jitter_p10", "10th percentile of the ESP over the redrawn figures", group="noise"),
    _F("esp_jitter_p90", "90th percentile of the ESP over the redrawn figures", group="noise"),
    _F("compile_reused", "true when the compiled circuit was reused from an earlier row of the same study "
       "(noise-scale sweeps)", kind="bool", group="compile"),
    _F("state_fidelity", "⟨ψ|ρ|ψ⟩ of the pre-measurement state against the ideal one", "", short="F state", label="state fidelity"),
    _F("state_fidelity_se", "standard error of state_fidelity (trajectories)", short="±F", label="± state fidelity"),
    _F("log10_state_fidelity", "log10 of the state fidelity (compares large models where F is tiny)",
       short="log10 F", label="log10 F"),
    _F("state_fidelity_scope", "what the trajectories' state fidelity is taken over (all active qubits, or the "
       "measured ones)", kind="str"),
    _F("hellinger_fidelity", "Hellinger fidelity of the measured distribution over the variables to the ideal one",
       short="F hell", label="Hellinger fidelity"),
    _F("tvd", "total variation distance between noisy and ideal distributions", short="TVD"),
    _F("kl_ideal_noisy", "KL(ideal ‖ noisy); null when infinite", "nats", short="KL"),
    _F("mmd", "maximum mean discrepancy, mean of Gaussian kernels on the Hamming distance (σ = 0.5, 1, 2)"),
    _F("kl_target_ideal", "KL(target ‖ ideal) with the model's factor tables as target", "nats", short="KL tgt ideal"),
    _F("kl_target_noisy", "KL(target ‖ noisy) with the model's factor tables as target", "nats", short="KL tgt noisy"),
    _F("esp", "estimated success probability: product over operations of (1 − error), idle and readout included",
       short="ESP"),
    _F("esp_two_qubit", "the ESP factor of two-qubit gates"),
    _F("esp_one_qubit", "the ESP factor of single-qubit gates"),
    _F("esp_idle", "the ESP factor of idle decay"),
    _F("esp_readout", "the ESP factor of readout"),
    _F("hellinger_fidelity_se", "standard error of hellinger_fidelity (trajectories; delete-one jackknife)"),
    _F("hellinger_fidelity_bias", "jackknife estimate of the bias of hellinger_fidelity (trajectories)"),
    _F("tvd_se", "standard error of tvd (trajectories)"),
    _F("tvd_bias", "jackknife estimate of the bias of tvd (trajectories)"),
    _F("kl_ideal_noisy_se", "standard error of kl_ideal_noisy (trajectories)", "nats"),
    _F("kl_ideal_noisy_bias", "jackknife estimate of the bias of kl_ideal_noisy (trajectories)", "nats"),
    _F("mmd_se", "standard error of mmd (trajectories)"),
    _F("mmd_bias", "jackknife estimate of the bias of mmd (trajectories)"),
    _F("clique_hellinger_mean", "mean over the model's cliques of the Hellinger fidelity of the clique's marginal",
       short="clq mean", label="clique F mean"),
    _F("clique_hellinger_mean_se", "standard error of clique_hellinger_mean (trajectories)"),
    _F("clique_hellinger_min", "the smallest clique-marginal Hellinger fidelity", short="clq min",
       label="clique F min"),
    _F("clique_hellinger_min_se", "standard error of clique_hellinger_min (trajectories)"),
    _F("clique_hellinger_worst", "the clique with the smallest marginal fidelity (variable names joined by \",\")",
       kind="str", label="worst clique"),
    _F("clique_hellinger", "per clique: {clique: [names], fidelity, se (trajectories)}", kind="list"),
    _F("trajectories", "trajectories run", "trajectories", "int", short="traj"),
    _F("distribution_trajectories", "trajectories behind the full-distribution figures (Hellinger, TVD, KL, MMD): "
       "all of them, or with matrix product states above 12 variables the first 128 (shared out among the "
       "parts of a split row; saving 2^k probabilities costs far more than the trajectory)", "trajectories", "int"),
    _F("trajectory_method", "qiskit-aer method of the trajectories (statevector, matrix_product_state)", kind="str"),
    _F("trajectories_stop", "why the trajectories stopped (count reached, precision reached, time budget)",
       kind="str"),
    _F("mps_max_bond_dimension", "bond-dimension cap of the matrix-product-state trajectories", "", "int"),
    _F("mps_truncation_threshold", "discarded-weight threshold of the matrix-product-state truncation"),
    _F("mps_bond_dimension_reached", "largest bond dimension the trajectories reached", "", "int"),
    _F("mps_truncated", "true when the bond cap was reached (the state was truncated)", kind="bool"),
    _F("clifford_state_fidelity", "ESTIMATE of the state fidelity from the stabilizer simulation of the Clifford "
       "twin (rotations rounded to multiples of π/2, Pauli-twirled noise)", short="F cliff",
       label="clifford F (estimate)"),
    _F("clifford_state_fidelity_se", "standard error of clifford_state_fidelity (shot noise, or the spread of the "
       "weighted average; 0 when exact)"),
    _F("clifford_log10_state_fidelity", "log10 of clifford_state_fidelity"),
    _F("clifford_read_fidelity", "ESTIMATE with readout error included (returns counted after noisy measurement)"),
    _F("clifford_read_fidelity_se", "standard error of clifford_read_fidelity"),
    _F("clifford_estimator", "how the clifford estimate was formed: counted returns (shots), weighted stabilizer "
       "average (importance-sampled, when returns are too rare to count), or exact stabilizer average (small "
       "span)", kind="str"),
    _F("clifford_samples", "stabilizer-group elements drawn by the weighted average", "samples", "int"),
    _F("clifford_effective_samples", "Kong's effective sample size (Σw)²/Σw² of the weighted average (at least 100)",
       "samples"),
    _F("clifford_shots", "shots of the clifford estimate (0 for a stabilizer average)", "shots", "int"),
    _F("clifford_returns", "shots that returned to the start (counted returns only)", "shots", "int"),
    _F("clifford_upper_bound", "true when no shot returned: clifford_state_fidelity is then the one-sided 95 % "
       "upper bound 1 − 0.05^(1/shots), not zero", kind="bool"),
    _F("clifford_rel_se_target", "relative standard error the shots were chosen for"),
    _F("clifford_rounded_rotations", "rotations whose angle was rounded to a multiple of π/2", "gates", "int"),
    _F("clifford_checked_stabilizers", "stabilizers checked when counting returns", "", "int"),
    _F("clifford_seconds", "wall time of the clifford estimate", "s"),
    _F("clifford_label", "the caution shown beside every clifford figure", kind="str"),
    _F("duration_us", "schedule length including the final measurement", "µs", short="us", label="duration (µs)"),
    _F("budget_two_qubit", "Hellinger fidelity gained when two-qubit gate noise is switched off", group="budget"),
    _F("budget_one_qubit", "Hellinger fidelity gained when single-qubit gate noise is switched off", group="budget"),
    _F("budget_idle", "Hellinger fidelity gained when idle relaxation is switched off", group="budget"),
    _F("budget_readout", "Hellinger fidelity gained when readout error is switched off", group="budget"),
    _F("budget_state_two_qubit", "state fidelity gained when two-qubit gate noise is switched off",
       group="budget"),
    _F("budget_state_one_qubit", "state fidelity gained when single-qubit gate noise is switched off",
       group="budget"),
    _F("budget_state_idle", "state fidelity gained when idle relaxation is switched off", group="budget"),
    _F("budget_state_two_qubit_se", "standard error of budget_state_two_qubit (trajectories)", group="budget"),
    _F("budget_state_one_qubit_se", "standard error of budget_state_one_qubit (trajectories)", group="budget"),
    _F("budget_state_idle_se", "standard error of budget_state_idle (trajectories)", group="budget"),
    _F("clifford_budget_state_two_qubit", "clifford estimate of the state fidelity gained without two-qubit noise",
       group="budget"),
    _F("clifford_budget_state_two_qubit_se", "standard error of clifford_budget_state_two_qubit", group="budget"),
    _F("clifford_budget_state_one_qubit", "clifford estimate of the state fidelity gained without single-qubit "
       "noise", group="budget"),
    _F("clifford_budget_state_one_qubit_se", "standard error of clifford_budget_state_one_qubit", group="budget"),
    _F("clifford_budget_state_idle", "clifford estimate of the state fidelity gained without idle relaxation",
       group="budget"),
    _F("clifford_budget_state_idle_se", "standard error of clifford_budget_state_idle", group="budget"),
    _F("clifford_budget_readout", "clifford estimate of the fidelity gained without readout error", group="budget"),
    _F("error_budget_note", "why (part of) the error budget was not computed", kind="str", group="budget"),
    _F("fidelity_target", "state fidelity the requirement must reach", group="requirement"),
    _F("threshold_two_qubit_error", "largest two-qubit error (average gate infidelity) still reaching the target",
       short="2q err @F", group="requirement"),
    _F("threshold_noise_scale", "noise scale of that error (lower end of the bisection)", "×",
       group="requirement", label="threshold scale"),
    _F("upper_noise_scale", "a noise scale known to miss the target (upper end of the bisection)", "×",
       group="requirement"),
    _F("fidelity_at_threshold", "state fidelity at the threshold", group="requirement"),
    _F("evaluations", "simulations the bisection ran", "runs", "int", group="requirement"),
    _F("saturated", "true when even the largest physical scale keeps the target", kind="bool",
       group="requirement"),
    _F("threshold_method", "how the requirement was found (density-matrix bisection, or clifford)", kind="str",
       group="requirement"),
    _F("threshold_two_qubit_error_se", "standard error of threshold_two_qubit_error (clifford bisection)",
       group="requirement"),
    _F("threshold_bracket_two_qubit_error", "the bisection's final bracket [lower, upper] of two-qubit errors: the "
       "threshold lies in it (lower is the requirement)", kind="list", group="requirement"),
    _F("requirement_tolerance", "relative width (upper - lower) / upper the bisection stopped at", group="requirement"),
    _F("fidelity_at_threshold_se", "standard error of fidelity_at_threshold (clifford)", group="requirement"),
    _F("threshold_shots", "shots per evaluation of the clifford bisection", "shots", "int", group="requirement"),
    _F("threshold_label", "the caution shown beside a clifford requirement", kind="str", group="requirement"),
    _F("compile_seconds", "wall time of compilation", "s", short="compile s", group="timing"),
    _F("simulate_seconds", "wall time of the noise simulations", "s", group="timing"),
    _F("threshold_seconds", "wall time of the requirement's bisection", "s", group="timing"),
    _F("row_seconds", "wall time of the whole row", "s", group="timing"),
    _F("simulated_qubits", "qubits the simulation held (the active qubits)", "qubits", "int", group="timing"),
    _F("memory_estimate_bytes", "memory the density matrix was estimated to need", "bytes", "int",
       group="timing"),
    _F("time_estimate_seconds", "time the chosen method was estimated to take, stated before it ran", "s",
       group="timing"),
    _F("trajectory_seconds", "wall time of the trajectories (main run; split rows: summed over the parts)", "s",
       group="timing"),
    _F("row_parts", "parts the row's trajectories or clifford shots were split into, to run on that many "
       "workers at once (absent: one)", "parts", "int", group="timing"),
    _F("error", "null, or why this row failed (other rows still complete)", kind="str", group="outcome"),
    _F("error_field", "the input field or option the error is about", kind="str", group="outcome"),
    _F("noise_error", "null, or why the noise figures could not be computed (the compile figures stay), with "
       "what would work", kind="str", short="noise", group="outcome"),
    _F("noise_error_field", "the option the noise error is about", kind="str", group="outcome"),
)

FIELDS: dict[str, RowField] = {f.name: f for f in ROW_FIELDS}

#: the terminal table's columns: compile columns always, noise columns when a row has them
TABLE_COLUMNS: dict[str, tuple[str, ...]] = {
    "compile": ("connectivity", "strategy", "physical_qubits", "active_qubits", "two_qubit_gates", "swaps", "depth",
                "two_qubit_depth", "one_qubit_gates", "compile_seconds"),
    "noise": ("noise_scale", "state_fidelity", "hellinger_fidelity", "tvd", "kl_ideal_noisy", "esp", "duration_us"),
    "requirement": ("threshold_two_qubit_error",),
}

#: the dashboard's study table (the row number and status are the store's, not the row's)
DASHBOARD_COLUMNS: tuple[str, ...] = (
    "connectivity", "noise_scale", "strategy", "physical_qubits", "active_qubits", "two_qubit_gates", "swaps",
    "depth", "two_qubit_depth", "method", "state_fidelity", "state_fidelity_se", "log10_state_fidelity",
    "clifford_state_fidelity", "hellinger_fidelity", "tvd", "esp", "clique_hellinger_mean", "clique_hellinger_min",
    "clique_hellinger_worst", "duration_us", "threshold_noise_scale")


#: what a stored row carries besides the row itself (the store's bookkeeping): first in a CSV
STORE_COLUMNS: tuple[str, ...] = ("task_index", "status", "cached")


def csv_columns(rows: list[dict]) -> list[str]:
    """CSV columns: the store's bookkeeping columns, then the defined fields that occur in
    ``rows`` in definition order, then any others."""
    seen = {k for r in rows for k in r}
    lead = [k for k in STORE_COLUMNS if k in seen]
    known = [f.name for f in ROW_FIELDS if f.name in seen]
    extra = sorted(k for k in seen if k not in FIELDS and k not in STORE_COLUMNS)
    return lead + known + extra


def markdown_table() -> str:
    """The README's table of row fields, generated from :data:`ROW_FIELDS`."""
    lines = []
    for group, title in GROUPS.items():
        lines += [f"**{title[0].upper()}{title[1:]}**", "", "| field | meaning | unit |", "|---|---|---|"]
        lines += [f"| `{f.name}` | {f.meaning} | {f.unit} |" for f in ROW_FIELDS if f.group == group]
        lines.append("")
    return "\n".join(lines).rstrip() + "\n"
