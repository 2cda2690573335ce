"""The hostile-input suite's data: requests a hostile client sends, each with
the status and the field the answer must name. ``tests/test_hostile.py`` sends every case to a live
server (tokens on, default caps) on SQLite and on PostgreSQL.

A case is ``Case(name, request, status, field)``: ``request`` holds httpx arguments (``method``,
``path``, ``json`` | ``content`` | ``files`` + ``data``, ``headers``, ``params``, ``auth``: False
to send no token, or a header value); ``field`` is the exact field of the error body, or a
prefix ending in ``*``. None of them may be accepted: every one is refused before any work.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Any

__all__ = ["Case", "CASES", "TOKENS", "explosive_graph", "EXPLOSIVE"]

TOKENS = "alice:tok-alice-0123456789abcdef,bob:tok-bob-0123456789abcdef"
M = {"name": "pair", "variables": ["a", "b"], "cliques": [["a", "b"]]}


@dataclass(frozen=True)
class Case:
    name: str
    request: dict[str, Any]
    status: int
    field: str | None
    tags: tuple[str, ...] = field(default=())


def explosive_graph(n: int) -> dict:
    """Every pair of n nodes joined except within consecutive groups of three: 3^(n/3) maximal
    cliques (Moon & Moser 1965), a few tens of KB of node-link JSON."""
    links = [{"source": a, "target": b} for a, b in itertools.combinations(range(n), 2) if a // 3 != b // 3]
    return {"directed": False, "multigraph": False, "graph": {}, "nodes": [{"id": i} for i in range(n)],
            "links": links}


#: the two requests of the issue that took the whole machine before the parsers were bounded
EXPLOSIVE = {
    "uai-1e9-variables": "MARKOV\n1000000000\n2 2 2\n1\n2 0 1\n4 1 1 1 1\n",
    "nodelink-45-nodes-3^15-cliques": explosive_graph(45),
}


def study(body: Any, **extra: Any) -> dict:
    return {"method": "POST", "path": "/v1/studies", "json": body, **extra}


def model(m: Any, *, headers: dict | None = None, auth: Any = None, **extra: Any) -> dict:
    """A compile-only study of model ``m`` (``extra``: more request fields)."""
    req = study({"model": m, "compile_only": True, "connectivities": ["line"], **extra})
    if headers:
        req["headers"] = headers
    if auth is not None:
        req["auth"] = auth
    return req


def raw(content: bytes, ctype: str = "application/json", **extra: Any) -> dict:
    return {"method": "POST", "path": "/v1/studies", "content": content, "headers": {"Content-Type": ctype},
            **extra}


def get(path: str, **extra: Any) -> dict:
    return {"method": "GET", "path": path, **extra}


def _uai(n: int, scopes: list[list[int]], tables: list[str], cards: str | None = None) -> str:
    lines = ["MARKOV", str(n), cards or " ".join(["2"] * n), str(len(scopes))]
    lines += [" ".join(map(str, [len(s), *s])) for s in scopes]
    return "\n".join(lines + tables) + "\n"


_GOOD_UAI_TABLE = "4\n1 2 3 4"
_NAMES17 = [f"w{i}" for i in range(17)]
_NAMES65 = [f"x{i}" for i in range(65)]
_PROFILE = {"gates": {"one_qubit_error": 1e-4, "two_qubit_error": 5e-3, "one_qubit_ns": 30, "two_qubit_ns": 300,
                      "measure_ns": 1000},
            "readout": {"p1_given_0": 0.01, "p0_given_1": 0.02}, "coherence": {"t1_us": 80, "t2_us": 60}}

CASES: list[Case] = [
    # --- the explosive ones and other unbounded parsers
    Case("uai-1e9-variables", model(EXPLOSIVE["uai-1e9-variables"]), 422, "model.variables", ("worst",)),
    Case("nodelink-45-explosive", model(EXPLOSIVE["nodelink-45-nodes-3^15-cliques"]), 422, "model.links",
         ("worst",)),
    Case("nodelink-39-explosive", model(explosive_graph(39)), 422, "model.links", ("worst",)),
    Case("nodelink-200-nodes", model({"nodes": [{"id": i} for i in range(200)], "links": []}), 422, "model.nodes"),
    Case("nodelink-20001-links", model({"nodes": [{"id": 0}, {"id": 1}],
                                        "links": [{"source": 0, "target": 1}] * 20001}), 422, "model.links",
         ("worst",)),
    Case("nodelink-links-name-300-undeclared-nodes", model({"nodes": [{"id": 0}],
                                                            "links": [{"source": i, "target": i + 1}
                                                                      for i in range(300)]}),
         422, "model.links[0].target"),
    Case("nodelink-65-nodes-over-server-cap", model({"nodes": [{"id": i} for i in range(65)], "links": []}),
         422, "model.nodes"),
    Case("uai-1e9-functions", model("MARKOV\n2\n2 2\n999999999\n"), 422, "model.factors"),
    Case("uai-scope-of-17", model(_uai(20, [list(range(17))], [])), 422, "model.factors"),
    Case("uai-cardinality-3", model(_uai(2, [[0, 1]], [_GOOD_UAI_TABLE], cards="2 3")), 422, "model"),
    Case("uai-bayes-preamble", model("BAYES\n2\n2 2\n0\n"), 422, "model"),
    Case("uai-ends-early", model("MARKOV\n2\n2 2\n1\n2 0"), 422, "model"),
    Case("uai-not-an-integer", model("MARKOV\ntwo\n"), 422, "model"),
    Case("uai-5000-digit-integer", model("MARKOV\n" + "9" * 5000 + "\n"), 422, "model"),
    Case("uai-negative-table-entry", model(_uai(2, [[0, 1]], ["4\n1 -2 3 4"])), 422, "model"),
    Case("uai-nan-table-entry", model(_uai(2, [[0, 1]], ["4\n1 nan 3 4"])), 422, "model"),
    Case("uai-extra-content", model(_uai(2, [[0, 1]], [_GOOD_UAI_TABLE, "5"])), 422, "model"),
    Case("uai-variable-index-out-of-range", model(_uai(2, [[0, 7]], [_GOOD_UAI_TABLE])), 422, "model"),
    Case("json-model-5000-cliques", model({"variables": ["a"], "cliques": [["a"]] * 5000}), 422, "model.cliques"),
    Case("json-model-5000-factors", model({**M, "factors": [{"scope": ["a"], "values": [1, 2]}] * 5000}), 422,
         "model.factors"),
    Case("factor-scope-17", model({"variables": _NAMES17, "cliques": [_NAMES17], "max_order": 2,
                                   "factors": [{"scope": _NAMES17, "values": [1, 1]}]}), 422,
         "model.factors[0].scope"),
    Case("factor-table-too-short", model({**M, "factors": [{"scope": ["a", "b"], "values": [1, 2]}]}), 422,
         "model.factors[0].values"),
    Case("factor-zero-potential", model({**M, "factors": [{"scope": ["a", "b"], "values": [1, 0, 1, 1]}]}),
         422, "model.factors[0].values[1]"),
    Case("model-own-max-order-1e9", model({**M, "max_order": 10**9}), 422, "model.max_order"),
    Case("term-angle-1e308", model({**M, "parameters": {"terms": {"a,b": 1e308}}}), 422,
         "model.parameters.terms*"),
    Case("rotation-angle-1e7", model({**M, "parameters": {"rotations": {"a": [1e7, 0, 0]}}}), 422,
         "model.parameters.rotations*"),
    Case("term-of-unknown-variable", model({**M, "parameters": {"terms": {"a,zz": 0.1}}}), 422,
         "model.parameters.terms*"),
    Case("terms-per-layer-list-of-100", model({**M, "parameters": {"terms": {"a,b": [0.1] * 100}}}), 422,
         "model.parameters.terms*"),
    Case("65-variables-over-server-cap", model({"variables": _NAMES65}), 422, "model.variables"),
    Case("duplicate-variable", model({"variables": ["a", "a"]}), 422, "model.variables[1]"),
    Case("clique-unknown-variable", model({"variables": ["a"], "cliques": [["a", "q"]]}), 422,
         "model.cliques[0][1]"),
    Case("clique-of-17-without-max-order", model({"variables": _NAMES17, "cliques": [_NAMES17]}), 422,
         "model.cliques[0]"),
    Case("clique-order-13-over-server-cap", model({"variables": _NAMES17[:13], "cliques": [_NAMES17[:13]]}), 422,
         "max_order"),
    Case("variable-name-markup", model({"variables": ["<script>alert(1)</script>"]}), 422, "model.variables[0]"),
    Case("model-name-5000-chars", model({**M, "name": "n" * 5000}), 422, "model.name"),
    Case("model-empty-text", model("   "), 422, "model"),
    Case("model-an-integer", study({"model": 5}), 422, "model"),
    Case("model-format-uai-on-json", model('{"variables": ["a"]}', model_format="uai"), 422, "model"),
    Case("model-unknown-key", model({**M, "evil": 1}), 422, "model"),
    Case("192-tasks-each-carrying-a-600KB-model", study({
        "model": {"variables": _NAMES17[:12], "cliques": [_NAMES17[:12]],
                  "factors": [{"scope": _NAMES17[:12], "values": [1.5] * 4096}] * 16},
        "connectivities": ["line", "ring", "grid", "all-to-all", "heavy-hex"] + [f"line:{q}" for q in range(20, 27)],
        "noise_scales": [0.5 + 0.1 * i for i in range(16)]}), 422, "model", ("worst",)),
    Case("clique-members-over-65536", model({"variables": ["a"], "cliques": [["a"] * 70000]}), 422, "model.cliques"),
    Case("factor-entries-over-65536", model({**M, "factors": [{"scope": ["a", "b"], "values": [1] * 4}] * 17000}), 422,
         "model.factors"),
    # --- targets
    Case("custom-self-loop", model(M, connectivities=[{"family": "custom", "edges": [[0, 1], [1, 1]]}]), 422,
         "connectivities[0].edges[1]"),
    Case("custom-duplicate-edge", model(M, connectivities=[{"family": "custom", "edges": [[0, 1], [1, 2], [1, 0]]}]),
         422, "connectivities[0].edges[2]"),
    Case("custom-negative-qubit", model(M, connectivities=[{"family": "custom", "edges": [[0, -1]]}]), 422,
         "connectivities[0].edges"),
    Case("custom-qubit-1e9", model(M, connectivities=[{"family": "custom", "edges": [[0, 10**9]]}]), 422,
         "connectivities[0].edges[0]"),
    Case("custom-edge-of-three", model(M, connectivities=[{"family": "custom", "edges": [[0, 1, 2]]}]), 422,
         "connectivities[0].edges[0]"),
    Case("custom-5001-edges", model(M, connectivities=[{"family": "custom", "edges": [[0, 1]] * 5001}]), 422,
         "connectivities[0].edges"),
    Case("custom-file-path", model(M, connectivities=["custom:/etc/passwd"]), 422, "connectivities[0]"),
    Case("unknown-family", model(M, connectivities=["moebius"]), 422, "connectivities[0]"),
    Case("grid-9999x9999", model(M, connectivities=["grid:9999x9999"]), 422, "connectivities[0]"),
    Case("65-connectivities", model(M, connectivities=["line"] * 65), 422, "connectivities"),
    Case("13-connectivities-over-cap", model(M, connectivities=["line"] * 13), 422, "connectivities"),
    Case("unknown-gate-set", model(M, gate_set="teleport"), 422, "gate_set"),
    Case("unknown-strategy", model(M, strategy="magic"), 422, "strategy"),
    # --- noise options
    Case("65-noise-scales", study({"model": M, "noise_scales": [1.0] * 65}), 422, "noise_scales"),
    Case("17-noise-scales-over-cap", study({"model": M, "noise_scales": [1.0] * 17}), 422, "noise_scales"),
    Case("negative-noise-scale", study({"model": M, "noise_scales": [-1.0]}), 422, "noise_scales[0]"),
    Case("noise-scale-1e9", study({"model": M, "noise_scales": [1e9]}), 422, "noise_scales[0]"),
    Case("unknown-profile", study({"model": M, "profile": "real-device-9000"}), 422, "profile"),
    Case("profile-5000-overrides", study({"model": M, "profile": {**_PROFILE, "qubit": [{"index": 0}] * 5000}}),
         422, "profile.qubit"),
    Case("profile-negative-t1", study({"model": M, "profile": {**_PROFILE, "coherence": {"t1_us": -1, "t2_us": 1}}}),
         422, "profile.coherence.t1_us"),
    Case("method-unknown", study({"model": M, "method": "magic"}), 422, "method"),
    Case("time-budget-1e9", study({"model": M, "time_budget_seconds": 1e9}), 422, "time_budget_seconds"),
    Case("trajectories-0", study({"model": M, "trajectories": 0}), 422, "trajectories"),
    Case("fidelity-target-1.5", study({"model": M, "fidelity_target": 1.5}), 422, "fidelity_target"),
    Case("request-max-order-17", model(M, max_order=17), 422, "max_order"),
    Case("request-max-order-0", model(M, max_order=0), 422, "max_order"),
    Case("seeds-0", model(M, seeds=0), 422, "seeds"),
    Case("layers-9", model(M, layers=9), 422, "layers"),
    Case("seed-negative", model(M, seed=-1), 422, "seed"),
    Case("compile-only-a-string", study({"model": M, "compile_only": "yes"}), 422, "compile_only"),
    Case("unknown-request-field", study({"model": M, "evil": True}), 422, "evil"),
    # --- bodies and headers
    Case("body-nan", raw(b'{"model": {"variables": ["a"]}, "noise_scales": [NaN]}'), 422, "body"),
    Case("body-a-list", raw(b"[]"), 422, "body"),
    Case("body-invalid-json", raw(b'{"model": '), 422, "body"),
    Case("body-empty", raw(b""), 422, "body"),
    Case("body-not-utf8", raw(b'{"model": "\xff\xfe"}'), 422, "body"),
    Case("body-nested-100000-deep", raw(b'{"model": ' + b"[" * 100000 + b"]" * 100000 + b"}"), 422, "*",
         ("worst",)),
    Case("body-1.3-million-empty-objects", raw(b'{"model": "x", "x": [' + b",".join([b"{}"] * 1300000) + b"]}"), 422,
         "body", ("worst",)),
    Case("upload-1.3-million-empty-objects", {"method": "POST", "path": "/v1/studies", "files": {
        "file": ("m.json", b"[" + b",".join([b"{}"] * 1300000) + b"]")}}, 422, "model", ("worst",)),
    Case("body-over-4-MiB", raw(b'{"model": "' + b"x" * (4 * 2**20 + 10) + b'"}'), 413, "body", ("worst",)),
    Case("content-type-text", raw(b"{}", "text/plain"), 415, "Content-Type"),
    Case("idempotency-key-300-chars", model(M, headers={"Idempotency-Key": "k" * 300}), 422, "Idempotency-Key"),
    Case("idempotency-key-with-space", model(M, headers={"Idempotency-Key": "a b"}), 422, "Idempotency-Key"),
    Case("no-token", model(M, auth=False), 401, "Authorization"),
    Case("unknown-token", model(M, auth="Bearer not-a-token-of-anyone"), 401, "Authorization"),
    Case("basic-auth", model(M, auth="Basic YWxpY2U6cHc="), 401, "Authorization"),
    # --- uploads
    Case("upload-path-name", {"method": "POST", "path": "/v1/studies",
                              "files": {"file": ("../../etc/passwd", b"MARKOV\n1\n2\n0\n")}}, 422, "file"),
    Case("upload-two-files", {"method": "POST", "path": "/v1/studies",
                              "files": [("file", ("a.uai", b"x")), ("file", ("b.uai", b"y"))]}, 422, "file"),
    Case("upload-unknown-field", {"method": "POST", "path": "/v1/studies", "files": {"file": ("m.uai", b"x")},
                                  "data": {"evil": "1"}}, 422, "evil"),
    Case("upload-not-utf8", {"method": "POST", "path": "/v1/studies", "files": {"file": ("m.uai", b"\xff\xfe")}},
         422, "file"),
    Case("upload-explosive-uai", {"method": "POST", "path": "/v1/studies",
                                  "files": {"file": ("big.uai", EXPLOSIVE["uai-1e9-variables"].encode())},
                                  "data": {"compile_only": "true"}}, 422, "model.variables"),
    # --- the synchronous compile endpoint
    Case("compile-explosive-nodelink", {"method": "POST", "path": "/v1/compile",
                                        "json": {"model": EXPLOSIVE["nodelink-45-nodes-3^15-cliques"]}}, 422,
         "model.links", ("worst",)),
    Case("compile-7-targets", {"method": "POST", "path": "/v1/compile",
                               "json": {"model": M, "connectivities": ["line"] * 7}}, 422, "connectivities"),
    Case("compile-form-body", {"method": "POST", "path": "/v1/compile", "files": {"file": ("m.uai", b"x")}}, 415,
         "Content-Type"),
    # --- reads
    Case("list-limit-1000", get("/v1/studies", params={"limit": 1000}), 422, "limit"),
    Case("list-offset-negative", get("/v1/studies", params={"offset": -1}), 422, "offset"),
    Case("list-status-unknown", get("/v1/studies", params={"status": "weird"}), 422, "status"),
    Case("study-id-500-chars", get("/v1/studies/" + "a" * 500), 422, "study_id"),
    Case("study-unknown", get("/v1/studies/no-such-study"), 404, "study_id"),
    Case("circuit-index-not-int", get("/v1/studies/no-such-study/circuits/abc.qpy"), 422, "task_index"),
    Case("delete-unknown", {"method": "DELETE", "path": "/v1/studies/no-such-study"}, 404, "study_id"),
]
