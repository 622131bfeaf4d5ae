"""Event times with a time zone (TIMESTAMPTZ) are cut into days in UTC, whatever the session's or
the machine's time zone: sqlmatch runs its statements in a session set to UTC and gives the
caller's session its own setting back afterwards.

Reference: the same trips with naive timestamps (TIMESTAMP, compared as written), where the
timestamptz copy holds those wall-clock times read as UTC. Trips are planted a few minutes either
side of midnight UTC at each window edge, where a session in New York or Tokyo would put them on
another day (and in or out of a window)."""

from __future__ import annotations

import shutil
import tomllib

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC
from test_engines import PG_TYPES, _session_tag, postgres_url  # noqa: F401 (a fixture, shared)

# window edges of the demo study: pre [2025-09-01, 2026-03-01), post [2026-04-01, 2026-07-01).
# Each planted time is inside a window in UTC; New York (UTC-4/-5) moves the two after midnight
# to the day before (out of the window), Tokyo (UTC+9) the two before midnight to the day after.
NEAR_MIDNIGHT = ["2025-09-01 00:10:00", "2026-02-28 23:50:00", "2026-04-01 00:10:00", "2026-06-30 23:50:00"] * 3
ZONES = ("America/New_York", "Asia/Tokyo")


def planted_rows(con) -> None:
    """Copy of trips with 8 trips near midnight for each of 60 eligible riders (30 enrolled in
    March 2026, 30 never enrolled), as naive `trips_naive` and UTC `trips_tz`."""
    riders = [r for (r,) in con.execute(
        "(SELECT rider_id FROM riders WHERE signup_date < DATE '2025-09-01' AND pass_bought_on >= DATE '2026-03-01' "
        "AND pass_bought_on < DATE '2026-04-01' ORDER BY rider_id LIMIT 30) UNION ALL "
        "(SELECT rider_id FROM riders WHERE signup_date < DATE '2025-09-01' AND pass_bought_on IS NULL ORDER BY rider_id LIMIT 30)"
    ).fetchall()]
    assert len(riders) == 60
    con.execute("CREATE TABLE trips_naive AS SELECT * FROM trips")
    (top,) = con.execute("SELECT MAX(trip_id) FROM trips").fetchone()
    values = ", ".join(
        f"({top + 1 + i * len(NEAR_MIDNIGHT) + j}, {r}, TIMESTAMP '{t}', 17.0, 2.5, 3.0)"
        for i, r in enumerate(riders) for j, t in enumerate(NEAR_MIDNIGHT)
    )
    con.execute(f"INSERT INTO trips_naive VALUES {values}")


def spec_for(db, events_table: str):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    raw["events"]["table"] = events_table
    return parse_spec(raw)


def numbers(results):
    """Matching counts, then every effect and balance figure (equal up to summation order)."""
    counts = (results.matching.n_treated_matched, results.matching.n_control_matched)
    figures = [x for e in results.effects for x in (e.estimate, e.std_error, e.naive.estimate)]
    figures += [x for b in results.balance for x in (b.smd_before, b.smd_after) if x is not None]
    return counts, figures


def assert_same(got, want, what):
    assert got[0] == want[0], what
    assert got[1] == pytest.approx(want[1], rel=1e-9, abs=1e-12), what


@pytest.fixture
def db(demo_dir, tmp_path):
    path = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", path)
    with duckdb.connect(str(path)) as con:
        planted_rows(con)
        con.execute("SET TimeZone = 'UTC'")
        con.execute("CREATE TABLE trips_tz AS SELECT * REPLACE (CAST(started_at AS TIMESTAMPTZ) AS started_at) FROM trips_naive")
        assert con.execute("SELECT typeof(started_at) FROM trips_tz LIMIT 1").fetchone() == ("TIMESTAMP WITH TIME ZONE",)
    return path


def test_duckdb_cuts_days_in_utc_whatever_the_session_time_zone(db):
    reference = numbers(api.run(spec_for(db, "trips_naive"), keep_tables=False))
    for zone in ZONES:
        con = duckdb.connect(str(db))
        try:
            con.execute(f"SET TimeZone = '{zone}'")
            got = numbers(api.run(spec_for(db, "trips_tz"), engine=DuckDBEngine(connection=con), keep_tables=False))
            assert_same(got, reference, zone)
            # the caller's session keeps its own setting
            assert con.execute("SELECT current_setting('TimeZone')").fetchone() == (zone,)
        finally:
            con.close()


def test_postgres_cuts_days_in_utc_whatever_the_session_time_zone(db, postgres_url):  # noqa: F811
    import psycopg

    from sqlmatch.engines.postgres import PostgresEngine

    tag = _session_tag()
    admin = psycopg.connect(postgres_url, autocommit=True)
    try:
        admin.execute(f'CREATE SCHEMA "{tag}"')
        with duckdb.connect(str(db), read_only=True) as source:
            for name in ("riders", "trips_naive"):
                cols = [(r[0], r[1]) for r in source.execute(f"DESCRIBE {name}").fetchall()]
                admin.execute(f'CREATE TABLE "{tag}"."{name}" (' + ", ".join(f'"{c}" {PG_TYPES[t]}' for c, t in cols) + ")")
                with admin.cursor() as cur, cur.copy(f'COPY "{tag}"."{name}" FROM STDIN') as copy:
                    for row in source.execute(f"SELECT * FROM {name} ORDER BY 1").fetchall():
                        copy.write_row(row)
        # the naive wall-clock times read as UTC instants
        admin.execute(
            f'CREATE TABLE "{tag}".trips_tz AS SELECT trip_id, rider_id, started_at AT TIME ZONE \'UTC\' AS started_at, '
            f'minutes, fare, distance_km FROM "{tag}".trips_naive'
        )
        (kind,) = admin.execute(f"SELECT pg_typeof(started_at)::text FROM \"{tag}\".trips_tz LIMIT 1").fetchone()
        assert kind == "timestamp with time zone"

        def spec(events):
            raw = tomllib.loads(DEMO_SPEC.read_text())
            raw["study"].pop("database")
            raw["study"]["work_schema"] = f"{tag}_work"
            raw["units"]["table"] = {"schema": tag, "name": "riders"}
            raw["events"]["table"] = {"schema": tag, "name": events}
            return parse_spec(raw)

        with PostgresEngine(postgres_url) as engine:
            reference = numbers(api.run(spec("trips_naive"), engine=engine, keep_tables=False))
        for zone in ZONES:
            with PostgresEngine(postgres_url) as engine:
                engine.con.execute(f"SET TIME ZONE '{zone}'")
                got = numbers(api.run(spec("trips_tz"), engine=engine, keep_tables=False))
                assert engine.con.execute("SELECT current_setting('TimeZone')").fetchone() == (zone,)
            assert_same(got, reference, zone)
    finally:
        for schema in (tag, f"{tag}_work"):
            admin.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        admin.close()
