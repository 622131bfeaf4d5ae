"""Hostile names and filters: whatever a spec names, the compiled SQL holds exactly the intended
statements and touches only the intended tables (property-based, hypothesis)."""

from __future__ import annotations

import tomllib

import pytest
import sqlglot
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sqlglot import exp

from sqlmatch.dialects import DIALECTS
from sqlmatch.errors import SpecError
from sqlmatch.plan import build_plan

from test_safety import expected_kinds
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC

BASE = tomllib.loads(DEMO_SPEC.read_text())

# Names with quotes, backticks, semicolons, spaces, comment markers, unicode and reserved words.
hostile_name = st.one_of(
    st.sampled_from(["select", "order", "group", "table", "from", "user", "drop", 'a"b', "a`b", "x;DROP TABLE riders", "a b", "--x", "/*x*/", "a*/b", "x */ DROP TABLE riders; /*", "/*", "naïve", "日本", "$1"]),
    # control and format characters are refused at load (test_safety.py); everything else is allowed
    st.text(alphabet=st.characters(blacklist_categories=("Cs", "Cc", "Cf", "Zl", "Zp")), min_size=1, max_size=12).filter(lambda s: s.strip() and "." not in s),
)


def spec_with(units: str, events: str, schema: str, key: str, time: str, measure: str):
    raw = {**BASE}
    raw["units"] = {"table": {"schema": schema, "name": units}, "key": key, "enrolled_on": "pass_bought_on"}
    raw["events"] = {"table": {"schema": schema, "name": events}, "unit_key": key, "time": time}
    raw["features"] = [
        {"name": "pre_events", "aggregate": "count"},
        {"name": "pre_amount", "aggregate": "sum", "measure": measure},
        {"name": "band", "aggregate": "attribute", "attribute": measure, "type": "categorical"},
    ]
    raw["outcomes"] = [{"name": "post_amount", "aggregate": "sum", "measure": measure}]
    raw["matching"] = {"on": ["pre_events", "band"], "cut_points": {"pre_events": [1, 5]}}
    raw["eligibility"] = {"filters": []}
    return parse_spec(raw)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    dialect=st.sampled_from(DIALECTS),
    units=hostile_name,
    events=hostile_name,
    schema=hostile_name,
    key=hostile_name,
    time=hostile_name,
    measure=hostile_name,
)
def test_compiled_sql_touches_only_the_intended_tables(dialect, units, events, schema, key, time, measure):
    if units == events:
        return
    spec = spec_with(units, events, schema, key, time, measure)
    plan = build_plan(spec, dialect)
    sources = {(schema, units), (schema, events)}
    work = {tuple(t.split(".", 1)) for t in plan.work_tables}
    building = {(s, n + "__building") for s, n in work}
    files = plan.files()
    for i, step in enumerate(plan.steps):
        # the file as written (header comment included), not only the statements
        trees = [t for t in sqlglot.parse(files[plan.file_name(i)], read=dialect) if t is not None]
        # the file's own statements: the step's, the session's time zone and the swap's BEGIN/COMMIT
        assert len(trees) == len(plan.file_statements(step)), f"{step.name}: a name split a statement"
        kinds = [type(t) for t in trees]
        expected = expected_kinds(step.kind, dialect, [exp.Union] if step.kind == "query" and exp.Union in kinds else None)
        assert kinds == expected, (step.name, kinds)
        ctes = {c.alias for t in trees for c in t.find_all(exp.CTE)}
        for t in trees:
            if step.kind == "setup":
                assert isinstance(t, exp.Create) and t.args.get("kind") == "SCHEMA"
                continue
            for table in t.find_all(exp.Table):
                if not table.db and (table.name in ctes or step.kind == "table" and isinstance(table.parent, exp.AlterRename)):
                    continue
                ref = (table.db, table.name)
                assert ref in sources | work | building, (step.name, ref)
                if ref in sources:
                    # source tables are only ever read
                    assert not isinstance(table.parent, (exp.Drop, exp.Create, exp.Alter, exp.Insert, exp.Delete, exp.Update)), (step.name, ref)


HOSTILE_FILTERS = [
    "1=1; DROP TABLE riders",
    "signup_date < DATE '2025-09-01'; DELETE FROM riders",
    "x = 1 /* */; DROP TABLE riders",
    "rider_id IN (SELECT rider_id FROM trips)",
    "rider_id = (SELECT MAX(rider_id) FROM riders)",
    "EXISTS (SELECT 1)",
    "(INSERT INTO riders VALUES (1))",
    "TRUE) OR (1=1",
    "pg_sleep(10) IS NULL OR TRUE; SELECT 1",
]


@pytest.mark.parametrize("text", HOSTILE_FILTERS)
def test_hostile_filters_are_refused_with_the_key(text):
    raw = {**BASE, "eligibility": {"filters": [text]}}
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert info.value.key == "eligibility.filters[0]"


@settings(max_examples=60, deadline=None)
@given(st.text(min_size=1, max_size=60))
def test_any_filter_text_is_one_boolean_expression_or_a_clear_error(text):
    raw = {**BASE, "eligibility": {"filters": [text]}}
    try:
        spec = parse_spec(raw)
    except SpecError as err:
        assert err.key == "eligibility.filters[0]"
        return
    plan = build_plan(spec, "duckdb")
    units_step = plan.step("study_units")
    trees = [t for t in sqlglot.parse(";\n".join(units_step.statements), read="duckdb") if t is not None]
    assert [type(t) for t in trees] == [exp.Drop, exp.Create, exp.Drop, exp.Alter]
    assert not any(isinstance(n, (exp.Insert, exp.Delete, exp.Update, exp.Drop)) for n in trees[1].walk())
