"""Attribute features written as SQL expressions over unit columns (squares, interactions,
indicators, grouped levels). On the NSW data (Dehejia & Wahba 1999; `causaldata`), features built
by expression give exactly the numbers of the same features computed by pandas (tests/nsw.py
stores age_sq, u74, educ_re74, ... as columns); expressions are parsed and allowlisted as filters."""

from __future__ import annotations

import pytest

pytest.importorskip("causaldata")

from sqlmatch import api  # noqa: E402
from sqlmatch.errors import SpecError  # noqa: E402
from sqlmatch.spec import parse_spec  # noqa: E402

from nsw import load_nsw, nsw_spec  # noqa: E402

EXPRESSIONS = {
    "age_sq": "age * age",
    "educ_sq": "educ * educ",
    "re74_sq": "re74 * re74",
    "re75_sq": "re75 * re75",
    "u74": "re74 = 0",  # a condition: 1 when true, 0 when false
    "u75": "CASE WHEN re75 = 0 THEN 1 ELSE 0 END",
    "educ_re74": "educ * re74",
}


@pytest.fixture(scope="module")
def db(tmp_path_factory):
    path = tmp_path_factory.mktemp("nsw") / "nsw.duckdb"
    load_nsw(str(path))
    return path


def with_expressions(raw: dict) -> dict:
    for f in raw["features"]:
        if f["name"] in EXPRESSIONS:
            f.pop("attribute")
            f["expression"] = EXPRESSIONS[f["name"]]
    return raw


def test_expression_features_equal_the_columns_pandas_computed(db):
    opts = dict(on=["age", "educ", "black", "u74", "u75"], cut_points={"age": [20, 25, 30, 35, 40, 50], "educ": [9, 12], "black": [0.5], "u74": [0.5], "u75": [0.5]})
    by_column = api.run(parse_spec(nsw_spec(str(db), "coarsened_exact", **opts)))
    by_expression = api.run(parse_spec(with_expressions(nsw_spec(str(db), "coarsened_exact", **opts))))
    assert [b.covariate for b in by_column.balance] == [b.covariate for b in by_expression.balance]
    for a, b in zip(by_column.balance, by_expression.balance):
        for field in ("mean_treated_before", "mean_control_before", "smd_before", "mean_treated_after", "smd_after"):
            assert getattr(a, field) == pytest.approx(getattr(b, field), rel=1e-12, abs=1e-12), (a.covariate, field)
    (e1,), (e2,) = by_column.effects, by_expression.effects
    assert (e1.estimate, e1.std_error) == pytest.approx((e2.estimate, e2.std_error), rel=1e-12)


def test_a_categorical_expression_groups_levels(db):
    raw = nsw_spec(str(db), "coarsened_exact", on=["age_group", "black"], cut_points={"black": [0.5]})
    raw["features"].append({"name": "age_group", "aggregate": "attribute", "type": "categorical", "expression": "CASE WHEN age < 25 THEN 'under 25' WHEN age < 35 THEN '25-34' ELSE '35+' END"})
    results = api.run(parse_spec(raw))
    levels = {b.covariate for b in results.balance if b.kind == "level"}
    assert {"age_group=under 25", "age_group=25-34", "age_group=35+"} <= levels


@pytest.mark.parametrize(
    "expression, words",
    [
        ("(SELECT max(re74) FROM men)", "not allowed"),
        ("pg_sleep(1)", "pg_sleep"),
        ("re74; DROP TABLE men", "2 statements"),
        ("sum(re74)", "sum"),
    ],
)
def test_expressions_are_allowlisted_like_filters(db, expression, words):
    raw = nsw_spec(str(db), "coarsened_exact", on=["black"], cut_points={"black": [0.5]})
    raw["features"].append({"name": "bad", "aggregate": "attribute", "expression": expression})
    with pytest.raises(SpecError) as err:
        parse_spec(raw)
    assert err.value.key.endswith("(bad).expression") and words in str(err.value)


def test_an_expression_on_a_missing_column_names_the_key(db):
    raw = nsw_spec(str(db), "coarsened_exact", on=["black"], cut_points={"black": [0.5]})
    raw["features"].append({"name": "bad", "aggregate": "attribute", "expression": "re76 * 2"})
    with pytest.raises(SpecError) as err:
        api.run(parse_spec(raw))
    assert err.value.key.endswith("(bad).expression") and "re76" in str(err.value)


def test_expression_and_attribute_together_are_refused(db):
    raw = nsw_spec(str(db), "coarsened_exact", on=["black"], cut_points={"black": [0.5]})
    raw["features"].append({"name": "bad", "aggregate": "attribute", "attribute": "age", "expression": "age * 2"})
    with pytest.raises(SpecError) as err:
        parse_spec(raw)
    assert err.value.key.endswith("(bad).expression")
