"""Model input: our JSON format, UAI and node-link, and every malformed input."""

from __future__ import annotations

import json
import warnings

import networkx as nx
import numpy as np
import pytest

from toposcout.compiler.errors import CapacityError, ModelError
from toposcout.compiler.model import Limits, load_model, model_schema, parse_model, target_distribution, to_uai

# A hand-written MARKOV file following the UAI competition format description
# (preamble, cardinalities, function scopes, then one table per function with the last
# variable of the scope changing fastest).
UAI_FOUR = """MARKOV
4
2 2 2 2
5
1 0
2 0 1
2 1 2
3 1 2 3
2 3 0

2
 0.4 1.6

4
 2.0 0.5
 0.5 2.0

4
 1.2 0.3
 0.7 1.0

8
 1.0 0.2 0.3 1.5
 0.9 1.1 2.5 0.4

4
 3.0 1.0
 1.0 3.0
"""


def base(**kw):
    d = {"name": "t", "variables": ["a", "b", "c"], "cliques": [["a", "b"], ["b", "c"]]}
    d.update(kw)
    return d


def test_json_model_round_trip():
    m = parse_model(base(factors=[{"scope": ["a", "b"], "values": [1, 2, 3, 4]}], max_order=2))
    assert parse_model(m.to_dict()) == m
    assert m.cliques == (("a", "b"), ("b", "c"))


def test_isolated_variable_is_its_own_clique():
    m = parse_model({"variables": ["a", "b", "z"], "cliques": [["a", "b"]]})
    assert ("z",) in m.cliques


def test_schema_is_valid_json_schema():
    # The schema itself validates against the JSON Schema 2020-12 meta-schema (open standard).
    import jsonschema

    jsonschema.Draft202012Validator.check_schema(model_schema())


BAD_MODELS = [
    ("empty model", {"variables": []}, ModelError, "no variables"),
    ("no variables key", {"name": "x"}, ModelError, "no variables"),
    ("duplicate names", {"variables": ["a", "b", "a"]}, ModelError, "duplicate variable name 'a'"),
    ("unknown variable in clique", base(cliques=[["a", "q"]]), ModelError, "cliques[0][1]: unknown variable 'q'"),
    ("variable repeated in clique", base(cliques=[["a", "a"]]), ModelError, "'a' is repeated"),
    ("factor of wrong length", base(factors=[{"scope": ["a", "b"], "values": [1, 2, 3]}]), ModelError,
     "needs 2**2 = 4"),
    ("non-positive potential", base(factors=[{"scope": ["a"], "values": [1, 0]}]), ModelError,
     "factors[0].values[1]"),
    ("negative potential", base(factors=[{"scope": ["a"], "values": [-1, 2]}]), ModelError, "factors[0].values[0]"),
    ("factor outside cliques", base(factors=[{"scope": ["a", "c"], "values": [1, 1, 1, 1]}]), ModelError,
     "not inside any clique"),
    ("bad name", {"variables": ["a b"]}, ModelError, "not a valid variable name"),
    ("wrong type", {"variables": "abc"}, ModelError, "variables"),
    ("unknown field", base(colour="red"), ModelError, "colour"),
    ("max_order zero", base(max_order=0), ModelError, "max_order"),
    ("huge clique", {"variables": [f"v{i}" for i in range(25)], "cliques": [[f"v{i}" for i in range(25)]]},
     CapacityError, "max_order"),
    ("bad parameter key", base(parameters={"terms": {"a,zz": 0.1}}), ModelError, "unknown variable 'zz'"),
    ("bool angle", base(parameters={"terms": {"a,b": True}}), ModelError, "parameters.terms"),
]


@pytest.mark.parametrize("label,obj,exc,needle", BAD_MODELS, ids=[b[0] for b in BAD_MODELS])
def test_bad_models_have_clear_errors(label, obj, exc, needle):
    with pytest.raises(exc) as info:
        parse_model(obj)
    assert needle in str(info.value)
    assert info.value.field


def test_variable_cap():
    with pytest.raises(CapacityError, match="cap of 5"):
        parse_model({"variables": [f"v{i}" for i in range(6)]}, limits=Limits(max_variables=5))


def test_huge_clique_with_max_order_is_accepted_quickly():
    m = parse_model({"variables": [f"v{i}" for i in range(25)], "cliques": [[f"v{i}" for i in range(25)]],
                     "max_order": 2})
    assert m.max_order == 2


def test_term_cap_names_max_order():
    with pytest.raises(CapacityError, match="max_order"):
        parse_model({"variables": [f"v{i}" for i in range(14)], "cliques": [[f"v{i}" for i in range(14)]]},
                    limits=Limits(max_terms=1000))


def test_nan_in_json_text_is_refused():
    with pytest.raises(ModelError, match="NaN"):
        parse_model('{"variables": ["a"], "parameters": {"terms": {"a": NaN}}}')


def test_broken_json_names_line():
    with pytest.raises(ModelError, match="line 2"):
        parse_model('{"variables": ["a"],\n "cliques": [[}')


def test_nodelink_cliques_are_networkx_maximal_cliques():
    # Reference: networkx.find_cliques (maximal cliques, Bron–Kerbosch); the model's
    # cliques must be exactly that set.
    g = nx.gnp_random_graph(12, 0.35, seed=4)
    data = nx.node_link_data(g, edges="links")
    m = parse_model(json.dumps(data))
    ours = {frozenset(c) for c in m.cliques}
    ref = {frozenset(str(v) for v in c) for c in nx.find_cliques(g)}
    assert ours == ref


def test_nodelink_triangle_and_pendant():
    # Hand check: a triangle a-b-c with a pendant d on c has maximal cliques {a,b,c}, {c,d}.
    data = {"nodes": [{"id": x} for x in "abcd"],
            "edges": [{"source": "a", "target": "b"}, {"source": "b", "target": "c"},
                      {"source": "a", "target": "c"}, {"source": "c", "target": "d"}]}
    m = parse_model(data, "nodelink")
    assert {frozenset(c) for c in m.cliques} == {frozenset("abc"), frozenset("cd")}


def test_uai_joint_matches_pgmpy():
    # Reference library: pgmpy's UAIReader + factor_product on the same hand-written file.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from pgmpy.factors import factor_product
        from pgmpy.readwrite import UAIReader

    model = parse_model(UAI_FOUR, "uai")
    ours = target_distribution(model)
    ref_model = UAIReader(string=UAI_FOUR).get_model()
    joint = factor_product(*ref_model.get_factors())
    joint.normalize(inplace=True)
    names = [f"var_{i}" for i in range(4)]
    ref = np.transpose(joint.values, [joint.scope().index(v) for v in names])  # ref[b0, b1, b2, b3]
    for x in range(16):
        bits = tuple((x >> i) & 1 for i in range(4))
        assert ours[x] == pytest.approx(ref[bits], abs=1e-12)


def test_uai_distribution_by_brute_force():
    # Definition of a Markov network's Gibbs distribution: P(x) ∝ ∏ φ_c(x_c).
    model = parse_model(UAI_FOUR, "uai")
    p = target_distribution(model)
    tables = {  # UAI order: first scope variable most significant
        (0,): [0.4, 1.6], (0, 1): [2.0, 0.5, 0.5, 2.0], (1, 2): [1.2, 0.3, 0.7, 1.0],
        (1, 2, 3): [1.0, 0.2, 0.3, 1.5, 0.9, 1.1, 2.5, 0.4], (3, 0): [3.0, 1.0, 1.0, 3.0]}
    un = np.zeros(16)
    for x in range(16):
        b = [(x >> i) & 1 for i in range(4)]
        w = 1.0
        for scope, t in tables.items():
            idx = 0
            for v in scope:
                idx = idx * 2 + b[v]
            w *= t[idx]
        un[x] = w
    np.testing.assert_allclose(p, un / un.sum(), atol=1e-14)


def test_uai_round_trip():
    m = parse_model(UAI_FOUR, "uai")
    again = parse_model(to_uai(m), "uai")
    np.testing.assert_allclose(target_distribution(again), target_distribution(m), atol=1e-14)


BAD_UAI = [
    ("bayes preamble", UAI_FOUR.replace("MARKOV", "BAYES"), "line 1", "MARKOV"),
    ("ternary variable", UAI_FOUR.replace("2 2 2 2", "2 3 2 2"), "line 3", "binary variables only"),
    ("short table", UAI_FOUR.replace("4\n 3.0 1.0\n 1.0 3.0", "3\n 3.0 1.0 1.0"), "line 26", "need 4"),
    ("zero entry", UAI_FOUR.replace(" 0.4 1.6", " 0.0 1.6"), "line 12", "positive"),
    ("unknown variable", UAI_FOUR.replace("2 3 0\n", "2 3 7\n"), "line 9", "declares 4 variables"),
    ("truncated", UAI_FOUR[:60], "line", "ends early"),
    ("not a number", UAI_FOUR.replace("0.4 1.6", "0.4 abc"), "line 12", "not a number"),
]


@pytest.mark.parametrize("label,text,line,needle", BAD_UAI, ids=[b[0] for b in BAD_UAI])
def test_bad_uai_names_the_line(label, text, line, needle):
    with pytest.raises(ModelError) as info:
        parse_model(text, "uai")
    assert line in str(info.value) and needle in str(info.value)


def test_target_distribution_little_endian():
    # P(a=1, b=0) is entry 1 (bit 0 = a): hand computation from the factor table.
    m = parse_model({"variables": ["a", "b"], "cliques": [["a", "b"]],
                     "factors": [{"scope": ["a", "b"], "values": [1, 6, 2, 1]}]})
    np.testing.assert_allclose(target_distribution(m), [0.1, 0.6, 0.2, 0.1])


def test_examples_load(any_example_path):
    m = load_model(any_example_path)
    assert m.num_variables >= 6


def test_missing_file():
    with pytest.raises(ModelError, match="does not exist"):
        load_model("/nonexistent/model.json")


def test_every_subset_counted():
    # Σ_k C(n, k) = 2^n − 1 non-empty subsets (binomial theorem).
    from toposcout.compiler.model import count_terms

    assert count_terms([5], None) == 31
    assert count_terms([5], 2) == 15
    assert all(count_terms([n], None) == 2**n - 1 for n in range(1, 12))


def test_nodelink_link_to_an_undeclared_node_is_refused_by_name():
    # networkx.node_link_graph would silently add "e" as a new node (a new variable); a model's
    # variables are the nodes it declares, so the typo is an error naming the link and the node.
    data = {"nodes": [{"id": x} for x in "abc"],
            "links": [{"source": "a", "target": "b"}, {"source": "b", "target": "e"}]}
    with pytest.raises(ModelError, match=r"links\[1\]\.target: node 'e' is not declared") as info:
        parse_model(data, "nodelink")
    assert info.value.field == "links[1].target"
