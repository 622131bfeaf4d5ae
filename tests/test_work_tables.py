"""Work tables never overwrite or drop what sqlmatch did not create: a work table named like a
source table or the results history is refused before any SQL runs, and clean-up (after a run,
of leftovers, or `sqlmatch cleanup`) drops only names this study's plan can write."""

from __future__ import annotations

import shutil
import tomllib

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.errors import SpecError
from sqlmatch.plan import writable_tables
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC


@pytest.fixture
def db(demo_dir, tmp_path):
    path = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", path)
    return path


def raw_spec(db):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    return raw


def all_tables(db) -> set[tuple[str, str]]:
    with duckdb.connect(str(db), read_only=True) as con:
        return set(con.execute("SELECT table_schema, table_name FROM information_schema.tables").fetchall())


def row_count(db, table: str) -> int:
    with duckdb.connect(str(db), read_only=True) as con:
        return con.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0]


def test_units_table_named_like_a_work_table_is_refused_and_untouched(db):
    with duckdb.connect(str(db)) as con:
        con.execute("CREATE TABLE main.annual_pass_units AS SELECT * FROM riders")
    raw = raw_spec(db)
    raw["study"]["work_schema"] = "main"
    raw["units"]["table"] = "main.annual_pass_units"
    before = row_count(db, "main.annual_pass_units")
    with pytest.raises(SpecError) as err:
        api.run(parse_spec(raw))
    assert err.value.key == "units.table" and "overwrite" in str(err.value)
    assert row_count(db, "main.annual_pass_units") == before


def test_events_table_in_the_work_schema_with_a_work_name_is_refused(db):
    with duckdb.connect(str(db)) as con:
        con.execute("CREATE SCHEMA IF NOT EXISTS sqlmatch")
        con.execute("CREATE TABLE sqlmatch.annual_pass_measures AS SELECT * FROM trips")
    raw = raw_spec(db)
    raw["events"]["table"] = "sqlmatch.annual_pass_measures"
    with pytest.raises(SpecError) as err:
        api.run(parse_spec(raw))
    assert err.value.key == "events.table"
    assert ("sqlmatch", "annual_pass_measures") in all_tables(db)


def test_results_table_named_like_a_work_table_is_refused(db):
    raw = raw_spec(db)
    raw["study"]["results_table"] = "annual_pass_units"
    with pytest.raises(SpecError) as err:
        api.compile_plan(parse_spec(raw))
    assert err.value.key == "study.results_table"


def test_work_schema_with_a_dot_is_refused():
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["work_schema"] = "team.work"
    with pytest.raises(SpecError) as err:
        api.compile_plan(parse_spec(raw))
    assert err.value.key == "study.work_schema"


def test_user_tables_beside_the_work_tables_survive_run_and_cleanup(db):
    """A user's table that merely starts with the study's name and ends like a half-built table
    is not a leftover of ours: neither the run's leftover clean-up nor `cleanup` drops it."""
    with duckdb.connect(str(db)) as con:
        con.execute("CREATE SCHEMA IF NOT EXISTS sqlmatch")
        con.execute("CREATE TABLE sqlmatch.annual_pass_backup__building AS SELECT 1 AS x")
        con.execute("CREATE TABLE sqlmatch.annual_pass_notes AS SELECT 1 AS x")
    spec = parse_spec(raw_spec(db))
    api.run(spec)
    present = {n for s, n in all_tables(db) if s == "sqlmatch"}
    assert {"annual_pass_backup__building", "annual_pass_notes"} <= present
    ours = {t.split(".", 1)[1] for t in writable_tables(spec)}
    existed = {f"sqlmatch.{n}" for n in present if n in ours}
    dropped = api.cleanup(spec)
    assert dropped == sorted(existed)  # each name once, only tables that were there
    left = {n for s, n in all_tables(db) if s == "sqlmatch"}
    assert left == {"annual_pass_backup__building", "annual_pass_notes"}


def test_the_old_method_name_is_refused_with_the_new_one():
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["matching"] = {"method": "nearest"}
    with pytest.raises(SpecError) as err:
        parse_spec(raw)
    assert err.value.key == "matching.method" and "nearest_neighbour" in str(err.value)


@pytest.mark.parametrize("method", ["coarsened_exact", "score_bins", "nearest_neighbour"])
def test_writable_tables_are_what_the_full_plans_write(method):
    """writable_tables lists the plans without rendering SQL or fitting a model; the list must be
    exactly the tables of the rendered full plans (run and scheduler forms), whatever the model."""
    from sqlmatch.plan import build_plan
    from sqlmatch.propensity import DesignColumn, FittedModel

    spec = parse_spec(tomllib.loads(DEMO_SPEC.read_text())).with_overrides(method=method)
    columns = [DesignColumn("intercept", "intercept")] + [DesignColumn(f, "numeric", feature=f) for f in spec.propensity.features if not spec.feature(f).categorical]
    model = FittedModel(columns, [0.1] * len(columns), 3, -1.0, 100, "test", {}) if method != "coarsened_exact" else None
    rendered = [t for materialize in (False, True) for t in build_plan(spec, model=model, materialize=materialize).work_tables]
    assert writable_tables(spec) == tuple(dict.fromkeys(rendered))
    listed = build_plan(spec, names_only=True)
    assert listed.complete and all(not s.statements for s in listed.steps)
