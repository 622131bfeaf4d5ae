"""The compiled scheduler files run as a scheduler runs them: each file as one script in its own
session, with no sqlmatch around it. Each file sets its session's time zone to UTC (DuckDB,
PostgreSQL, Spark) and swaps its table inside BEGIN ... COMMIT where DDL is transactional
(DuckDB, PostgreSQL), so a failure mid-swap leaves the old table; `sqlmatch report` then still
reads a whole set of aggregate tables."""

from __future__ import annotations

import json
import shutil

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.errors import SqlmatchError

from test_engines import _comparable, assert_same_numbers, demo_db, demo_spec, demo_tables, postgres, postgres_url, spark_engine  # noqa: F401 (fixtures, shared)
from test_time_zones import planted_rows, spec_for

SWAPPED = "outcome_strata"  # the step whose file gets the injected failure: report reads its table


def compiled(spec, dialect, folder):
    api.write_plan(api.compile_for_scheduler(spec, dialect), folder)
    manifest = json.loads((folder / "manifest.json").read_text())
    return [(s["name"], (folder / s["file"]).read_text()) for s in manifest["steps"]]


def fail_mid_swap(text: str, failing: str) -> str:
    """The file with a failing statement between the DROP of the old table and the RENAME."""
    head, sep, tail = text.partition("\n\nALTER TABLE")
    assert sep and "DROP TABLE IF EXISTS" in head.rsplit(";", 2)[-2], "the swap's DROP comes right before the RENAME"
    return head + f"\n\n{failing};" + sep + tail


def without_time_zone(text: str) -> str:
    return "\n".join(line for line in text.splitlines() if not line.startswith("SET "))


# ---------------------------------------------------------------------------------------------
# DuckDB


def run_duckdb(path, files, zone="UTC", edit=lambda name, text: text):
    """Each file as one script (DuckDB runs every statement of it), a new session per file whose
    own time zone is `zone`; a failing file ends its session, as a scheduler's task would."""
    for name, text in files:
        con = duckdb.connect(str(path))
        try:
            con.execute(f"SET TimeZone = '{zone}'")
            con.execute(edit(name, text))
        finally:
            con.close()


def test_duckdb_failure_mid_swap_leaves_the_old_table_and_report_reads_it(db, tmp_path):
    spec = spec_for(db, "trips_naive")
    files = compiled(spec, "duckdb", tmp_path / "sql")
    run_duckdb(db, files)
    before = _comparable(api.report_from_tables(spec))
    table = f"{spec.work_schema}.{spec.name}_agg_{SWAPPED}"
    with duckdb.connect(str(db)) as con:
        rows = sorted(con.execute(f"SELECT * FROM {table}").fetchall(), key=repr)

    with pytest.raises(duckdb.Error, match="injected"):
        run_duckdb(db, files, edit=lambda name, text: fail_mid_swap(text, "SELECT error('injected')") if name == SWAPPED else text)
    with duckdb.connect(str(db)) as con:
        assert sorted(con.execute(f"SELECT * FROM {table}").fetchall(), key=repr) == rows
    # every table of the set is there, whole: the report is the one before the failure
    assert_same_numbers(_comparable(api.report_from_tables(spec)), before)


def test_duckdb_files_cut_days_in_utc_in_a_session_elsewhere(db, tmp_path):
    """Trips planted minutes either side of midnight UTC at the window edges (tests/test_time_zones.py):
    the files run in New York and Tokyo sessions give the numbers `sqlmatch run` gives (which cuts
    in UTC); the same files without their SET statement give others, so the check can fail."""
    spec = spec_for(db, "trips_tz")
    reference = _comparable(api.run(spec, keep_tables=False))
    files = compiled(spec, "duckdb", tmp_path / "sql")
    for zone in ("America/New_York", "Asia/Tokyo"):
        run_duckdb(db, files, zone=zone)
        assert_same_numbers(_comparable(api.report_from_tables(spec)), reference, zone)
        run_duckdb(db, files, zone=zone, edit=lambda name, text: without_time_zone(text))
        assert _comparable(api.report_from_tables(spec))["effects"] != reference["effects"], zone


@pytest.fixture
def db(demo_dir, tmp_path):
    path = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", path)
    with duckdb.connect(str(path)) as con:
        planted_rows(con)
        con.execute("SET TimeZone = 'UTC'")
        con.execute("CREATE TABLE trips_tz AS SELECT * REPLACE (CAST(started_at AS TIMESTAMPTZ) AS started_at) FROM trips_naive")
    return path


# ---------------------------------------------------------------------------------------------
# PostgreSQL


def run_postgres(url, files, zone="UTC", edit=lambda name, text: text):
    """Each file as one script over a fresh autocommit connection (as psql runs a file), in a
    session whose time zone is `zone`; a failing file ends its session."""
    import psycopg

    jit = {}  # each file's session's JIT setting after the file ran
    for name, text in files:
        with psycopg.connect(url, autocommit=True, options=f"-c TimeZone={zone}") as con:
            con.execute(edit(name, text))
            jit[name] = con.execute("SHOW jit").fetchone()[0]
    return jit


@pytest.fixture
def pg_study(postgres):  # noqa: F811
    """The demo study over the copied tables, with trips as UTC instants (timestamptz) and trips
    planted near midnight UTC at the window edges, in schemas of its own."""
    engine, tag = postgres
    data, work = f"{tag}_tz", f"{tag}_sched"
    engine.execute(f'CREATE SCHEMA "{data}"')
    engine.execute(f'CREATE TABLE "{data}".riders AS SELECT * FROM "{tag}".riders')
    engine.execute(
        f'CREATE TABLE "{data}".trips AS SELECT trip_id, rider_id, started_at AT TIME ZONE \'UTC\' AS started_at, '
        f'minutes, fare, distance_km FROM "{tag}".trips'
    )
    planted = ", ".join(f"(TIMESTAMPTZ '{t}+00')" for t in ("2025-09-01 00:10:00", "2026-02-28 23:50:00", "2026-04-01 00:10:00", "2026-06-30 23:50:00"))
    engine.execute(
        f'INSERT INTO "{data}".trips SELECT 1000000000 + ROW_NUMBER() OVER (ORDER BY r.rider_id, p.t), r.rider_id, p.t, 17.0, 2.5, 3.0 '
        f'FROM (SELECT rider_id FROM "{data}".riders WHERE signup_date < DATE \'2025-09-01\' AND (pass_bought_on IS NULL '
        f"OR pass_bought_on >= DATE '2026-03-01' AND pass_bought_on < DATE '2026-04-01')) r, (VALUES {planted}) p(t), "
        "generate_series(1, 3) k"
    )
    try:
        yield engine, demo_spec(data, work)
    finally:
        for schema in (data, work):
            engine.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')


def test_postgres_files_match_run_cut_days_in_utc_and_survive_a_failure_mid_swap(pg_study, postgres_url, tmp_path):  # noqa: F811
    import psycopg

    engine, spec = pg_study
    files = compiled(spec, "postgres", tmp_path / "sql")
    # a session in Tokyo: the files set UTC themselves, so the report equals the direct run's
    jit = run_postgres(postgres_url, files, zone="Asia/Tokyo")
    # every file but the schema's turns JIT off for its session, as the engine adapter does (the
    # wide aggregates run many times slower compiled); the server's default here is on
    with psycopg.connect(postgres_url) as con:
        server_default = con.execute("SHOW jit").fetchone()[0]
    assert {name: v for name, v in jit.items() if name != files[0][0]} == {name: "off" for name, _ in files[1:]}
    assert jit[files[0][0]] == server_default
    scheduled = _comparable(api.report_from_tables(spec, engine=engine))
    direct = _comparable(api.run(spec, engine=engine))
    assert_same_numbers(scheduled, direct)

    table = f'"{spec.work_schema}"."{spec.name}_agg_{SWAPPED}"'
    rows = sorted(engine.fetch(f"SELECT * FROM {table}").rows, key=repr)
    with pytest.raises(psycopg.Error, match="division by zero"):
        run_postgres(postgres_url, files, edit=lambda name, text: fail_mid_swap(text, "SELECT 1 / 0") if name == SWAPPED else text)
    assert sorted(engine.fetch(f"SELECT * FROM {table}").rows, key=repr) == rows
    assert_same_numbers(_comparable(api.report_from_tables(spec, engine=engine)), scheduled)

    # without their SET statement the same files in Tokyo put the planted trips on other days
    run_postgres(postgres_url, files, zone="Asia/Tokyo", edit=lambda name, text: without_time_zone(text))
    assert _comparable(api.report_from_tables(spec, engine=engine))["effects"] != direct["effects"]


def test_postgres_schema_file_is_the_only_one_a_role_without_create_on_the_database_cannot_run(pg_study, postgres_url, tmp_path):  # noqa: F811
    """The work schema exists and the role owns it but may not create schemas: 00_work_schema.sql
    (marked skip_when_schema_exists) fails even with IF NOT EXISTS, every other file runs."""
    import psycopg

    engine, spec = pg_study
    files = compiled(spec, "postgres", tmp_path / "sql")
    manifest = json.loads((tmp_path / "sql" / "manifest.json").read_text())
    assert [s["name"] for s in manifest["steps"] if s.get("skip_when_schema_exists")] == ["work_schema"] == [files[0][0]]
    role = f"{spec.work_schema}_role"
    data = spec.units.schema
    engine.execute(f'CREATE SCHEMA "{spec.work_schema}"')
    # PostgreSQL's default gives PUBLIC no CREATE on a database; revoke it only if this server grants it, and
    # put back exactly what was there (a server left granting it would break other tests' premise)
    (public_may_create,) = engine.con.execute("SELECT has_database_privilege('public', current_database(), 'CREATE')").fetchone()
    engine.execute(f'CREATE ROLE "{role}" LOGIN')
    try:
        engine.execute(f'ALTER SCHEMA "{spec.work_schema}" OWNER TO "{role}"')
        engine.execute(f'GRANT USAGE ON SCHEMA "{data}" TO "{role}"')
        engine.execute(f'GRANT SELECT ON ALL TABLES IN SCHEMA "{data}" TO "{role}"')
        if public_may_create:
            engine.execute(f'REVOKE CREATE ON DATABASE "{engine.con.info.dbname}" FROM PUBLIC')
        url = postgres_url.replace("postgres@", f"{role}@", 1)
        with pytest.raises(psycopg.errors.InsufficientPrivilege):
            run_postgres(url, files[:1])
        run_postgres(url, files[1:])
        assert_same_numbers(_comparable(api.report_from_tables(spec, engine=engine)), _comparable(api.run(spec, engine=engine)))
    finally:
        if public_may_create:
            engine.execute(f'GRANT CREATE ON DATABASE "{engine.con.info.dbname}" TO PUBLIC')
        engine.execute(f'DROP SCHEMA IF EXISTS "{spec.work_schema}" CASCADE')
        engine.execute(f'DROP OWNED BY "{role}"')
        engine.execute(f'DROP ROLE "{role}"')


# ---------------------------------------------------------------------------------------------
# Spark


def test_spark_accepts_the_files_time_zone_statement(spark_engine):  # noqa: F811
    """The statement every Spark file starts with, run in a session set to Tokyo: the session is
    then in UTC, and a UTC instant just after midnight falls on its UTC day."""
    from sqlmatch.plan import FILE_TIME_ZONE

    key = "spark.sql.session.timeZone"
    before = spark_engine.spark.conf.get(key)
    try:
        spark_engine.spark.conf.set(key, "Asia/Tokyo")
        assert str(spark_engine.fetch("SELECT CAST(TIMESTAMP '2026-03-31 23:50:00+00:00' AS DATE) AS d").one()["d"]) == "2026-04-01"
        spark_engine.execute(FILE_TIME_ZONE["spark"])
        assert spark_engine.spark.conf.get(key) == "UTC"
        assert str(spark_engine.fetch("SELECT CAST(TIMESTAMP '2026-03-31 23:50:00+00:00' AS DATE) AS d").one()["d"]) == "2026-03-31"
    finally:
        spark_engine.spark.conf.set(key, before)


def test_report_refuses_tables_of_a_changed_spec_after_the_files_ran(db, tmp_path):
    """The fingerprint check still holds with the new file layout: an outcome renamed after the
    files ran is refused by report, naming the section."""
    spec = spec_for(db, "trips_naive")
    run_duckdb(db, compiled(spec, "duckdb", tmp_path / "sql"))
    raw = dict(spec._raw)
    raw["outcomes"] = [{**o, "name": o["name"] + "_renamed"} if i == 0 else o for i, o in enumerate(raw["outcomes"])]
    from sqlmatch.spec import parse_spec

    with pytest.raises(SqlmatchError, match="outcomes"):
        api.report_from_tables(parse_spec(raw))
