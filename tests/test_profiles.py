"""Device profiles: files, validation, scaling, JSON round trip, Nielsen's conversion."""

import json
import math

import numpy as np
import pytest
from qiskit.quantum_info import average_gate_fidelity, process_fidelity
from qiskit_aer.noise import depolarizing_error, thermal_relaxation_error

from toposcout.compiler.errors import ProfileError
from toposcout.compiler.noise import gate_error
from toposcout.compiler.profiles import (
    PROFILE_NAMES,
    DeviceProfile,
    depolarizing_parameter,
    load_profile,
    parse_profile,
    profile_dirs,
    relaxation_average_infidelity,
    relaxation_process_fidelity,
)


def base_dict(**over):
    d = {
        "name": "t",
        "gates": {"one_qubit_error": 1e-3, "two_qubit_error": 1e-2, "one_qubit_ns": 50, "two_qubit_ns": 400,
                  "measure_ns": 1000},
        "readout": {"p1_given_0": 0.01, "p0_given_1": 0.03},
        "coherence": {"t1_us": 100.0, "t2_us": 80.0},
    }
    d.update(over)
    return d


def test_at_least_three_builtin_classes_marked_from_memory():
    # requirement: superconducting-, trapped-ion- and one more device class, with values
    # marked "from memory" and the gate-error convention stated in each file
    assert {"superconducting", "trapped_ion", "neutral_atom"} <= set(PROFILE_NAMES)
    for name in PROFILE_NAMES:
        p = load_profile(name)
        text = next(d / f"{name}.toml" for d in profile_dirs() if (d / f"{name}.toml").is_file()).read_text()
        assert "FROM MEMORY" in text and "AVERAGE GATE INFIDELITY" in text
        # textbook bound T2 <= 2 T1 (Nielsen & Chuang 8.3.5-8.3.6)
        assert p.t2_us <= 2 * p.t1_us
    ion, sc = load_profile("trapped_ion"), load_profile("superconducting")
    # the trapped-ion-like class: slower two-qubit gates and longer coherence (from memory)
    assert ion.two_qubit_ns > 100 * sc.two_qubit_ns and ion.t2_us > 100 * sc.t2_us
    assert ion.intended_connectivity == "all-to-all"


def test_t2_above_twice_t1_is_refused_naming_field_and_values():
    # physical bound T2 <= 2*T1 (Nielsen & Chuang, section 8.3.6)
    with pytest.raises(ProfileError) as e:
        parse_profile(base_dict(coherence={"t1_us": 50.0, "t2_us": 120.0}))
    assert e.value.field == "coherence.t2_us"
    assert "120" in str(e.value) and "50" in str(e.value) and "2*T1" in str(e.value)
    with pytest.raises(ProfileError) as e:
        parse_profile(base_dict(qubit=[{"index": 3, "t2_us": 500.0}]))
    assert e.value.field == "qubit[index=3].t2_us"


@pytest.mark.parametrize("bad, field", [
    ({"gates": {"one_qubit_error": -1e-3, "two_qubit_error": 1e-2, "one_qubit_ns": 50, "two_qubit_ns": 400,
                "measure_ns": 1000}}, "gates.one_qubit_error"),
    ({"readout": {"p1_given_0": 1.5, "p0_given_1": 0.0}}, "readout.p1_given_0"),
    ({"readout": {"p1_given_0": 0.01}}, "readout.p0_given_1"),
    ({"coherence": {"t1_us": 0.0, "t2_us": 0.0}}, "coherence.t1_us"),
    ({"edge": [{"qubits": [1, 1], "two_qubit_error": 0.1}]}, "edge[0].qubits"),
    ({"bogus": 1}, "bogus"),
])
def test_malformed_profiles_name_the_field(bad, field):
    # common practice: every refusal names the offending field
    with pytest.raises(ProfileError) as e:
        parse_profile(base_dict(**bad))
    assert e.value.field == field


def test_noise_scale_multiplies_every_error_rate():
    # documented convention of compiler/profiles.py: errors and relaxation rates 1/T1, 1/T2 scale
    p = parse_profile(base_dict())
    q = p.scaled(3.0)
    assert q.qubit(0).one_qubit_error == pytest.approx(3e-3)
    assert q.edge(0, 1).two_qubit_error == pytest.approx(3e-2)
    assert q.qubit(0).p1_given_0 == pytest.approx(0.03) and q.qubit(0).p0_given_1 == pytest.approx(0.09)
    assert 1 / q.qubit(0).t1_us == pytest.approx(3 / 100.0) and 1 / q.qubit(0).t2_us == pytest.approx(3 / 80.0)
    assert q.edge(0, 1).two_qubit_ns == p.edge(0, 1).two_qubit_ns  # durations are not scaled
    z = p.scaled(0.0).qubit(0)
    assert z.one_qubit_error == 0 and z.p0_given_1 == 0 and math.isinf(z.t1_us) and math.isinf(z.t2_us)
    # clipped at the physical maximum (a fully depolarizing 2-qubit gate has infidelity 3/4)
    assert p.scaled(1000.0).edge(0, 1).two_qubit_error == pytest.approx(0.75)
    with pytest.raises(ProfileError):
        p.scaled(-1.0)


def test_overrides_apply_to_physical_qubits_and_both_edge_directions():
    # documented profile format (compiler/profiles.py): overrides replace the class value for
    # one physical qubit / one coupler, in either direction; everything else keeps the default
    p = parse_profile(base_dict(qubit=[{"index": 2, "t1_us": 40.0, "t2_us": 30.0, "p0_given_1": 0.2}],
                                edge=[{"qubits": [3, 1], "two_qubit_error": 0.05, "two_qubit_ns": 900}]))
    assert p.qubit(2).t1_us == 40.0 and p.qubit(2).p0_given_1 == 0.2 and p.qubit(2).p1_given_0 == 0.01
    assert p.qubit(0).t1_us == 100.0
    assert p.edge(1, 3) == p.edge(3, 1) and p.edge(1, 3).two_qubit_error == 0.05 and p.edge(1, 3).two_qubit_ns == 900
    assert p.edge(0, 1).two_qubit_error == 1e-2


def test_dict_round_trip_is_plain_json():
    # profiles travel inside JSON tasks: to_dict -> json -> from_dict must be the identity
    for name in PROFILE_NAMES:
        p = load_profile(name, noise_scale=0.5)
        d = json.loads(json.dumps(p.to_dict()))
        assert DeviceProfile.from_dict(d) == p
        assert load_profile(d, noise_scale=0.5) == p
    p = parse_profile(base_dict(qubit=[{"index": 2, "t1_us": 40.0}], edge=[{"qubits": [0, 1], "two_qubit_ns": 10}]))
    assert DeviceProfile.from_dict(json.loads(json.dumps(p.to_dict()))) == p


def test_user_profile_file_and_unknown_name(tmp_path):
    # requirement: users can pass their own profile file; an unknown name lists the built-ins
    f = tmp_path / "mine.toml"
    f.write_text('name = "mine"\n[gates]\none_qubit_error = 1e-3\ntwo_qubit_error = 2e-2\n'
                 'one_qubit_ns = 20\ntwo_qubit_ns = 200\nmeasure_ns = 800\n'
                 '[readout]\np1_given_0 = 0.02\np0_given_1 = 0.04\n[coherence]\nt1_us = 60\nt2_us = 50\n'
                 '[[edge]]\nqubits = [0, 1]\ntwo_qubit_error = 0.1\n')
    p = load_profile(str(f), noise_scale=2.0)
    assert p.name == "mine" and p.noise_scale == 2.0 and p.edge(1, 0).two_qubit_error == pytest.approx(0.2)
    with pytest.raises(ProfileError) as e:
        load_profile("no_such_device")
    assert "superconducting" in str(e.value)
    bad = tmp_path / "bad.toml"
    bad.write_text("name = \n")
    with pytest.raises(ProfileError):
        load_profile(str(bad))


def test_relaxation_process_fidelity_matches_qiskit():
    # qiskit.quantum_info.process_fidelity of Aer's thermal_relaxation_error is an independent
    # computation of the closed form (1 + e^{-t/T1} + 2 e^{-t/T2}) / 4
    for t1, t2, t in [(100.0, 80.0, 300.0), (50.0, 100.0, 5000.0), (1e4, 1e3, 2e5)]:
        ch = thermal_relaxation_error(t1 * 1e3, t2 * 1e3, t)
        assert relaxation_process_fidelity(t1, t2, t) == pytest.approx(process_fidelity(ch), abs=1e-12)
        assert relaxation_average_infidelity(t1, t2, t) == pytest.approx(1 - average_gate_fidelity(ch), abs=1e-12)


def test_depolarizing_parameter_without_relaxation():
    # average infidelity of depolarizing(p) on d dimensions is p (d-1)/d (Nielsen 2002 with
    # F_pro = 1 - p + p/d^2); checked against Aer's channel through qiskit's average_gate_fidelity
    for n, r in [(1, 1e-3), (2, 1e-2), (2, 0.3)]:
        d = 2**n
        p = depolarizing_parameter(r, 1.0, n)
        assert p == pytest.approx(r * d / (d - 1))
        assert 1 - average_gate_fidelity(depolarizing_error(p, n)) == pytest.approx(r, abs=1e-12)


@pytest.mark.parametrize("name", ["superconducting", "trapped_ion", "neutral_atom"])
def test_whole_gate_channel_has_the_profile_infidelity(name):
    # Nielsen 2002: depolarizing part + relaxation during the gate together give exactly the
    # profile's average infidelity (relaxation not counted twice); measured on the Aer channel
    p = load_profile(name)
    e1 = gate_error(p, [0], "sx")
    e2 = gate_error(p, [0, 1], "cx")
    assert 1 - average_gate_fidelity(e1) == pytest.approx(p.one_qubit_error, rel=1e-9)
    assert 1 - average_gate_fidelity(e2) == pytest.approx(p.two_qubit_error, rel=1e-9)
    assert gate_error(p, [0], "rz") is None  # virtual gate: no error


def test_relaxation_exceeding_the_gate_error_clips_depolarizing_at_zero():
    # documented choice: when relaxation alone is worse than r, no depolarizing part is added
    p = parse_profile(base_dict(gates={"one_qubit_error": 1e-5, "two_qubit_error": 1e-2, "one_qubit_ns": 2000,
                                       "two_qubit_ns": 400, "measure_ns": 1000}))
    f = relaxation_process_fidelity(100.0, 80.0, 2000)
    assert depolarizing_parameter(1e-5, f, 1) == 0.0
    e = gate_error(p, [0], "sx")
    expected = relaxation_average_infidelity(100.0, 80.0, 2000)
    assert 1 - average_gate_fidelity(e) == pytest.approx(expected, rel=1e-9) and expected > 1e-5
    assert np.isfinite(expected)


def test_a_profile_file_may_start_from_a_builtin_and_change_only_what_differs(tmp_path):
    # base = "NAME": every value not given is the built-in's; the given ones replace it, key by key.
    f = tmp_path / "slow-readout.toml"
    f.write_text('base = "superconducting"\n[readout]\np0_given_1 = 0.05\n[coherence]\nt1_us = 90.0\n')
    mine, base = load_profile(str(f)), load_profile("superconducting")
    assert mine.name == "slow-readout"
    assert (mine.p0_given_1, mine.t1_us) == (0.05, 90.0)
    assert (mine.p1_given_0, mine.t2_us, mine.two_qubit_error, mine.two_qubit_ns) == (
        base.p1_given_0, base.t2_us, base.two_qubit_error, base.two_qubit_ns)
    assert "superconducting" in mine.description and "readout.p0_given_1" in mine.description
    assert DeviceProfile.from_dict(mine.to_dict()) == mine  # the merged form travels as a plain object
    # the merge is validated like any profile, and names what is wrong
    for text, field in (('base = "superconducting"\n[coherence]\nt2_us = 400.0\n', "coherence.t2_us"),
                        ('base = "superconducting"\n[gates]\ntwo_qbit_error = 0.01\n', "gates.two_qbit_error"),
                        ('base = "toaster"\n', "base")):
        f.write_text(text)
        with pytest.raises(ProfileError) as e:
            load_profile(str(f))
        assert e.value.field == field, text
