"""Categorical levels held by fewer than report.min_cell_size units of the study are pooled in
the warehouse into one level, "(other)", before anything is fetched: the rows fetched stay fixed
by the spec even for a feature with one level per unit, and no small level's name or share
leaves the warehouse."""

from __future__ import annotations

import json
import tomllib

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.demo_run import build_demo
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC

PLANTED = "Harbour Island"  # a district given to 3 eligible never-enrolled riders


def warehouse(folder, riders: int):
    build_demo(folder, riders=riders, seed=20260301)
    db = folder / "bikeshare.duckdb"
    with duckdb.connect(str(db)) as con:
        # one level per rider
        con.execute("ALTER TABLE riders ADD COLUMN rider_code VARCHAR")
        con.execute("UPDATE riders SET rider_code = 'rider-' || CAST(rider_id AS VARCHAR)")
        con.execute(
            f"UPDATE riders SET home_district = '{PLANTED}' WHERE rider_id IN (SELECT rider_id FROM riders "
            "WHERE signup_date < DATE '2025-09-01' AND pass_bought_on IS NULL ORDER BY rider_id LIMIT 3)"
        )
    return db


@pytest.fixture(scope="module")
def warehouses(tmp_path_factory):
    return {n: warehouse(tmp_path_factory.mktemp(f"pool{n}"), n) for n in (2_500, 5_000)}


def spec_for(db, on_code: bool = False, on=None):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    if on is not None:
        raw["matching"]["on"] = on
    raw["features"].append({"name": "rider_code", "aggregate": "attribute", "attribute": "rider_code", "type": "categorical"})
    if on_code:
        raw["matching"]["on"] = raw["matching"]["on"] + ["rider_code"]
    return parse_spec(raw)


def output_text(results, folder) -> str:
    api.write_results(results, folder)
    return "\n".join(p.read_text(encoding="utf-8") for p in sorted(folder.iterdir()) if p.suffix in (".json", ".md", ".html"))


def test_rows_fetched_do_not_grow_with_a_feature_of_one_level_per_unit(warehouses, tmp_path):
    # matched on age band alone, every stratum is filled at both sizes: only a level count could differ
    small, large = (api.run(spec_for(warehouses[n], on=["age_band"]), keep_tables=False) for n in (2_500, 5_000))
    assert small.rows_fetched == large.rows_fetched
    for results, folder in ((small, tmp_path / "a"), (large, tmp_path / "b")):
        levels = [b.covariate for b in results.balance if b.covariate.startswith("rider_code=")]
        assert levels == ["rider_code=(other)"]
        text = output_text(results, folder)
        assert "rider-" not in text  # no unit's own level in any output
        assert PLANTED not in text  # a level of 3 units is pooled, not named
        assert "home_district=(other)" in text
        assert "home_district=Central" in text or any(b.covariate.startswith("home_district=") and b.covariate != "home_district=(other)" for b in results.balance)


def test_exact_matching_on_a_pooled_feature_matches_within_its_levels(warehouses):
    """Every unit's own level is below the minimum cell, so all of them pool into one level and
    matching exactly on the feature changes nothing: the same strata and estimates as without it."""
    db = warehouses[2_500]
    without = api.run(spec_for(db), keep_tables=False)
    with_code = api.run(spec_for(db, on_code=True), keep_tables=False)
    assert with_code.matching.n_treated_matched == without.matching.n_treated_matched
    assert [e.estimate for e in with_code.effects] == pytest.approx([e.estimate for e in without.effects], rel=1e-12)
    assert any("rider_code" in w and "(other)" in w for w in with_code.warnings), with_code.warnings
