"""`toposcout fit` and `compare --fit` (service/fitting.py, service/cli.py): files, reports, cache, bad input."""

from __future__ import annotations

import hashlib
import io
import json
from pathlib import Path

import numpy as np
import pytest

from toposcout.compiler.model import load_model, target_distribution
from toposcout.service.cli import main

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = ROOT / "examples"


def run(*argv: str) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    code = main([str(a) for a in argv], out=out, err=err)
    return code, out.getvalue(), err.getvalue()


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture
def chain_file(tmp_path) -> Path:
    d = {"name": "doors", "variables": ["a", "b", "c", "d"], "cliques": [["a", "b", "c"], ["c", "d"]],
         "factors": [{"scope": ["a", "b", "c"], "values": [3, 1, 1, 1, 1, 1, 1, 4]},
                     {"scope": ["c", "d"], "values": [2, 1, 1, 2]}]}
    path = tmp_path / "doors.json"
    path.write_text(json.dumps(d))
    return path


def _samples_csv(path: Path, model, n: int = 400, seed: int = 1) -> Path:
    p = target_distribution(model)
    idx = np.random.default_rng(seed).choice(p.size, size=n, p=p)
    lines = [",".join(model.variables)] + [",".join(str((x >> j) & 1) for j in range(model.num_variables))
                                           for x in idx]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_fit_writes_a_new_file_with_the_parameters_and_reports(chain_file, tmp_path):
    before = _digest(chain_file)
    out_file = tmp_path / "fitted.json"
    code, out, err = run("fit", chain_file, "--restarts", "2", "--out", out_file, "--json",
                         "--plot", tmp_path / "curve.svg")
    assert code == 0, err
    assert _digest(chain_file) == before  # the input is never overwritten without --in-place
    report = json.loads(out)
    assert [r["restart"] for r in report["restarts"]] == [0, 1]
    assert all(r["iterations"] > 0 and r["curve"] for r in report["restarts"])
    assert report["final_loss"] == min(r["loss"] for r in report["restarts"])
    fitted = load_model(out_file)
    assert set(fitted.parameters["terms"]) == {"a", "b", "c", "a,b", "a,c", "b,c", "a,b,c", "d", "c,d"}
    # the written angles give the reported KL: recomputed with qiskit's Statevector and metrics.kl_divergence
    from qiskit.quantum_info import Statevector

    from toposcout.compiler.ansatz import build_ansatz
    from toposcout.compiler.metrics import kl_divergence

    p = Statevector(build_ansatz(fitted).circuit(measure=False)).probabilities()
    assert kl_divergence(target_distribution(fitted), p) == pytest.approx(report["kl_target"], abs=1e-9)
    assert (tmp_path / "curve.svg").read_text().lstrip().startswith("<?xml")
    code, out, err = run("fit", chain_file, "--restarts", "1", "--max-iter", "20")
    assert code == 0 and "final loss" in out and "KL(target ‖ fitted)" in out
    assert (tmp_path / "doors.fitted.json").exists() and _digest(chain_file) == before


def test_fit_in_place_and_mmd_from_data(chain_file, tmp_path):
    model = load_model(chain_file)
    data = _samples_csv(tmp_path / "samples.csv", model)
    code, out, err = run("fit", chain_file, "--data", data, "--kernel-bandwidths", "1", "2", "--restarts", "1",
                         "--in-place", "--json")
    assert code == 0, err
    report = json.loads(out)
    assert report["loss"] == "mmd" and report["mmd_data"] is not None and report["kl_target"] is not None
    assert load_model(chain_file).parameters is not None


@pytest.mark.parametrize("after", [10, 0])
def test_fit_interrupted_leaves_the_input_and_reports_the_best(chain_file, tmp_path, monkeypatch, after):
    import toposcout.compiler.fit as fit

    calls = {"n": 0}
    real = fit.Evaluator.value_and_grad

    def interrupted_after_ten(self, x, loss):
        calls["n"] += 1
        if calls["n"] > after:
            raise KeyboardInterrupt  # what Ctrl-C raises in the main thread
        return real(self, x, loss)

    monkeypatch.setattr(fit.Evaluator, "value_and_grad", interrupted_after_ten)
    before = _digest(chain_file)
    code, out, err = run("fit", chain_file, "--in-place")
    assert code == 130
    assert "interrupted" in out and "best parameters so far" in out
    assert _digest(chain_file) == before
    assert not (tmp_path / "doors.fitted.json").exists()
    best = json.loads(out.strip().splitlines()[-1])
    assert set(best) == {"terms", "rotations"}


@pytest.mark.parametrize("extra, text, message", [
    (["--loss", "hinge"], None, "--loss: unknown loss 'hinge'"),
    (["--restarts", "0"], None, "--restarts: restarts must be an integer >= 1"),
    (["--data", "@"], "a,b,c\n0,1,0\n1,0,1\n", "no column for variable 'd'"),
    (["--data", "@"], "a,b,c,d\n0,1,0,1\n1,0,2,1\n", "line 3: value '2' is not 0 or 1"),
    (["--data", "@"], "a,b,c,d\n0,1,0,1\n1,1,1,0\n", "column 'b' is constant"),
    (["--data", "@"], "a,b,c,d,e\n0,1,0,1,1\n", "column 'e' is not a variable"),
    (["--kernel-bandwidths", "0"], None, "bandwidths must be positive"),
    (["--plot", "x.gif"], None, "--plot needs a .png or .svg"),
])
def test_fit_bad_input_exits_2_naming_the_problem(chain_file, tmp_path, extra, text, message):
    if text is not None:
        (tmp_path / "data.csv").write_text(text)
        extra = [str(tmp_path / "data.csv") if a == "@" else a for a in extra]
    before = _digest(chain_file)
    code, out, err = run("fit", chain_file, *extra)
    assert code == 2, (out, err)
    assert message in err and "Traceback" not in err
    assert _digest(chain_file) == before


def test_fit_without_factors_or_data_and_in_place_on_uai(tmp_path):
    path = tmp_path / "bare.json"
    path.write_text(json.dumps({"variables": ["a", "b"], "cliques": [["a", "b"]]}))
    code, _, err = run("fit", path)
    assert code == 2 and "no factors" in err and "--data" in err
    code, _, err = run("fit", EXAMPLES / "warehouse-doors.uai", "--in-place")
    assert code == 2 and "--in-place" in err
    code, _, err = run("fit", EXAMPLES / "greenhouse-humidity-24.json")
    assert code == 2 and "at most 20 variables" in err


def test_compare_fit_caches_and_rows_say_fitted(chain_file, tmp_path):
    cache = tmp_path / "cache"
    args = ["compare", chain_file, "--fit", "--restarts", "1", "--family", "clique", "--family", "pairwise",
            "-c", "line", "-c", "all-to-all", "--compile-only", "--strategy", "generic", "--seeds", "1",
            "--fit-cache", cache]
    code, out, err = run(*args, "--json")
    assert code == 0, err
    rows = json.loads(out)["rows"]
    assert sorted((r["family"], r["connectivity"]) for r in rows) == [
        ("clique", "all-to-all-4"), ("clique", "line-4"), ("pairwise", "all-to-all-4"), ("pairwise", "line-4")]
    assert all(r["angles_fitted"] and r["angles_source"] == "fitted" and r["fit_loss"] == "kl"
               and r["fit_loss_value"] >= 0 for r in rows)
    assert len(list(cache.glob("*.json"))) == 2  # one fit per family
    code, out, err = run(*args)
    assert code == 0 and out.count("(from the cache)") == 2
    # without --fit the rows say the angles were not fitted
    code, out, err = run("compare", chain_file, "-c", "line", "--compile-only", "--strategy", "generic", "--seeds",
                         "1", "--json")
    assert [(r["angles_fitted"], r["angles_source"]) for r in json.loads(out)["rows"]] == [(False, "seeded")]
    # a model file written by toposcout fit: its angles are the model's own
    code, _, err = run("fit", chain_file, "--restarts", "1", "--out", tmp_path / "fitted.json")
    assert code == 0, err
    code, out, err = run("compare", tmp_path / "fitted.json", "-c", "line", "--compile-only", "--strategy", "generic",
                         "--seeds", "1", "--json")
    assert [(r["angles_fitted"], r["angles_source"]) for r in json.loads(out)["rows"]] == [(False, "model")]


def _examples_with_factors() -> list[Path]:
    out = []
    for path in sorted(EXAMPLES.iterdir()):
        try:
            m = load_model(path)
        except Exception:
            continue
        if m.factors and m.num_variables <= 20:
            out.append(path)
    return out


@pytest.mark.parametrize("path", _examples_with_factors(), ids=lambda p: p.name)
def test_after_fit_noise_never_brings_the_model_closer_to_its_target(path, tmp_path):
    # the reported defect: untrained angles made kl_target_noisy < kl_target_ideal (noise "helped"). A trained
    # model is closer to its target than the near-uniform distribution noise pushes it to.
    code, out, err = run("compare", path, "--fit", "--restarts", "1", "-c", "line", "-c", "all-to-all",
                         "--strategy", "generic", "--seeds", "1", "--fit-cache", tmp_path, "--json")
    assert code == 0, err
    rows = json.loads(out)["rows"]
    assert rows and all(r["angles_fitted"] for r in rows)
    for r in rows:
        assert r["noise_scale"] == 1.0
        assert r["kl_target_noisy"] >= r["kl_target_ideal"], r["connectivity"]
        assert r["kl_target_ideal"] == pytest.approx(r["fit_loss_value"], abs=1e-6)


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_fit_shows_a_progress_bar_with_the_loss_on_a_terminal(chain_file, tmp_path, monkeypatch):
    monkeypatch.delenv("TQDM_DISABLE", raising=False)
    out, err = io.StringIO(), _Terminal()
    code = main(["fit", str(chain_file), "--restarts", "1", "--max-iter", "30", "--out", str(tmp_path / "f.json")],
                out=out, err=err)
    assert code == 0
    assert "loss=" in err.getvalue() and "best=" in err.getvalue()
    code = main(["fit", str(chain_file), "--restarts", "1", "--max-iter", "30", "--out", str(tmp_path / "g.json")],
                out=io.StringIO(), err=(plain := io.StringIO()))
    assert code == 0 and "loss=" not in plain.getvalue()  # not a terminal: no bar


def test_library_compare_fits_each_family(chain_file):
    from toposcout.compiler.fit import fit_model
    from toposcout.service.embedded import compare_rows

    rows = compare_rows(chain_file, ["line"], compile_only=True, strategy="generic", seeds=1, workers=1,
                        families=["clique", "pairwise"], fit={"restarts": 1})
    model = load_model(chain_file)
    for r in rows:
        ref = fit_model(model, family=r["family"], restarts=1, seed=0)
        assert r["angles_fitted"] and r["fit_parameters"] == ref.parameters
    from toposcout.compiler.errors import ModelError

    with pytest.raises(ModelError, match="restarts"):
        compare_rows(chain_file, ["line"], compile_only=True, fit={"restarts": 0})
