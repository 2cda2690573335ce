"""The command line: output formats, files written, and clear errors for bad input."""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
from pathlib import Path

import pytest

from service.cli import main

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
    proc = subprocess.run([sys.executable, "-m", "service.cli", "compare", path], capture_output=True, text=True,
                          cwd=ROOT)
    assert proc.returncode == 2
    assert "duplicate variable name" in proc.stderr and "Traceback" not in proc.stderr
