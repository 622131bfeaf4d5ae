"""The per-unit measures built in the warehouse against the same numbers computed independently
in pandas from the raw events (the reference here is pandas' own groupby / nunique).

On DuckDB active days are counted with a per-day bitmask instead of COUNT(DISTINCT day) (see
sql_templates/duckdb/_active_days.sql.j2); these checks put events on the days where the 63-day lanes meet
and on the window's edges, where an off-by-one would show."""

from __future__ import annotations

import datetime as dt
import shutil
import tomllib

import duckdb
import pandas as pd
import pytest

from sqlmatch import api
from sqlmatch import render
from sqlmatch.plan import MeasureColumn, build_plan
from sqlmatch.errors import SpecError
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC

PRE_START, COHORT_START = pd.Timestamp("2025-09-01"), pd.Timestamp("2026-03-01")


@pytest.fixture
def db(demo_dir, tmp_path):
    path = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", path)
    return path


def spec_for(db):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    return parse_spec(raw)


def boundary_events(con) -> list[int]:
    """Trips on lane edges (days 0, 62, 63, 125, 126, last), at the first and last second of a
    day, twice on one day, and just outside the window, for three riders of the demo."""
    riders = [r for (r,) in con.execute("SELECT rider_id FROM riders ORDER BY rider_id LIMIT 3").fetchall()]
    times = [
        "2025-09-01 00:00:00", "2025-11-02 23:59:59", "2025-11-03 00:00:00", "2025-11-03 12:00:00",
        "2026-01-04 08:00:00", "2026-01-05 08:00:00", "2026-02-28 23:59:59", "2026-03-01 00:00:00",
        "2025-08-31 23:59:59",
    ]
    columns = [c for (c,) in con.execute("SELECT column_name FROM information_schema.columns WHERE table_name = 'trips' ORDER BY ordinal_position").fetchall()]
    for r in riders:
        for t in times:
            values = {c: "NULL" for c in columns}
            values.update(rider_id=str(r), started_at=f"TIMESTAMP '{t}'", minutes="10", fare="2.5")
            con.execute(f"INSERT INTO trips ({', '.join(columns)}) VALUES ({', '.join(values[c] for c in columns)})")
    return riders


def test_active_days_and_counts_equal_pandas(db):
    with duckdb.connect(str(db)) as con:
        riders = boundary_events(con)
    spec = spec_for(db)
    assert "BIT_OR" in build_plan(spec, "duckdb").step("unit_measures").statements[-3]  # the fast path is the one tested
    api.run(spec, keep_tables=True)
    with duckdb.connect(str(db), read_only=True) as con:
        got = con.execute("SELECT unit_key, pre_active_days, pre_trips FROM sqlmatch.annual_pass_measures").df().set_index("unit_key")
        trips = con.execute("SELECT rider_id, started_at FROM trips").df()
    pre = trips[(trips.started_at >= PRE_START) & (trips.started_at < COHORT_START)]
    expected_days = pre.groupby("rider_id").started_at.apply(lambda s: s.dt.normalize().nunique())
    expected_trips = pre.groupby("rider_id").size()
    want = pd.DataFrame({"days": expected_days, "trips": expected_trips}).reindex(got.index).fillna(0)
    assert (got.pre_active_days.to_numpy() == want.days.to_numpy()).all()
    assert (got.pre_trips.to_numpy() == want.trips.to_numpy()).all()
    # The boundary riders: every added pre-window day counted once, the two outside ones not.
    for r in riders:
        assert got.loc[r, "pre_active_days"] == want.loc[r, "days"] >= 6


def test_other_dialects_keep_the_portable_distinct_count(db):
    spec = spec_for(db)
    for dialect in ("postgres", "spark"):
        sql = " ".join(build_plan(spec, dialect).step("unit_measures").statements[-3].replace("(", "( ").split())
        assert "COUNT( DISTINCT" in sql and "BIT_OR" not in sql.upper(), dialect


@pytest.mark.parametrize("days, lanes", [(63, 1), (64, 2), (504, 8), (505, 0)])
def test_duckdb_bitmask_only_for_windows_it_can_hold(days, lanes):
    # 8 BIGINT lanes of 63 days hold 504 days; a longer window is counted with COUNT(DISTINCT day)
    start = dt.date(2025, 1, 1)
    col = MeasureColumn(name="x", agg="active_days", start=start, end=start + dt.timedelta(days=days), fill=0.0)
    assert len(col.day_lanes) == lanes
    sql = {d: render.environment(dialect=d).get_template("_macros.sql.j2").module.event_aggregate(col, "ts") for d in ("duckdb", "postgres")}
    assert sql["duckdb"].count("BIT_COUNT") == lanes
    assert ("COUNT(DISTINCT" in sql["duckdb"]) is (lanes == 0)
    assert "BIT_COUNT" not in sql["postgres"] and "COUNT(DISTINCT" in sql["postgres"]


def test_a_post_window_that_starts_with_the_cohort_month(db):
    """windows.post_starts = "cohort": outcomes over [cohort start, + post months), counted like
    pandas' own count of the same trips; the run says what that window includes."""
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    raw["windows"]["post_starts"] = "cohort"
    spec = parse_spec(raw)
    w = spec.windows
    assert (w.post_start, w.post_end) == (dt.date(2026, 3, 1), dt.date(2026, 6, 1))
    results = api.run(spec, keep_tables=True)
    assert [x.kind for x in results.warnings if "post window starts with the cohort month" in x] == ["design"]
    with duckdb.connect(str(db), read_only=True) as con:
        got = con.execute("SELECT unit_key, post_trips FROM sqlmatch.annual_pass_measures").df().set_index("unit_key")
        trips = con.execute("SELECT rider_id, started_at FROM trips").df()
    post = trips[(trips.started_at >= pd.Timestamp("2026-03-01")) & (trips.started_at < pd.Timestamp("2026-06-01"))]
    want = post.groupby("rider_id").size().reindex(got.index).fillna(0)
    assert (got.post_trips.to_numpy() == want.to_numpy()).all()
    raw["windows"]["post_starts"] = "enrolment"
    with pytest.raises(SpecError) as err:
        parse_spec(raw)
    assert err.value.key == "windows.post_starts"


@pytest.mark.parametrize("attributes_only", [False, True])
def test_late_events_warn_only_when_features_read_them(db, attributes_only):
    # events from 2025-10-15 on: the pre window (from 2025-09-01) is not covered; that matters
    # only to features built from events, not to a study matching on unit attributes alone
    with duckdb.connect(str(db)) as con:
        con.execute("DELETE FROM trips WHERE started_at < TIMESTAMP '2025-10-15 00:00:00'")
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    if attributes_only:
        raw["features"] = [f for f in raw["features"] if f["aggregate"] == "attribute"]
        raw["outcomes"] = [o for o in raw["outcomes"] if "twin" not in o]
        raw["matching"] = {"method": "coarsened_exact"}
    results = api.run(parse_spec(raw))
    assert any("pre-window features may be incomplete" in x for x in results.warnings) is not attributes_only
