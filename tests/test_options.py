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
