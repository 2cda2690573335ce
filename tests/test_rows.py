"""One definition of a row: every field a row carries is defined once, and every surface reads it.

Common practice (a single source of truth for a data dictionary): the README's field table, the
API schema, the CLI table, the CSV header and the dashboard's headers come from
``toposcout.compiler.rows``; a field the library emits without a definition fails here.
"""

from __future__ import annotations

import csv
import io
import re
from pathlib import Path

import pytest

from toposcout.compiler.rows import DASHBOARD_COLUMNS, FIELDS, GROUPS, ROW_FIELDS, TABLE_COLUMNS, markdown_table
from toposcout.compiler.study import make_tasks, run_task
from toposcout.service.api.schemas import Row
from toposcout.service.output import rows_table, write_csv

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def rows(make_model) -> list[dict]:
    model = make_model("abc", "cd")
    tasks = make_tasks(model, ["line", "all-to-all"], seeds=1, strategy="auto", fidelity_target=0.5,
                       noise_scales=[1.0])
    tasks += make_tasks(model, ["ring"], seeds=1, compile_only=True, strategy="generic")
    # every method's figures
    tasks += make_tasks(model, ["line"], seeds=1, method="trajectories", trajectories=16, fidelity_target=0.5)
    tasks += make_tasks(model, ["line"], seeds=1, method="clifford", fidelity_target=0.5)
    # a row whose noise figures cannot be computed (a forced method past its time budget)
    tasks += make_tasks(model, ["grid"], seeds=1, method="trajectories", time_budget_seconds=1e-9,
                        error_budget=False)
    return [run_task(t) for t in tasks]


def test_every_field_a_row_carries_is_defined(rows):
    emitted = {k for r in rows for k in r}
    assert "state_fidelity" in emitted and "auto_winner" in emitted and any(r.get("noise_error") for r in rows)
    undefined = sorted(emitted - set(FIELDS))
    assert undefined == [], f"define these row fields in compiler/rows.py: {undefined}"


def test_the_values_have_the_defined_kinds(rows):
    kinds = {"int": int, "float": (float, int), "str": str, "bool": bool, "object": dict, "list": list}
    for r in rows:
        for k, v in r.items():
            if v is not None:
                assert isinstance(v, kinds[FIELDS[k].kind]), (k, v, FIELDS[k].kind)


def test_definitions_are_complete_and_unique():
    assert len({f.name for f in ROW_FIELDS}) == len(ROW_FIELDS)
    for f in ROW_FIELDS:
        assert f.meaning and f.group in GROUPS and f.kind in ("int", "float", "str", "bool", "object", "list"), f
    for names in (*TABLE_COLUMNS.values(), DASHBOARD_COLUMNS):
        assert set(names) <= set(FIELDS)


def test_readme_table_is_the_definition():
    text = (ROOT / "README.md").read_text()
    m = re.search(r"<!-- row-fields:begin -->\n(.*?)<!-- row-fields:end -->", text, re.S)
    assert m, "README.md has the generated row-field table"
    assert m.group(1) == markdown_table(), (
        "README's row-field table is out of date: paste the output of "
        "python -c 'from toposcout.compiler.rows import markdown_table; print(markdown_table())'")


def test_schema_documents_every_field():
    props = Row.model_json_schema()["properties"]
    for f in ROW_FIELDS:
        assert f.name in props and f.meaning in props[f.name].get("description", f.meaning), f.name


def test_cli_table_and_csv_follow_the_definition(rows):
    ok = [r for r in rows if not r["error"]]
    header = rows_table(ok).splitlines()[0].split()
    assert header[:3] == [FIELDS[k].header for k in TABLE_COLUMNS["compile"][:3]]
    buf = io.StringIO()
    write_csv(ok, buf)
    columns = next(csv.reader(io.StringIO(buf.getvalue())))
    order = [f.name for f in ROW_FIELDS]
    assert columns == sorted(columns, key=order.index)  # definition order, every column defined
