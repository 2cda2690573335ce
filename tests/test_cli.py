"""The command line: output formats, files written, and clear errors for bad input."""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
from pathlib import Path

import pytest

from toposcout.service.cli import main

ROOT = Path(__file__).resolve().parent.parent


def run(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main(list(argv), out=out, err=err)
    return code, out.getvalue(), err.getvalue()


def test_compare_json_fields():
    code, out, err = run("compare", "examples/warehouse-doors.uai", "--compile-only", "--strategy", "generic",
                         "--seeds", "1", "-c", "line", "-c", "all-to-all", "--json")
    assert code == 0, err
    doc = json.loads(out)
    rows = doc["rows"]
    assert [r["connectivity"] for r in rows] == ["line-6", "all-to-all-6"] or len(rows) == 2
    for r in rows:
        for key in ("two_qubit_gates", "swaps", "depth", "two_qubit_depth", "one_qubit_gates", "active_qubits",
                    "physical_qubits", "compile_seconds", "layout", "seed", "strategy"):
            assert key in r
        assert set(r["layout"]) == {f"v{i}" for i in range(6)}
    assert rows == sorted(rows, key=lambda r: r["two_qubit_gates"])


def test_compare_table_and_files(tmp_path):
    csv_path = tmp_path / "rows.csv"
    qdir = tmp_path / "circuits"
    code, out, err = run("compare", "examples/orchard-frost.json", "--compile-only", "--strategy", "generic",
                         "--seeds", "1", "-c", "line", "-c", "grid:3x3", "--csv", str(csv_path),
                         "--qasm-dir", str(qdir))
    assert code == 0, err
    assert "line-8" in out and "grid-3x3" in out and "2q" in out
    with open(csv_path) as fh:
        assert len(list(csv.DictReader(fh))) == 2
    names = sorted(p.name for p in qdir.iterdir())
    assert names == ["grid-3x3.qasm", "grid-3x3.qpy", "line-8.qasm", "line-8.qpy"]


def test_targets_lists_everything():
    code, out, _ = run("targets")
    assert code == 0
    for name in ("line", "ring", "grid", "heavy-hex", "all-to-all", "custom", "cx", "cz", "rzz"):
        assert name in out


def write(tmp_path: Path, name: str, content) -> str:
    p = tmp_path / name
    p.write_text(content if isinstance(content, str) else json.dumps(content))
    return str(p)


BAD = [
    ("unknown variable", "m.json", {"variables": ["a"], "cliques": [["a", "b"]]}, [], "unknown variable 'b'"),
    ("repeated in clique", "m.json", {"variables": ["a", "b"], "cliques": [["a", "a"]]}, [], "repeated"),
    ("factor length", "m.json", {"variables": ["a", "b"], "cliques": [["a", "b"]],
                                 "factors": [{"scope": ["a", "b"], "values": [1, 2]}]}, [], "needs 2**2 = 4"),
    ("non-positive", "m.json", {"variables": ["a"], "factors": [{"scope": ["a"], "values": [0, 1]}]}, [], "positive"),
    ("non-binary uai", "m.uai", "MARKOV\n2\n2 3\n1\n2 0 1\n\n6\n1 1 1 1 1 1\n", [], "binary variables only"),
    ("empty model", "m.json", {"variables": []}, [], "no variables"),
    ("empty file", "m.json", "", [], "empty"),
    ("duplicate names", "m.json", {"variables": ["a", "a"]}, [], "duplicate variable name"),
    ("too many variables", "m.json", {"variables": [f"v{i}" for i in range(9)]}, ["--max-variables", "8"],
     "cap of 8"),
    ("huge clique", "m.json", {"variables": [f"v{i}" for i in range(30)], "cliques": [[f"v{i}" for i in range(30)]]},
     [], "max_order"),
    ("broken json", "m.json", '{"variables": [', [], "not valid JSON"),
    ("nan", "m.json", '{"variables": ["a"], "parameters": {"terms": {"a": NaN}}}', [], "NaN"),
    ("unknown connectivity", "m.json", {"variables": ["a", "b"]}, ["-c", "moebius"], "unknown connectivity"),
    ("does not fit", "m.json", {"variables": ["a", "b", "c"]}, ["-c", "line:2"], "3 variables but line-2"),
    ("bad seeds", "m.json", {"variables": ["a", "b"]}, ["--seeds", "0"], "seeds"),
    ("bad flag value", "m.json", {"variables": ["a", "b"]}, ["--seeds", "many"], "invalid int value"),
]


@pytest.mark.parametrize("label,name,content,extra,needle", BAD, ids=[b[0] for b in BAD])
def test_bad_input_clear_message_nonzero_exit(tmp_path, label, name, content, extra, needle):
    path = write(tmp_path, name, content)
    code, out, err = run("compare", path, "--compile-only", "--strategy", "generic", "--seeds", "1",
                         "-c", "line", *extra) if "-c" not in extra else run(
        "compare", path, "--compile-only", "--strategy", "generic", *extra)
    assert code != 0
    assert needle in err
    assert "Traceback" not in err + out


def test_missing_file_message():
    code, _, err = run("compare", "/nonexistent/model.json", "--compile-only")
    assert code == 2 and "does not exist" in err


def test_console_script_runs_without_traceback(tmp_path):
    # The installed entry point, as a user runs it: a bad file gives a message and exit 2.
    path = write(tmp_path, "m.json", {"variables": ["a", "a"]})
    proc = subprocess.run([sys.executable, "-m", "toposcout.service.cli", "compare", path], capture_output=True, text=True,
                          cwd=ROOT)
    assert proc.returncode == 2
    assert "duplicate variable name" in proc.stderr and "Traceback" not in proc.stderr


# --------------------------------------------------------------------------- the noise study

SMALL = {"name": "pantry-doors", "variables": ["d0", "d1", "d2", "d3"],
         "cliques": [["d0", "d1"], ["d1", "d2", "d3"]]}


def test_noise_rows_in_json(tmp_path):
    path = write(tmp_path, "m.json", SMALL)
    code, out, err = run("compare", path, "-c", "line", "-c", "all-to-all", "--profile", "trapped_ion",
                         "--strategy", "generic", "--seeds", "1", "--json")
    assert code == 0, err
    doc = json.loads(out)
    assert "not a promise about a device" in doc["caution"]
    for r in doc["rows"]:
        assert r["profile"] == "trapped_ion"
        for key in ("state_fidelity", "hellinger_fidelity", "tvd", "kl_ideal_noisy", "mmd", "esp", "duration_us",
                    "budget_two_qubit", "budget_one_qubit", "budget_idle", "budget_readout"):
            assert key in r, key
        assert 0 < r["state_fidelity"] < 1 and 0 < r["hellinger_fidelity"] <= 1


def test_noise_sweep_and_threshold(tmp_path):
    path = write(tmp_path, "m.json", SMALL)
    code, out, err = run("compare", path, "-c", "line", "--strategy", "generic", "--seeds", "1",
                         "--noise-scale", "0", "--noise-scale", "1", "--noise-scale", "4",
                         "--fidelity-target", "0.8", "--json")
    assert code == 0, err
    rows = sorted(json.loads(out)["rows"], key=lambda r: r["noise_scale"])
    assert [r["noise_scale"] for r in rows] == [0.0, 1.0, 4.0]
    # at noise_scale 0 every fidelity is 1; fidelity falls as the scale grows
    assert rows[0]["state_fidelity"] == pytest.approx(1.0, abs=1e-9)
    assert rows[0]["state_fidelity"] > rows[1]["state_fidelity"] > rows[2]["state_fidelity"]
    with_threshold = [r for r in rows if r.get("threshold_two_qubit_error") is not None]
    assert len(with_threshold) == 1
    assert with_threshold[0]["fidelity_at_threshold"] >= 0.8


def test_table_shows_fidelity_and_caution(tmp_path):
    path = write(tmp_path, "m.json", SMALL)
    code, out, err = run("compare", path, "-c", "ring", "--strategy", "generic", "--seeds", "1")
    assert code == 0, err
    assert "F state" in out and "loss 2q/1q/idle/ro" in out and "not a promise about a device" in out


def test_own_profile_file(tmp_path):
    src = (ROOT / "topologies" / "profiles" / "superconducting.toml").read_text()
    good = tmp_path / "lab.toml"
    good.write_text(src.replace('name = "superconducting"', 'name = "lab-chip"'))
    path = write(tmp_path, "m.json", SMALL)
    code, out, err = run("compare", path, "-c", "line", "--strategy", "generic", "--seeds", "1",
                         "--profile", str(good), "--json")
    assert code == 0, err
    assert {r["profile"] for r in json.loads(out)["rows"]} == {"lab-chip"}


def test_impossible_profile_is_refused(tmp_path):
    src = (ROOT / "topologies" / "profiles" / "superconducting.toml").read_text()
    bad = tmp_path / "bad.toml"
    bad.write_text(src.replace("t2_us = 120.0", "t2_us = 400.0"))
    path = write(tmp_path, "m.json", SMALL)
    code, out, err = run("compare", path, "-c", "line", "--profile", str(bad))
    assert code == 2
    assert "T2" in err and "Traceback" not in err


def test_unknown_profile_name(tmp_path):
    path = write(tmp_path, "m.json", SMALL)
    code, _, err = run("compare", path, "-c", "line", "--profile", "quantum-toaster")
    assert code == 2 and "quantum-toaster" in err


def test_over_budget_forced_density_matrix_is_refused_and_auto_falls_back(tmp_path):
    path = write(tmp_path, "m.json", SMALL)
    # forced density-matrix: no row could run (one qubit per variable is already over): exit 2 before work
    code, out, err = run("compare", path, "-c", "line", "--strategy", "generic", "--seeds", "1",
                         "--memory-budget", "0.00001", "--method", "density-matrix", "--json")
    assert code == 2 and "density-matrix" in err and "GiB" in err and "trajectories" in err
    # auto: the row is computed by another method and says why
    code, out, err = run("compare", path, "-c", "line", "--strategy", "generic", "--seeds", "1",
                         "--memory-budget", "0.00001", "--precision", "0.1", "--json")
    (row,) = json.loads(out)["rows"]
    assert code == 0 and row["error"] is None and row["noise_error"] is None
    assert row["method"] == "trajectories" and "over the memory budget" in row["method_reason"]


def test_custom_connectivity_from_the_example_edge_list():
    code, out, err = run("compare", "examples/orchard-frost.json", "-c", "custom:examples/ladder-chip.edges",
                         "--compile-only", "--json")
    assert code == 0, err
    (row,) = json.loads(out)["rows"]
    assert row["connectivity"] == "ladder-chip" and row["physical_qubits"] == 10  # named by the file's stem
    assert set(row["layout"].values()) <= set(range(10))


@pytest.mark.parametrize("extra, needle", [
    (("--fidelity-target", "1.5"), "--fidelity-target"),
    (("--fidelity-target", "1.5", "--compile-only"), "--fidelity-target"),
    (("--profile", "quantum-toaster", "--compile-only"), "--profile"),
    (("--layers", "9"), "--layers"),
    (("--seeds", "17"), "--seeds"),
    (("--requirement-tolerance", "0", "--fidelity-target", "0.8"), "--requirement-tolerance"),
])
def test_bad_options_refused_before_any_work(tmp_path, monkeypatch, extra, needle):
    # Validation before work: the study must not start (no task runs), exit 2, the option named.
    import toposcout.service.execution.runner as runner

    def no_work(*a, **k):
        raise AssertionError("a task ran before the options were checked")

    monkeypatch.setattr(runner, "run_tasks", no_work)
    path = write(tmp_path, "m.json", SMALL)
    code, out, err = run("compare", path, "-c", "line", *extra)
    assert code == 2, err
    assert needle in err and "Traceback" not in err


def test_one_fidelity_target_default_for_a_sweep(tmp_path, monkeypatch):
    # The CLI takes its default from compiler.options, as make_tasks does for the API and client.
    from toposcout.compiler.options import DEFAULT_FIDELITY_TARGET
    import toposcout.service.execution.runner as runner

    seen = {}

    def capture(tasks, **k):
        seen["tasks"] = tasks
        return [{"connectivity": "line", "error": "not run"} for _ in tasks]

    monkeypatch.setattr(runner, "run_tasks", capture)
    path = write(tmp_path, "m.json", SMALL)
    run("compare", path, "-c", "line", "--noise-scale", "1", "--noise-scale", "2", "--json")
    assert seen["tasks"][0]["fidelity_target"] == DEFAULT_FIDELITY_TARGET
    run("compare", path, "-c", "line", "--json")
    assert seen["tasks"][0].get("fidelity_target") is None


@pytest.mark.parametrize("strategy", ["generic", "structured"])
def test_qasm_dir_qpy_keeps_the_layout_of_either_strategy(tmp_path, strategy):
    # Reference library: qiskit's QPY reader and TranspileLayout; the layout read back must be the
    # row's layout (variable -> physical qubit at the start and at the end).
    from qiskit import qpy

    qdir = tmp_path / "circuits"
    code, out, err = run("compare", "examples/orchard-frost.json", "--compile-only", "--strategy", strategy,
                         "--seeds", "1", "-c", "line", "--qasm-dir", str(qdir), "--json")
    assert code == 0, err
    (row,) = json.loads(out)["rows"]
    assert row["strategy"] == strategy
    with open(qdir / "line-8.qpy", "rb") as fh:
        (circuit,) = qpy.load(fh)
    assert circuit.layout is not None
    variables = list(row["layout"])
    assert circuit.layout.initial_index_layout(filter_ancillas=True) == [row["layout"][v] for v in variables]
    assert circuit.layout.final_index_layout() == [row["final_layout"][v] for v in variables]


def test_two_custom_graphs_of_one_size_keep_apart_names_and_files(tmp_path):
    # Two different 10-qubit graphs used to share the name custom-10: one .qpy overwrote the other.
    a = tmp_path / "a"
    b = tmp_path / "b"
    a.mkdir()
    b.mkdir()
    (a / "chip.edges").write_text((ROOT / "examples" / "ladder-chip.edges").read_text())
    (b / "chip.edges").write_text("\n".join(f"{i} {i + 1}" for i in range(9)))  # a 10-qubit line
    qdir = tmp_path / "circuits"
    code, out, err = run("compare", "examples/orchard-frost.json", "-c", f"custom:{a / 'chip.edges'}",
                         "-c", f"custom:{b / 'chip.edges'}", "-c", f"custom:lab={b / 'chip.edges'}",
                         "--compile-only", "--strategy", "generic", "--seeds", "1", "--json", "--qasm-dir", str(qdir))
    assert code == 0, err
    names = sorted(r["connectivity"] for r in json.loads(out)["rows"])
    assert names == ["chip", "chip-2", "lab"]
    assert sorted(p.name for p in qdir.glob("*.qpy")) == ["chip-2.qpy", "chip.qpy", "lab.qpy"]
    # an explicit name given to two different graphs is refused, before any work
    code, out, err = run("compare", "examples/orchard-frost.json", "-c", f"custom:lab={a / 'chip.edges'}",
                         "-c", f"custom:lab={b / 'chip.edges'}", "--compile-only")
    assert code == 2 and "'lab'" in err and "custom:NAME=FILE" in err


def test_one_study_holds_several_profiles(tmp_path):
    path = write(tmp_path, "m.json", SMALL)
    code, out, err = run("compare", path, "-c", "line", "-c", "ring", "--profile", "superconducting", "--profile",
                         "trapped_ion", "--strategy", "generic", "--seeds", "1", "--json")
    assert code == 0, err
    rows = json.loads(out)["rows"]
    assert sorted((r["connectivity"], r["profile"]) for r in rows) == [
        ("line-4", "superconducting"), ("line-4", "trapped_ion"), ("ring-4", "superconducting"),
        ("ring-4", "trapped_ion")]
    by = {(r["connectivity"], r["profile"]): r for r in rows}
    # the same compiled circuit under two device classes: equal compile figures, different noise figures
    assert by[("line-4", "superconducting")]["two_qubit_gates"] == by[("line-4", "trapped_ion")]["two_qubit_gates"]
    assert by[("line-4", "superconducting")]["state_fidelity"] != by[("line-4", "trapped_ion")]["state_fidelity"]
    code, _, err = run("compare", path, "-c", "line", "--profile", "trapped_ion", "--profile", "trapped_ion")
    assert code == 2 and "given twice" in err
    code, _, err = run("compare", path, "-c", "line", "--profile", "trapped_ion", "--profile", "toaster",
                       "--compile-only")
    assert code == 2 and "toaster" in err
