"""Derived features (aggregate = "derived"): expressions over earlier features, computed in the
warehouse in the step that builds the per-unit measures.

Values: the test reads the demo warehouse's trips and riders rows (sqlmatch never does),
counts the pre-window trips and minutes per rider with pandas, builds each derived feature with
numpy from those, and compares with the measures table; the balance row of a derived feature is
its pandas group means; a propensity model on derived features equals statsmodels Logit on the
pandas-built columns. Refusals: the spec key and what to do."""

from __future__ import annotations

import shutil
import tomllib

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from sqlmatch import api
from sqlmatch.errors import DataError, SpecError
from sqlmatch.propensity import load_model
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC
from derived import DERIVED, with_derived

PRE_START, COHORT_START = pd.Timestamp("2025-09-01"), pd.Timestamp("2026-03-01")


def _raw(database) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(database)
    return raw


@pytest.fixture(scope="module")
def run(demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("derived")
    database = folder / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", database)
    results = api.run(parse_spec(with_derived(_raw(database))))
    with duckdb.connect(str(database), read_only=True) as con:
        measures = con.execute("SELECT * FROM sqlmatch.annual_pass_measures").df()
        trips = con.execute("SELECT rider_id, started_at, minutes FROM trips").df()
        riders = con.execute("SELECT rider_id, home_district FROM riders").df()
    return results, measures, _expected(measures[["unit_key", "treated"]], trips, riders)


def _expected(units: pd.DataFrame, trips: pd.DataFrame, riders: pd.DataFrame) -> pd.DataFrame:
    """The derived features computed with pandas/numpy from the rows."""
    pre = trips[(trips.started_at >= PRE_START) & (trips.started_at < COHORT_START)]
    per = pre.groupby("rider_id").agg(pre_trips=("minutes", "size"), pre_minutes=("minutes", "sum"), last=("started_at", "max"))
    e = units.merge(per, left_on="unit_key", right_index=True, how="left").merge(riders, left_on="unit_key", right_on="rider_id")
    e[["pre_trips", "pre_minutes"]] = e[["pre_trips", "pre_minutes"]].fillna(0.0).astype(float)
    # days from the last pre-window trip's day to the cohort month; the whole window without trips (fill)
    e["pre_days_since_last"] = ((COHORT_START - e["last"].dt.normalize()).dt.days).fillna((COHORT_START - PRE_START).days).astype(float)
    t = e.pre_trips
    e["pre_trips_sq"] = t * t
    e["log_trips"] = np.log1p(t)
    e["no_trips"] = (t == 0).astype(float)
    e["minutes_per_trip"] = np.where(t > 0, e.pre_minutes / t.where(t > 0, 1.0), 0.0)  # fill = 0 where no trips
    e["harbour_trips"] = np.where(e.home_district == "Harbour", t, 0.0)
    # round half away from zero at one decimal
    v = e.pre_trips_sq * (1 - e.no_trips) / (1 + e.pre_days_since_last)
    e["sq_if_riding"] = np.sign(v) * np.floor(np.abs(v) * 10 + 0.5) / 10
    return e.set_index("unit_key")


def test_derived_values_equal_pandas_from_the_rows(run):
    _, measures, expected = run
    got = measures.set_index("unit_key").loc[expected.index]
    assert (expected.pre_trips == 0).any() and (expected.home_district == "Harbour").any()  # both branches occur
    for d in DERIVED:
        np.testing.assert_allclose(got[d["name"]], expected[d["name"]], rtol=1e-12, atol=1e-12, err_msg=d["name"])


def test_derived_features_are_balanced_matched_on_and_define_subgroups(run):
    results, _, expected = run
    balance = {b.covariate: b for b in results.balance}
    for d in DERIVED:
        b = balance[d["name"]]
        assert b.mean_treated_before == pytest.approx(expected[expected.treated == 1][d["name"]].mean(), rel=1e-12)
        assert b.mean_control_before == pytest.approx(expected[expected.treated == 0][d["name"]].mean(), rel=1e-12)
    # matched exactly on no_trips (cut at 0.5): its mean is the same in both groups after matching
    assert balance["no_trips"].smd_after == pytest.approx(0.0, abs=1e-12)
    assert {"feature": "no_trips", "how": "cut points", "cut_points": [0.5]} in results.design["matched_on"]
    assert {"name": "no_trips", "aggregate": "derived", "categorical": False, "expression": "pre_trips = 0"} in results.design["features"]
    (heavy,) = [s for s in results.subgroups if s.subgroup == "heavy"][:1]
    assert {lv.level for lv in heavy.levels} == {"yes", "no"}


def test_a_propensity_model_on_derived_features_equals_statsmodels(demo_dir, tmp_path):
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    raw = with_derived(_raw(tmp_path / "bikeshare.duckdb"))
    raw["matching"] = {"method": "score_bins", "bins": 5}
    raw["propensity"] = {"features": ["log_trips", "no_trips", "minutes_per_trip", "harbour_trips"], "terms": "linear"}
    spec = parse_spec(raw, source_path=tmp_path / "study.toml")
    api.run(spec)
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb"), read_only=True) as con:
        trips = con.execute("SELECT rider_id, started_at, minutes FROM trips").df()
        riders = con.execute("SELECT rider_id, home_district FROM riders").df()
        units = con.execute("SELECT unit_key, treated FROM sqlmatch.annual_pass_measures").df()
    e = _expected(units, trips, riders)
    X = sm.add_constant(e[["log_trips", "no_trips", "minutes_per_trip", "harbour_trips"]]).rename(columns={"const": "intercept"})
    fit = sm.Logit(e.treated.astype(float), X).fit(disp=0, tol=1e-12, maxiter=100)
    model = load_model(spec)
    assert [c.name for c in model.columns] == list(X.columns)
    np.testing.assert_allclose(model.coefficients, fit.params.to_numpy(), rtol=1e-6, atol=1e-8)


def _with(expression: str, fill=None, at: int | None = None) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    item = {"name": "bad", "aggregate": "derived", "expression": expression}
    if fill is not None:
        item["fill"] = fill
    features = raw["features"]
    features.insert(len(features) if at is None else at, item)
    return raw


@pytest.mark.parametrize(
    "expression, at, words",
    [
        ("pre_rides * 2", None, "'pre_rides', which is not a feature"),
        ("sum(pre_trips)", None, "function sum is not allowed"),
        ("(SELECT max(pre_trips) FROM trips)", None, "remove the statement or subquery"),
        ("pre_trips; DROP TABLE riders", None, "2 statements"),
        ("pre_trips * 2", 0, "'pre_trips', which is defined after this feature"),
        ("bad + 1", None, "'bad', the feature it defines"),
        ("log(pre_trips + 1)", None, "function log is not allowed"),
        ("pre_trips % 2", None, "engines compute differently"),
        ("row_number() OVER (ORDER BY pre_trips)", None, "not allowed"),
        ("u.pre_trips", None, "table prefix"),
        ("home_district * pre_trips", None, "categorical feature 'home_district' as a number"),
    ],
)
def test_derived_expressions_are_allowlisted(expression, at, words):
    with pytest.raises(SpecError) as err:
        parse_spec(_with(expression, at=at))
    assert err.value.key.endswith("(bad).expression"), err.value.key
    assert words in str(err.value)


def test_a_derived_feature_is_numeric_and_reads_no_source_column():
    raw = _with("pre_trips * 2")
    raw["features"][-1]["type"] = "categorical"
    with pytest.raises(SpecError, match="a derived feature is numeric") as err:
        parse_spec(raw)
    assert err.value.key.endswith("(bad).type")
    raw = _with("pre_trips * 2")
    raw["features"][-1]["measure"] = "fare"
    with pytest.raises(SpecError, match="remove it") as err:
        parse_spec(raw)
    assert err.value.key.endswith("(bad).measure")
    raw = _with("pre_trips * 2")
    del raw["features"][-1]["expression"]
    with pytest.raises(SpecError, match="is missing") as err:
        parse_spec(raw)
    assert err.value.key.endswith("(bad).expression")


def test_guards_hold_inside_round():
    """x / y and ln(x) keep their guards (NULLIF, CASE) inside ROUND, which is rewritten too: a
    division by zero there would raise on PostgreSQL and give NULL on DuckDB and Spark."""
    from sqlmatch.plan import derived_column

    spec = parse_spec(_with("round(pre_minutes / pre_trips, 1) + round(ln(pre_trips), 2)", fill=0))
    (bad,) = [f for f in spec.derived_features if f.name == "bad"]
    sql = derived_column(bad, spec).value
    assert "NULLIF" in sql and "CASE WHEN" in sql and sql.count("DECIMAL(38, 10)") == 2, sql


def test_a_derived_feature_without_a_value_refuses_the_run_unless_filled(demo_db):
    """pre_minutes / pre_trips has no value for riders without pre-window trips (x / NULLIF(y, 0)
    on every engine); the run names the key, and fill = 0 gives those riders 0."""
    raw = _with("pre_minutes / pre_trips")
    raw["study"]["database"] = str(demo_db)
    with pytest.raises(DataError) as err:
        api.run(parse_spec(raw))
    assert err.value.key.endswith("(bad).expression") and "fill" in str(err.value)
    with duckdb.connect(str(demo_db), read_only=True) as con:
        assert "annual_pass_weighted_units" not in {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    api.run(parse_spec(_with("pre_minutes / pre_trips", fill=0) | {"study": raw["study"]}))
    with duckdb.connect(str(demo_db), read_only=True) as con:
        zero = con.execute("SELECT COUNT(*), SUM(CASE WHEN bad = 0 THEN 1 ELSE 0 END) FROM sqlmatch.annual_pass_measures WHERE pre_trips = 0").fetchone()
    assert zero[0] > 0 and zero[0] == zero[1]


def test_a_derived_feature_with_infinite_values_refuses_the_run(demo_db):
    """exp() of a large number overflows to infinity on DuckDB; the run names the feature's key."""
    raw = _with("exp(pre_minutes)")
    raw["study"]["database"] = str(demo_db)
    with pytest.raises(DataError, match="NaN or infinite") as err:
        api.run(parse_spec(raw))
    assert err.value.key.endswith("(bad).expression")
