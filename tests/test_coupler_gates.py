"""Per-coupler native two-qubit gates (a device whose couplers do not all share one gate).

Outside references, each named beside its check:

* the device file itself (TOML, read with the standard library's ``tomllib``, not our loader):
  which gate each coupler's ``native_gate`` names;
* qiskit.quantum_info.Operator: the compiled unitary equals the logical one up to a global phase
  once the layout permutation is undone (``Operator.equiv``);
* stim's own circuit text (``DEPOLARIZE2`` arguments) and Nielsen & Chuang, section 8.3 (the
  two-qubit depolarizing channel's Pauli probability 1.25 r for average infidelity r).
"""

from __future__ import annotations

import io
import json
import tomllib

import numpy as np
import pytest
from qiskit import QuantumCircuit
from qiskit.quantum_info import Operator

from toposcout.compiler.ansatz import build_ansatz
from toposcout.compiler.compile import compile_ansatz
from toposcout.compiler.devices import parse_device, parse_device_text
from toposcout.compiler.errors import CompileError, ProfileError
from toposcout.compiler.model import parse_model
from toposcout.compiler.targets import TWO_QUBIT_GATES, get_gate_set

#: a 5-qubit chip (a ring with one chord): most couplers the default gate, three others
MIXED = """
name = "mixed-5"
base = "superconducting"
native_gate = "{default}"
qubits = 5
edges = [[0, 1], [1, 2], [2, 3], [3, 4], [4, 0], [1, 3]]
[[coupler]]
qubits = [2, 1]
native_gate = "{a}"
two_qubit_error = 0.02
[[coupler]]
qubits = [3, 4]
native_gate = "{b}"
[[coupler]]
qubits = [1, 3]
native_gate = "{c}"
two_qubit_ns = 380
"""
MIXES = [("cz", "cx", "rzz", "rxx"), ("cx", "cz", "cz", "rzz"), ("rzz", "cx", "cz", "cx"),
         ("rxx", "cx", "cz", "rzz")]
FIVE = {"variables": list("abcde"), "cliques": [list("abc"), list("cde"), ["a", "e"], ["b", "d"]]}


def _text(mix) -> str:
    default, a, b, c = mix
    return MIXED.format(default=default, a=a, b=b, c=c)


def _file_gates(text: str):
    """{(a, b): gate} of every edge, read from the file with tomllib (the reference)."""
    raw = tomllib.loads(text)
    gates = {tuple(sorted(e)): raw.get("native_gate", "cx") for e in raw["edges"]}
    for c in raw.get("coupler", []):
        if "native_gate" in c:
            gates[tuple(sorted(c["qubits"]))] = c["native_gate"]
    return gates


def _two_qubit_gates(circuit):
    return [(ins.operation.name, tuple(sorted(circuit.find_bit(q).index for q in ins.qubits)))
            for ins in circuit.data if ins.operation.num_qubits == 2]


def _compile(mix, strategy, aware):
    dev = parse_device_text(_text(mix))
    ans = build_ansatz(parse_model(FIVE), seed=3)
    c = compile_ansatz(ans, dev.connectivity, dev.gate_set(), strategy=strategy, seeds=2,
                       profile=dev.profile if aware else None)
    return dev, ans, c


@pytest.mark.parametrize("aware", [False, True], ids=["count", "errors"])
@pytest.mark.parametrize("strategy", ["generic", "structured", "auto"])
@pytest.mark.parametrize("mix", MIXES, ids=["-".join(m) for m in MIXES])
def test_every_two_qubit_gate_is_its_couplers_native_gate(mix, strategy, aware):
    # Reference: the device file read with tomllib. Every two-qubit gate of the compiled circuit
    # sits on a coupler and is the gate that coupler's native_gate names (else the default);
    # the one-qubit gates are the device gate set's.
    dev, _ans, c = _compile(mix, strategy, aware)
    want = _file_gates(_text(mix))
    used = _two_qubit_gates(c.circuit)
    assert used and all(pair in want and name == want[pair] for name, pair in used), used
    assert len({name for name, _ in used}) >= 2  # the case mixes gates (else it tests nothing new)
    one = {ins.operation.name for ins in c.circuit.data if ins.operation.num_qubits == 1} - {"measure"}
    assert one <= set(get_gate_set(mix[0]).one_qubit)
    f = c.figures()
    assert sum(f["two_qubit_by_gate"].values()) == f["two_qubit_gates"] == len(used)
    assert f["two_qubit_by_gate"] == {g: sum(1 for n, _ in used if n == g) for g in dev.gate_set().two_qubit_names}


def _permutation(initial, final, n):
    """The permutation matrix taking variable i's bit from physical initial[i] to final[i]."""
    dim = 2 ** n
    P = np.zeros((dim, dim))
    for x in range(dim):
        y = 0
        for i in range(len(initial)):
            y |= ((x >> initial[i]) & 1) << final[i]
        P[y, x] = 1.0
    return P


@pytest.mark.parametrize("strategy", ["generic", "structured"])
@pytest.mark.parametrize("mix", MIXES, ids=["-".join(m) for m in MIXES])
def test_compiled_operator_equals_the_logical_one(mix, strategy):
    # Reference: qiskit.quantum_info.Operator.equiv (equal up to a global phase). The circuit is
    # as wide as the model (5 variables, 5 qubits), so the compiled unitary is P . U_logical placed
    # on initial_layout, P the layout permutation (as tests/test_synthesis.py checks it).
    _dev, ans, c = _compile(mix, strategy, True)
    n = c.connectivity.num_qubits
    ref = QuantumCircuit(n)
    ref.compose(ans.circuit(measure=False), qubits=list(c.initial_layout), inplace=True)
    got = Operator(c.circuit.remove_final_measurements(inplace=False))
    assert got.equiv(Operator(_permutation(c.initial_layout, c.final_layout, n) @ Operator(ref).data))


def test_a_lone_gate_on_another_couplers_gate_is_rewritten_exactly():
    # Reference: qiskit.quantum_info.Operator.equiv: a cx asked on a cz coupler, a cz on a cx
    # coupler and an rzz on an rxx coupler come out as that coupler's gate plus one-qubit gates
    # of the native set, with the same unitary up to a global phase.
    from qiskit.transpiler import generate_preset_pass_manager

    from toposcout.compiler.targets import build_target

    dev = parse_device_text(_text(("cz", "cx", "rzz", "rxx")))
    target = build_target(dev.connectivity, dev.gate_set())
    qc = QuantumCircuit(5)
    qc.cx(0, 1)     # on a cz coupler
    qc.cz(2, 1)     # on a cx coupler
    qc.rzz(0.37, 1, 3)  # on an rxx coupler
    qc.rxx(0.21, 3, 4)  # on an rzz coupler
    pm = generate_preset_pass_manager(1, target=target, initial_layout=list(range(5)), routing_method="none",
                                      layout_method="trivial")
    out = pm.run(qc)
    want = _file_gates(_text(("cz", "cx", "rzz", "rxx")))
    assert all(name == want[pair] for name, pair in _two_qubit_gates(out))
    assert Operator.from_circuit(out).equiv(Operator(qc))


def test_check_coupling_refuses_a_gate_that_is_not_the_couplers():
    # the invariant every strategy's result goes through
    from toposcout.compiler.compiled import check_coupling

    dev = parse_device_text(_text(("cz", "cx", "rzz", "rxx")))
    qc = QuantumCircuit(5)
    qc.cz(0, 1)
    check_coupling(qc, dev.connectivity, dev.gate_set())
    qc.cz(1, 2)  # coupler 1-2 is cx
    with pytest.raises(CompileError, match=r"cz on qubits \(1, 2\) is not the native two-qubit gate 'cx'"):
        check_coupling(qc, dev.connectivity, dev.gate_set())


def test_noise_and_clifford_twin_give_each_coupler_its_own_figures():
    # Reference: the file's figures (tomllib) and Nielsen & Chuang 8.3: with relaxation made
    # negligible (T1 = T2 = 1e9 us), a two-qubit gate's stim noise is DEPOLARIZE2(p) with
    # p = 1.25 r, r its coupler's two-qubit error; the multiset of p in the twin must equal the
    # one of the compiled circuit's two-qubit gates, coupler by coupler (errors all differ).
    from toposcout.compiler.clifford import clifford_circuit
    from toposcout.compiler.noise import build_noise_model, schedule

    text = _text(("cz", "cx", "rzz", "rxx")).replace("\n[[coupler]]", (
        "\n[defaults]\nt1_us = 1e9\nt2_us = 1e9\ntwo_qubit_error = 0.004\n[[coupler]]"), 1)
    text = text.replace('native_gate = "rzz"\n', 'native_gate = "rzz"\ntwo_qubit_error = 0.011\n')
    text = text.replace('native_gate = "rxx"\n', 'native_gate = "rxx"\ntwo_qubit_error = 0.007\n')
    raw = tomllib.loads(text)
    err = {tuple(sorted(e)): raw["defaults"]["two_qubit_error"] for e in raw["edges"]}
    for c in raw["coupler"]:
        err[tuple(sorted(c["qubits"]))] = c.get("two_qubit_error", err[tuple(sorted(c["qubits"]))])
    gates = _file_gates(text)
    dev = parse_device_text(text)
    ans = build_ansatz(parse_model(FIVE), seed=3)
    c = compile_ansatz(ans, dev.connectivity, dev.gate_set(), strategy="structured", profile=dev.profile)
    sched = schedule(c, dev.profile)
    phys = sched.physical_qubits
    used = [(ins.operation.name, tuple(sorted(phys[sched.circuit.find_bit(q).index] for q in ins.qubits)))
            for ins in sched.circuit.data if ins.operation.num_qubits == 2 and ins.operation.name != "delay"]
    assert {gates[p] for _, p in used} >= {"cz", "cx"} and all(n == gates[p] for n, p in used)
    twin = clifford_circuit(sched, dev.profile)
    got = []
    for inst in twin.circuit:
        if inst.name == "DEPOLARIZE2":
            got += [inst.gate_args_copy()[0]] * (len(inst.targets_copy()) // 2)
    np.testing.assert_allclose(sorted(got), sorted(1.25 * err[p] for _, p in used), rtol=1e-6)
    # the density-matrix noise model: one error per (gate name, compact qubits) site of the
    # coupler's own gate, and no two-qubit error keyed by a gate name its coupler does not have
    nm = build_noise_model(sched, dev.profile)
    for name, sites in nm._local_quantum_errors.items():
        for qubits in sites:
            if len(qubits) == 2:
                assert gates[tuple(sorted(phys[k] for k in qubits))] == name
    assert set(nm._default_quantum_errors) | set(nm._local_quantum_errors) >= {n for n, _ in used}


def test_a_device_row_counts_the_per_coupler_gates(chain_model):
    # run_task end to end (device task, density matrix): the row's two-qubit count is the sum of
    # the per-gate counts, the counts match the circuit kept in the row, and the noise study ran
    import base64

    from toposcout.compiler.compile import load_qpy
    from toposcout.compiler.study import make_tasks, run_task

    text = _text(("cz", "cx", "rzz", "rxx"))
    dev = parse_device_text(text)
    (task,) = make_tasks(chain_model(5), None, device=dev.to_dict(), gate_set="cz", strategy="generic", seeds=1,
                         keep_circuit=True)
    row = run_task(task)
    assert row["error"] is None and row.get("noise_error") is None and row["state_fidelity"] > 0
    circ = load_qpy(base64.b64decode(row["circuit_qpy_b64"]))
    used = _two_qubit_gates(circ)
    want = _file_gates(text)
    assert all(name == want[pair] for name, pair in used)
    assert row["two_qubit_gates"] == len(used) == sum(row["two_qubit_by_gate"].values())
    assert row["depth"] == circ.depth(lambda ins: ins.operation.name not in ("measure", "barrier", "delay"))


BAD_GATE = [("swap", "swap"), ("iswap", "iswap"), (3, "3")]


@pytest.mark.parametrize("gate,shown", BAD_GATE)
def test_an_unknown_coupler_gate_names_the_field_and_the_choices(gate, shown):
    d = {"name": "bad", "qubits": 3, "edges": [[0, 1], [1, 2]], "base": "superconducting",
         "coupler": [{"qubits": [2, 1], "native_gate": gate}]}
    with pytest.raises(ProfileError) as exc:
        parse_device(d)
    assert exc.value.field == "coupler[2-1].native_gate"  # the coupler as the file writes it
    assert shown in str(exc.value) and ", ".join(TWO_QUBIT_GATES) in str(exc.value), str(exc.value)


def test_cli_and_api_refuse_an_unknown_coupler_gate(tmp_path, chain_model):
    from fastapi.testclient import TestClient

    from toposcout.service.api.app import create_app
    from toposcout.service.cli import main
    from toposcout.service.settings import Settings

    text = _text(("cz", "cx", "rzz", "iswap"))
    model = tmp_path / "m.json"
    model.write_text(json.dumps(chain_model(4)))
    dev = tmp_path / "bad.toml"
    dev.write_text(text)
    err = io.StringIO()
    assert main(["compare", str(model), "--device", str(dev), "--compile-only"], out=io.StringIO(), err=err) == 2
    assert "coupler[1-3].native_gate" in err.getvalue() and "'iswap'" in err.getvalue(), err.getvalue()
    with TestClient(create_app(Settings(data_dir=tmp_path / "data", workers=1))) as c:
        r = c.post("/v1/compile", json={"model": chain_model(4), "device": text})
        assert r.status_code == 422 and "device.coupler[1-3].native_gate" in r.text and "rxx" in r.text, r.text


def test_the_schema_lists_the_gate_choices_and_the_example_devices_validate():
    # Reference: jsonschema (the reference implementation of JSON Schema 2020-12) on the example
    # files as JSON; the schema's gate choices are the gate sets' (topologies/gate_sets.toml).
    import jsonschema

    from toposcout.compiler.devices import device_dirs, device_schema
    from toposcout.compiler.targets import GATE_SETS

    schema = device_schema()
    assert schema["properties"]["native_gate"]["enum"] == list(GATE_SETS)
    assert schema["$defs"]["coupler"]["properties"]["native_gate"]["enum"] == list(TWO_QUBIT_GATES)
    for path in sorted(device_dirs()[0].glob("*.toml")):
        jsonschema.validate(tomllib.loads(path.read_text()), schema, cls=jsonschema.Draft202012Validator)
    bad = tomllib.loads(_text(("cz", "cx", "rzz", "iswap")))
    with pytest.raises(jsonschema.ValidationError, match="iswap"):
        jsonschema.validate(bad, schema, cls=jsonschema.Draft202012Validator)


def test_the_grid_example_has_a_corner_of_cz_couplers_and_compiles_to_them(chain_model):
    # Reference: the example file (tomllib): birch-36 is cx with couplers 4-5, 5-11, 10-11 cz;
    # a 4-variable chain placed on that corner gets cz there and cx elsewhere
    from toposcout.compiler.devices import device_dirs, load_device

    text = (device_dirs()[0] / "birch-36.toml").read_text()
    want = _file_gates(text)
    assert sorted(p for p, g in want.items() if g == "cz") == [(4, 5), (5, 11), (10, 11)]
    dev = load_device("birch-36")
    ans = build_ansatz(parse_model(chain_model(4)), seed=1)
    c = compile_ansatz(ans, dev.connectivity, dev.gate_set(), strategy="structured", profile=dev.profile,
                       placements=[[4, 5, 11, 10]])
    used = _two_qubit_gates(c.circuit)
    assert all(name == want[pair] for name, pair in used) and "cz" in {n for n, _ in used}


def test_the_api_compiles_to_the_devices_own_gate_unless_the_request_names_one(tmp_path, chain_model):
    # the device file's native_gate is the default gate set, as on the CLI; a request's gate_set wins
    from fastapi.testclient import TestClient

    from toposcout.service.api.app import create_app
    from toposcout.service.settings import Settings

    text = _text(("cz", "cz", "cz", "cz"))
    with TestClient(create_app(Settings(data_dir=tmp_path / "data", workers=1))) as c:
        own = c.post("/v1/compile", json={"model": chain_model(4), "device": text})
        named = c.post("/v1/compile", json={"model": chain_model(4), "device": text, "gate_set": "cx"})
        plain = c.post("/v1/compile", json={"model": chain_model(4), "connectivities": ["line"]})
    assert own.status_code == named.status_code == plain.status_code == 200, (own.text, named.text)
    rows = {k: r.json()["rows"] for k, r in (("own", own), ("named", named), ("plain", plain))}
    assert {r["gate_set"] for r in rows["own"]} == {"cz"}
    assert {r["gate_set"] for r in rows["named"]} == {"cx"}
    assert {r["gate_set"] for r in rows["plain"]} == {"cx"}
