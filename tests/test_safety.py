"""Safety: no spec, name, filter or data row can run hidden SQL, break a compiled file or crash
the load with a traceback. Each check here failed before its fix."""

from __future__ import annotations

import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import duckdb
import pandas as pd
import pytest
import sqlglot
from sqlglot import exp

from sqlmatch import api
from sqlmatch.dialects import DIALECTS
from sqlmatch.errors import SpecError
from sqlmatch.plan import build_plan
from sqlmatch.spec import RESERVED_COLUMNS, load_spec, parse_spec

from conftest import DEMO_SPEC

BASE = tomllib.loads(DEMO_SPEC.read_text())
EXPECTED_KINDS = {"setup": [exp.Create], "table": [exp.Drop, exp.Create, exp.Drop, exp.Alter], "query": [exp.Select]}


def expected_kinds(kind: str, dialect: str, body=None) -> list:
    """A compiled file's statement kinds: the session's time zone first where the dialect has the
    statement (DuckDB, PostgreSQL, Spark), on PostgreSQL then JIT off, and the swap in BEGIN ...
    COMMIT where DDL is transactional (DuckDB, PostgreSQL)."""
    zone = [exp.Set] if kind != "setup" and dialect in ("duckdb", "postgres", "spark") else []
    zone += [exp.Set] if kind != "setup" and dialect == "postgres" else []
    if kind == "table":
        swap = [exp.Drop, exp.Alter]
        if dialect in ("duckdb", "postgres"):
            swap = [exp.Transaction, *swap, exp.Commit]
        return zone + [exp.Drop, exp.Create] + swap
    return zone + (body or EXPECTED_KINDS[kind])


def raw_copy() -> dict:
    return tomllib.loads(DEMO_SPEC.read_text())


# ---------------------------------------------------------------------------------------------
# 1. names never leave their quotes, in statements or in comments


def hostile_comment_spec():
    """Names that end a block comment, open a nested one, start a line comment, or hold quotes,
    semicolons, unicode and reserved words; the units table and key are printed in comments."""
    raw = raw_copy()
    schema = 'bike "share" -- x'
    raw["units"] = {"table": {"schema": schema, "name": "riders */ DROP TABLE important; /*"}, "key": "key*/1", "enrolled_on": "päss; `bought` /* on"}
    raw["events"] = {"table": {"schema": schema, "name": "select"}, "unit_key": "key*/1", "time": "--started at"}
    raw["features"] = [
        {"name": "pre_trips", "aggregate": "count"},
        {"name": "pre_active_days", "aggregate": "active_days"},
        {"name": "pre_fare", "aggregate": "sum", "measure": "fare'; --"},
        {"name": "age_band", "aggregate": "attribute", "attribute": "Age */ Band", "type": "categorical"},
    ]
    raw["outcomes"] = [{"name": "post_fare", "aggregate": "sum", "measure": "fare'; --"}]
    raw["eligibility"] = {"filters": ['"Age */ Band" <> \'50+ */ DROP TABLE important; /*\'']}
    raw["matching"] = {"on": ["pre_trips", "age_band"], "cut_points": {"pre_trips": [1, 5, 10]}}
    spec = parse_spec(raw)
    sources = {(schema, "riders */ DROP TABLE important; /*"), (schema, "select")}
    return spec, sources


@pytest.mark.parametrize("dialect", DIALECTS)
def test_every_compiled_file_holds_exactly_the_planned_statements(dialect):
    spec, sources = hostile_comment_spec()
    plan = build_plan(spec, dialect)
    files = plan.files()
    manifest = plan.manifest()
    work = {tuple(t.split(".", 1)) for t in plan.work_tables}
    building = {(s, n + "__building") for s, n in work}
    for i, step in enumerate(plan.steps):
        entry = manifest["steps"][i]
        text = files[entry["file"]]
        # parse the file as written, header comment included
        trees = [t for t in sqlglot.parse(text, read=dialect) if t is not None]
        kinds = [type(t) for t in trees]
        expected = expected_kinds(entry["kind"], dialect, [exp.Union] if entry["kind"] == "query" and exp.Union in kinds else None)
        assert kinds == expected, (entry["file"], kinds)
        ctes = {c.alias for t in trees for c in t.find_all(exp.CTE)}
        for t in trees:
            if entry["kind"] == "setup":
                assert t.args.get("kind") == "SCHEMA"
                continue
            for table in t.find_all(exp.Table):
                if not table.db and (table.name in ctes or isinstance(table.parent, exp.AlterRename)):
                    continue
                ref = (table.db, table.name)
                assert ref in sources | work | building, (entry["file"], ref)
                if ref in sources:
                    assert not isinstance(table.parent, (exp.Drop, exp.Create, exp.Alter, exp.Insert, exp.Delete, exp.Update)), (entry["file"], ref)
        # no line of the header is anything but a comment, and no comment ends early
        for line in text.split("\n\n", 1)[0].splitlines():
            assert line.startswith("-- "), (entry["file"], line)


@pytest.mark.parametrize("char", ["\n", "\r", "\t", "\x00", "\x1b", "\u202e", "\u200b", "\u2028", "\ufeff"])
@pytest.mark.parametrize(
    "where, key",
    [
        (("units", "table", "name"), "units.table.name"),
        (("units", "key"), "units.key"),
        (("units", "enrolled_on"), "units.enrolled_on"),
        (("events", "time"), "events.time"),
        (("study", "work_schema"), "study.work_schema"),
    ],
)
def test_control_characters_in_names_are_refused_with_the_key(char, where, key):
    raw = raw_copy()
    if where[0] == "units" and where[1] == "table":
        raw["units"]["table"] = {"schema": "s", "name": f"riders{char}DROP TABLE important; --"}
    else:
        raw[where[0]][where[1]] = f"x{char}DROP TABLE important; --"
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert info.value.key == key
    assert f"U+{ord(char):04X}" in str(info.value)


def test_a_measure_with_a_line_break_is_refused():
    raw = raw_copy()
    raw["features"][1]["measure"] = "minutes\n; DROP TABLE riders"
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert info.value.key == "features[1].measure"


# ---------------------------------------------------------------------------------------------
# 2. filters are an allowlist


@pytest.mark.parametrize(
    "text, named",
    [
        ("nextval('seq') > 0", "nextval"),
        ("lo_import('/etc/hostname') > 0", "lo_import"),
        ("substr(pg_read_file('/etc/passwd'),1,4) = 'root'", "pg_read_file"),
        ("pg_sleep(10) IS NULL", "pg_sleep"),
        ("COUNT(*) > 1", "count"),
        ("ROW_NUMBER() OVER () = 1", "WINDOW"),
        ("rider_id IN (SELECT rider_id FROM trips)", "IN"),
        ("$1 = 1", "PLACEHOLDER"),
        ("random() < 0.5", "function"),
        ("current_date > signup_date", "current_date"),
    ],
)
def test_filters_outside_the_allowlist_are_refused_naming_the_construct(text, named):
    raw = {**BASE, "eligibility": {"filters": ["signup_date < DATE '2025-09-01'", text]}}
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert info.value.key == "eligibility.filters[1]"
    assert named in str(info.value)


@pytest.mark.parametrize(
    "text",
    [
        "signup_date < DATE '2025-09-01'",
        "age_band IN ('18-24', '25-34') AND NOT signup_date IS NULL",
        "EXTRACT(year FROM signup_date) BETWEEN 2020 AND 2025",
        "year(signup_date) + month(signup_date) / 12 > 2021",
        "lower(trim(age_band)) LIKE '2%' OR upper(age_band) ILIKE '3%'",
        "coalesce(length(age_band), 0) > 1",
        "CASE WHEN age_band = '50+' THEN 0 ELSE 1 END = 1",
        "CAST(signup_date AS DATE) >= DATE '2025-09-01' - INTERVAL 30 DAY",
        "substr(age_band, 1, 1) <> '5' AND abs(round(1.5)) >= floor(1.2) + ceil(0.2)",
        "least(1, 2) < greatest(3, 4) AND nullif(age_band, '') IS NOT NULL AND concat(age_band, 'x') <> 'x'",
    ],
)
def test_allowed_filters_compile_and_run_on_duckdb(text):
    raw = {**BASE, "eligibility": {"filters": [text]}}
    spec = parse_spec(raw)
    plan = build_plan(spec, "duckdb")
    (create,) = [t for t in sqlglot.parse(plan.step("study_units").statements[1], read="duckdb") if t]
    assert isinstance(create, exp.Create)


def test_deeply_nested_filter_is_a_spec_error_not_a_recursion_error():
    raw = {**BASE, "eligibility": {"filters": ["(" * 500 + "signup_date IS NULL" + ")" * 500]}}
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert info.value.key == "eligibility.filters[0]"


# ---------------------------------------------------------------------------------------------
# 3. names the templates use for their own columns


@pytest.mark.parametrize("name", ["unit_key", "treated", "last_event_at", "first_event_at", "in_study", "n_events"])
@pytest.mark.parametrize("section", ["features", "outcomes"])
def test_feature_and_outcome_names_may_not_be_internal_columns(name, section):
    raw = raw_copy()
    if section == "features":
        raw["features"].append({"name": name, "aggregate": "count"})
    else:
        raw["outcomes"].append({"name": name, "aggregate": "count"})
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert name in str(info.value) and "reserved names" in str(info.value)
    assert all(r in str(info.value) for r in RESERVED_COLUMNS)


# ---------------------------------------------------------------------------------------------
# 4. non-finite numbers and dates outside the calendar


@pytest.mark.parametrize("value", [float("nan"), float("inf"), float("-inf")])
@pytest.mark.parametrize(
    "path, key",
    [
        (("matching", "cut_points", "pre_trips"), "matching.cut_points.pre_trips[1]"),
        (("matching", "caliper"), "matching.caliper"),
        (("propensity", "ridge"), "propensity.ridge"),
        (("features", 1, "fill"), "features[1].fill"),
    ],
)
def test_non_finite_numbers_are_refused_with_the_key(value, path, key):
    raw = raw_copy()
    raw.setdefault("propensity", {})
    if path[0] == "features":
        raw["features"][path[1]][path[2]] = value
    elif path[-1] == "pre_trips":
        raw["matching"]["cut_points"]["pre_trips"] = [1.0, value]
    else:
        raw[path[0]][path[1]] = value
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert info.value.key == key


def test_nan_written_in_toml_is_refused(tmp_path):
    text = DEMO_SPEC.read_text().replace('[matching]', '[matching]\ncaliper = nan', 1)
    assert "caliper = nan" in text
    path = tmp_path / "study.toml"
    path.write_text(text)
    with pytest.raises(SpecError) as info:
        load_spec(path)
    assert info.value.key == "matching.caliper"


@pytest.mark.parametrize("cohort", ["0001-03", "9999-12", "0001-01"])
def test_windows_outside_the_calendar_are_a_spec_error(cohort):
    raw = raw_copy()
    raw["treatment"]["cohort"] = cohort
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert info.value.key == "treatment.cohort"


# ---------------------------------------------------------------------------------------------
# 5. DuckDB's active-days bitmask on a unit active every day of a year


def test_active_days_of_a_unit_active_every_day_of_twelve_months(demo_dir, tmp_path):
    db = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", db)
    with duckdb.connect(str(db)) as con:
        (rider,) = con.execute("SELECT MIN(rider_id) FROM riders").fetchone()
        columns = [c for (c,) in con.execute("SELECT column_name FROM information_schema.columns WHERE table_name = 'trips' ORDER BY ordinal_position").fetchall()]
        values = {c: "NULL" for c in columns}
        values.update(rider_id=str(rider), started_at="CAST(d AS TIMESTAMP) + INTERVAL 9 HOUR", minutes="10", fare="2.5")
        con.execute(
            f"INSERT INTO trips ({', '.join(columns)}) SELECT {', '.join(values[c] for c in columns)} "
            "FROM generate_series(DATE '2025-03-01', DATE '2026-02-28', INTERVAL 1 DAY) AS g(d)"
        )
    raw = raw_copy()
    raw["study"]["database"] = str(db)
    raw["windows"]["pre"] = 12
    spec = parse_spec(raw)
    assert "BIT_OR" in build_plan(spec, "duckdb").step("unit_measures").statements[-3]  # the fast path is tested
    api.run(spec, keep_tables=True)
    with duckdb.connect(str(db), read_only=True) as con:
        got = con.execute("SELECT unit_key, pre_active_days FROM sqlmatch.annual_pass_measures").df().set_index("unit_key")
        trips = con.execute("SELECT rider_id, started_at FROM trips").df()
    # independent count: distinct calendar days per rider in [2025-03-01, 2026-03-01), pandas
    pre = trips[(trips.started_at >= pd.Timestamp("2025-03-01")) & (trips.started_at < pd.Timestamp("2026-03-01"))]
    want = pre.groupby("rider_id").started_at.apply(lambda s: s.dt.normalize().nunique()).reindex(got.index).fillna(0)
    assert got.loc[rider, "pre_active_days"] == 365
    assert (got.pre_active_days.to_numpy() == want.to_numpy()).all()


# ---------------------------------------------------------------------------------------------
# 6. a spec that is not a readable UTF-8 file


def test_spec_that_is_not_utf8_is_a_spec_error(tmp_path):
    path = tmp_path / "study.toml"
    path.write_bytes(DEMO_SPEC.read_bytes().replace(b"annual_pass", b"annual_\xe9pass", 1))
    with pytest.raises(SpecError) as info:
        load_spec(path)
    assert "UTF-8" in str(info.value)


def test_spec_path_that_is_a_folder_is_a_spec_error(tmp_path):
    with pytest.raises(SpecError) as info:
        load_spec(tmp_path)
    assert "folder" in str(info.value)


@pytest.mark.parametrize("kind", ["folder", "latin1"])
def test_cli_prints_one_line_and_exits_2(tmp_path, kind):
    if kind == "folder":
        target = tmp_path
    else:
        target = tmp_path / "study.toml"
        target.write_bytes(DEMO_SPEC.read_bytes().replace(b"annual_pass", b"annual_\xe9pass", 1))
    out = tmp_path / "compiled"
    proc = subprocess.run(
        [sys.executable, "-m", "sqlmatch.cli", "compile", str(target), "--out", str(out)],
        capture_output=True, text=True, cwd=Path(__file__).resolve().parents[1],
        env={"PYTHONPATH": str(Path(__file__).resolve().parents[1]), "PATH": "/usr/bin:/bin"},
    )
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr and len(proc.stderr.strip().splitlines()) == 1, proc.stderr
    assert not out.exists()
