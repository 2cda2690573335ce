"""One table of limits and one fidelity-target default, read by every surface."""

from __future__ import annotations

import html
import re
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from toposcout.compiler.errors import ModelError
from toposcout.compiler.options import DEFAULT_FIDELITY_TARGET, LIMITS, limits_markdown
from toposcout.compiler.study import make_tasks
from toposcout.service.api.app import create_app
from toposcout.service.api.schemas import StudyRequest
from toposcout.service.settings import Settings

ROOT = Path(__file__).resolve().parent.parent


def test_the_readme_carries_the_table_of_limits():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    block = text.split("<!-- limits:begin -->\n", 1)[1].split("\n<!-- limits:end -->", 1)[0]
    assert block == limits_markdown()


def test_the_api_schema_has_the_same_bounds():
    schema = StudyRequest.model_json_schema()["properties"]
    for name in ("seeds", "layers", "seed", "max_order", "fidelity_target", "trajectories", "precision",
                 "time_budget_seconds", "requirement_tolerance"):
        L = LIMITS[name]
        prop = schema[name]
        prop = next((p for p in prop.get("anyOf", [prop]) if p.get("type") != "null"), prop)
        lo = prop.get("exclusiveMinimum" if L.low_open else "minimum")
        hi = prop.get("exclusiveMaximum" if L.high_open else "maximum")
        assert (lo, hi) == (L.low, L.high), name


@pytest.mark.parametrize("name", ["seeds", "layers"])
def test_make_tasks_refuses_one_past_the_table(small_model, name):
    # the library (CLI, embedded compare) and the API refuse the same value
    with pytest.raises(ModelError) as info:
        make_tasks(small_model, ["line"], compile_only=True, **{name: int(LIMITS[name].high) + 1})
    assert info.value.field == name
    make_tasks(small_model, ["line"], compile_only=True, **{name: int(LIMITS[name].high)})
    assert StudyRequest.model_validate({"model": small_model, name: int(LIMITS[name].high)})
    with pytest.raises(ValueError):
        StudyRequest.model_validate({"model": small_model, name: int(LIMITS[name].high) + 1})


def test_the_submit_form_states_the_same_limits(tmp_path):
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'd.db'}", data_dir=tmp_path, workers=1)
    with TestClient(create_app(settings)) as c:
        page = html.unescape(c.get("/submit").text)
    for name in ("seeds", "layers", "fidelity_target"):
        label = re.search(rf'<label for="{name}">(.*?)</label>', page, re.S).group(1)
        assert LIMITS[name].describe() in label, (name, label)
    assert str(DEFAULT_FIDELITY_TARGET) in page


def test_one_default_fidelity_target_in_the_api(small_model, tmp_path):
    # The API (and so the client) applies the same default as the CLI: a sweep gets the requirement.
    from toposcout.service.api.planning import prepare

    settings = Settings(database_url=f"sqlite:///{tmp_path / 'd.db'}", data_dir=tmp_path, workers=1)
    sweep = prepare(StudyRequest.model_validate({"model": small_model, "connectivities": ["line"],
                                                 "noise_scales": [0.5, 1.0]}), settings)
    assert sweep.request["fidelity_target"] == DEFAULT_FIDELITY_TARGET
    assert sweep.tasks[0]["fidelity_target"] == DEFAULT_FIDELITY_TARGET
    one = prepare(StudyRequest.model_validate({"model": small_model, "connectivities": ["line"]}), settings)
    assert one.request["fidelity_target"] is None


def test_the_api_takes_a_list_of_profiles_and_searches_each_requirement(small_model, tmp_path):
    from toposcout.service.api.planning import prepare

    settings = Settings(database_url=f"sqlite:///{tmp_path / 'd.db'}", data_dir=tmp_path, workers=1)
    p = prepare(StudyRequest.model_validate({"model": small_model, "connectivities": ["line"],
                                             "profile": ["superconducting", "neutral_atom"],
                                             "noise_scales": [0.5, 1.0]}), settings)
    assert [(t["profile"], t["noise_scale"], t["fidelity_target"]) for t in p.tasks] == [
        ("superconducting", 0.5, DEFAULT_FIDELITY_TARGET), ("superconducting", 1.0, None),
        ("neutral_atom", 0.5, DEFAULT_FIDELITY_TARGET), ("neutral_atom", 1.0, None)]
    assert p.request["profile"] == ["superconducting", "neutral_atom"]


def test_the_sweep_chart_draws_one_curve_per_connectivity_and_profile():
    from toposcout.service.web import charts

    rows = [{"connectivity": "line-4", "profile": prof, "noise_scale": s, "state_fidelity": f ** s,
             "two_qubit_gates": 6, "error": None} for prof, f in (("a", 0.9), ("b", 0.7)) for s in (0.5, 1.0)]
    desc = charts.chart_description("sweep", rows)
    assert "line-4 (a):" in desc and "line-4 (b):" in desc
