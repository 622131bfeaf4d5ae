"""The placebo check: the demo design placed earlier, where the true effect is zero by
construction. Its windows, its treated group (the real cohort) and its outcome means are checked
against pandas counts of the same trips; the spec refuses a shift that would let a placebo window
reach the cohort month."""

from __future__ import annotations

import datetime as dt
import json
import tomllib

import duckdb
import pandas as pd
import pytest

from sqlmatch import api
from sqlmatch.errors import SpecError
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC


def raw_spec(db, **placebo) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    raw["windows"].update(pre=3, post=2)  # the demo's trips start in 2025-07: room for windows before the cohort
    raw["placebo"] = placebo
    return raw


@pytest.fixture
def db(demo_db):
    return demo_db


def test_placebo_windows_end_before_the_cohort_and_the_treated_are_the_cohort(db, tmp_path):
    spec = parse_spec(raw_spec(db, months_before=3))
    p = spec.placebo_spec()
    # cohort 2026-03 moved 3 months back: pre Sep..Nov 2025, post Jan..Feb 2026 (ends when March begins)
    assert (p.windows.pre_start, p.windows.cohort_start, p.windows.post_start, p.windows.post_end) == (
        dt.date(2025, 9, 1), dt.date(2025, 12, 1), dt.date(2026, 1, 1), dt.date(2026, 3, 1)
    )
    results = api.run(spec, keep_tables=True)
    placebo = results.placebo.results
    assert placebo.study == "annual_pass_placebo"
    with duckdb.connect(str(db), read_only=True) as con:
        units = con.execute("SELECT unit_key, treated FROM sqlmatch.annual_pass_placebo_units").df()
        real = con.execute("SELECT unit_key, treated FROM sqlmatch.annual_pass_units").df()
        trips = con.execute("SELECT rider_id, started_at FROM trips").df()
    # the same units, the same treated group: the real cohort (March 2026 buyers)
    assert units.sort_values("unit_key").reset_index(drop=True).equals(real.sort_values("unit_key").reset_index(drop=True))
    # the placebo's unmatched means: pandas' count of trips in Jan..Feb 2026 per unit
    post = trips[(trips.started_at >= pd.Timestamp("2026-01-01")) & (trips.started_at < pd.Timestamp("2026-03-01"))]
    counts = post.groupby("rider_id").size().reindex(units.unit_key).fillna(0).to_numpy()
    means = pd.Series(counts).groupby(units.treated.to_numpy()).mean()
    e = placebo.effect("post_trips")
    assert e.naive.estimate == pytest.approx(means[1] - means[0], rel=1e-9)
    out = json.loads(results.to_json())["placebo"]
    assert out["months_before"] == 3 and len(out["readings"]) == len(placebo.effects)
    assert {x["outcome"] for x in out["effects"]} == {o.name for o in spec.outcomes}


def test_a_placebo_that_would_reach_the_cohort_is_refused(db):
    with pytest.raises(SpecError) as err:
        parse_spec(raw_spec(db, months_before=2))  # post window Feb..Mar 2026 would overlap the cohort
    assert err.value.key == "placebo.months_before" and "months_before = 3" in str(err.value)
