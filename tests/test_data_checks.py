"""Checks on the data itself: duplicate unit keys are refused; windows the events do not cover
and features that carry no information are reported in plain words."""

from __future__ import annotations

import shutil
import tomllib

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.errors import DataError
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC


@pytest.fixture
def db(demo_dir, tmp_path):
    path = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", path)
    return path


def spec_for(db, **changes):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    raw.update(changes)
    return parse_spec(raw)


def tables(db):
    with duckdb.connect(str(db), read_only=True) as con:
        return con.execute("SELECT table_name FROM information_schema.tables WHERE table_schema = 'sqlmatch'").fetchall()


def test_duplicate_unit_keys_are_refused(db):
    with duckdb.connect(str(db)) as con:
        con.execute("CREATE TABLE riders_dup AS SELECT * FROM riders UNION ALL SELECT * FROM riders WHERE rider_id <= 5")
    raw_units = {"table": "riders_dup", "key": "rider_id", "enrolled_on": "pass_bought_on"}
    with pytest.raises(DataError) as info:
        api.run(spec_for(db, units=raw_units))
    assert "'units.key'" in str(info.value) and "deduplicate" in str(info.value)
    assert tables(db) == []


def test_events_that_stop_before_the_post_window_ends_are_reported(db):
    with duckdb.connect(str(db)) as con:
        con.execute("DELETE FROM trips WHERE started_at >= TIMESTAMP '2026-06-10'")
    results = api.run(spec_for(db), keep_tables=False)
    assert any("events end on 2026-06-09" in w for w in results.warnings), results.warnings


def test_constant_and_all_null_features_are_reported(db):
    with duckdb.connect(str(db)) as con:
        con.execute("ALTER TABLE riders ADD COLUMN fleet_size DOUBLE DEFAULT 400")
        con.execute("ALTER TABLE riders ADD COLUMN survey_score DOUBLE")
    raw = tomllib.loads(DEMO_SPEC.read_text())
    features = raw["features"] + [
        {"name": "fleet_size", "aggregate": "attribute", "attribute": "fleet_size"},
        {"name": "survey_score", "aggregate": "attribute", "attribute": "survey_score", "missing": "fill", "fill": 0},
    ]
    results = api.run(spec_for(db, features=features), keep_tables=False)
    text = " ".join(results.warnings)
    assert "'fleet_size' has the same value for every unit" in text
    # All NULL, filled: every unit is flagged, and both the feature and its indicator are constant.
    n = results.matching.n_treated + results.matching.n_control
    assert f"{n:,} units ({results.matching.n_treated:,} treated, {results.matching.n_control:,} control) have no value for 'survey_score'" in text
    assert "'survey_score' has the same value for every unit" in text
    assert "'survey_score_missing' has the same value for every unit" in text


def test_events_of_units_not_in_the_units_table_are_counted_and_reported(db):
    """Events whose rider is not in riders are left out and reported; the reference count is a
    plain SQL count over the rows inserted here."""
    with duckdb.connect(str(db)) as con:
        top = con.execute("SELECT MAX(rider_id) FROM riders").fetchone()[0]
        con.execute(
            f"INSERT INTO trips SELECT * REPLACE (rider_id + {top} AS rider_id) FROM trips "
            "WHERE rider_id <= 40 AND started_at >= TIMESTAMP '2025-09-01' AND started_at < TIMESTAMP '2026-07-01'"
        )
        events, units = con.execute(
            f"SELECT COUNT(*), COUNT(DISTINCT rider_id) FROM trips WHERE rider_id > {top} "
            "AND started_at >= TIMESTAMP '2025-09-01' AND started_at < TIMESTAMP '2026-07-01'"
        ).fetchone()
    assert events > 0 and units >= 10
    before = api.run(spec_for(db), keep_tables=False)
    (line,) = [w for w in before.warnings if "not in 'riders'" in w]
    assert line.startswith(f"{events:,} events in the windows belong to {units:,} units")
    # Switched off: no such line, and the same estimates (the unknown events never counted).
    raw_events = {**tomllib.loads(DEMO_SPEC.read_text())["events"], "check_unknown_units": False}
    after = api.run(spec_for(db, events=raw_events), keep_tables=False)
    assert not [w for w in after.warnings if "not in 'riders'" in w]
    assert [e.estimate for e in after.effects] == pytest.approx([e.estimate for e in before.effects], rel=1e-9)


@pytest.mark.parametrize("check_unknown", [True, False])
def test_events_without_a_time_or_a_unit_key_are_counted_and_reported(db, check_unknown):
    """Events with a NULL time cannot be placed in a window, events with a NULL unit key belong to
    no unit: both are left out, counted in the one pass over the events and reported. Reference
    counts: plain SQL over the rows changed here. The estimates equal those of a run on the data
    with those rows deleted (leaving them out is all that happens)."""
    raw_events = {**tomllib.loads(DEMO_SPEC.read_text())["events"], "check_unknown_units": check_unknown}
    first = api.run(spec_for(db, events=raw_events), keep_tables=True)
    assert not [w for w in first.warnings if "no time" in w or "no unit key" in w]
    with duckdb.connect(str(db)) as con:
        con.execute("CREATE TABLE study_units AS SELECT unit_key, treated FROM sqlmatch.annual_pass_units")
        for t in [t for (t,) in con.execute("SELECT table_name FROM information_schema.tables WHERE table_schema = 'sqlmatch'").fetchall()]:
            con.execute(f'DROP TABLE sqlmatch."{t}"')
        con.execute("CREATE TABLE trips_before AS SELECT * FROM trips")
        # every 3rd trip of treated riders and every 20th of controls loses its time; 57 trips
        # in the windows lose their rider
        con.execute(
            "UPDATE trips SET started_at = NULL WHERE trip_id IN (SELECT t.trip_id FROM trips AS t JOIN study_units AS s "
            "ON s.unit_key = t.rider_id WHERE (s.treated = 1 AND t.trip_id % 3 = 0) OR (s.treated = 0 AND t.trip_id % 20 = 0))"
        )
        con.execute(
            "UPDATE trips SET rider_id = NULL WHERE trip_id IN (SELECT trip_id FROM trips WHERE started_at >= TIMESTAMP '2025-09-01' "
            "AND started_at < TIMESTAMP '2026-07-01' ORDER BY trip_id LIMIT 57)"
        )
        untimed = dict(con.execute(
            "SELECT s.treated, COUNT(*) FROM trips AS t JOIN study_units AS s ON s.unit_key = t.rider_id WHERE t.started_at IS NULL GROUP BY 1"
        ).fetchall())
        (keyless,) = con.execute("SELECT COUNT(*) FROM trips WHERE rider_id IS NULL").fetchone()
        con.execute("CREATE TABLE trips_clean AS SELECT * FROM trips WHERE started_at IS NOT NULL AND rider_id IS NOT NULL")
    assert untimed[1] > 100 and untimed[0] > 100 and keyless == 57
    results = api.run(spec_for(db, events=raw_events), keep_tables=False)
    (line,) = [w for w in results.warnings if "no time" in w]
    assert line.startswith(f"{untimed[1] + untimed[0]:,} events of the study's units have no time ({untimed[1]:,} of treated units, {untimed[0]:,} of control units)")
    assert "events.time" in line
    (line,) = [w for w in results.warnings if "no unit key" in w]
    assert line.startswith(f"{keyless:,} events have no unit key")
    assert "events.unit_key" in line
    assert not [w for w in results.warnings if "not in 'riders'" in w]  # keyless events are not an unknown unit
    clean = api.run(spec_for(db, events={**raw_events, "table": "trips_clean"}), keep_tables=False)
    assert [e.estimate for e in results.effects] == pytest.approx([e.estimate for e in clean.effects], rel=1e-12)
    assert not [w for w in clean.warnings if "no time" in w or "no unit key" in w]
