"""Derived features over the demo study's features, shared by the derived-feature, golden-SQL
and engine tests: a square, ln(1 + x), an indicator, a guarded ratio, an interaction with a
categorical attribute and one derived feature built on two others."""

from __future__ import annotations

DERIVED = [
    {"name": "pre_trips_sq", "aggregate": "derived", "expression": "pre_trips * pre_trips"},
    {"name": "log_trips", "aggregate": "derived", "expression": "ln(1 + pre_trips)"},
    {"name": "no_trips", "aggregate": "derived", "expression": "pre_trips = 0"},
    {"name": "minutes_per_trip", "aggregate": "derived", "expression": "pre_minutes / pre_trips", "fill": 0},
    {"name": "harbour_trips", "aggregate": "derived", "expression": "CASE WHEN home_district = 'Harbour' THEN pre_trips ELSE 0 END"},
    {"name": "sq_if_riding", "aggregate": "derived", "expression": "round(pre_trips_sq * (1 - no_trips) / (1 + pre_days_since_last), 1)"},
]


def with_derived(raw: dict) -> dict:
    """The demo spec with the derived features, matched on one of them (no_trips, exactly) and
    with a subgroup defined by another."""
    raw["features"] = list(raw["features"]) + [dict(d) for d in DERIVED]
    raw["matching"]["on"] = ["pre_trips", "age_band", "no_trips"]
    raw["matching"].setdefault("cut_points", {})["no_trips"] = [0.5]
    raw["subgroups"] = [{"name": "heavy", "where": "pre_trips_sq >= 100"}]
    return raw
