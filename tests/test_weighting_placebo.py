"""The placebo check (a second study placed months before the real one) under score_weighting: the
placebo study weights with its own score, fitted in its own windows, and its weighted effect and
sandwich SE equal the numpy computation of the published estimating equations (Lunceford &
Davidian 2004) on the placebo's rows; the doubly robust option, stabilised weights and subgroups
carry over to it."""

from __future__ import annotations

import dataclasses
import tomllib

import duckdb
import numpy as np
import pytest

from sqlmatch import api
from sqlmatch.propensity import load_model, model_path
from sqlmatch.report.markdown import render_markdown
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC
from test_score_weighting import design, numpy_sandwich, numpy_weights


def raw_spec(db, **matching) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    raw["windows"].update(pre=3, post=2)  # room for the placebo's windows before the cohort
    raw["placebo"] = {"months_before": 3}
    raw["matching"] = {"method": "score_weighting", "on": ["pre_trips", "age_band"], **matching}
    return raw


def test_placebo_study_weights_with_its_own_score_and_equals_numpy(demo_db, tmp_path):
    # a spec with a path keeps its fitted models beside it (the placebo's in its own file)
    spec = dataclasses.replace(parse_spec(raw_spec(demo_db)), source_path=tmp_path / "study.toml")
    results = api.run(spec, keep_tables=True)
    placebo = results.placebo.results
    assert placebo.matching.method == "score_weighting" and placebo.matching.effective_controls is not None
    p = spec.placebo_spec()
    model, real_model = load_model(p), load_model(spec)
    assert model_path(p) != model_path(spec) and model.coefficients != real_model.coefficients  # fitted on the placebo's own pre window
    with duckdb.connect(str(demo_db), read_only=True) as con:
        rows = con.execute(f"SELECT * FROM sqlmatch.{p.name}_weighted_units ORDER BY unit_key").df()
    X = design(rows, model.columns)
    t = rows.treated.to_numpy(float)
    beta = np.asarray(model.coefficients)
    w, caps = numpy_weights(t, X @ beta)
    keep = ~np.isnan(w)
    np.testing.assert_allclose(rows.match__weight.to_numpy(float)[keep], w[keep], rtol=1e-9)
    y = rows.post_trips.to_numpy(float)
    est, se, _ = numpy_sandwich(X, t, y, np.ones(len(y)), beta, keep, caps)
    e = placebo.effect("post_trips")
    assert e.estimate == pytest.approx(est, rel=1e-9) and e.std_error == pytest.approx(se, rel=1e-6)
    text = render_markdown(results)
    assert "## Placebo check" in text and len(results.placebo.readings()) == len(placebo.effects)


def test_placebo_carries_the_weighting_options(demo_db):
    raw = raw_spec(demo_db, stabilised_weights=True)
    raw["effect"] = {"regression_adjustment": True}
    raw["subgroups"] = [{"name": "frequent", "where": "pre_trips >= 10"}]
    results = api.run(parse_spec(raw))
    placebo = results.placebo.results
    e = placebo.effect("post_trips")
    assert "doubly robust" in e.estimator and e.unadjusted is not None
    assert placebo.matching.stabilised_weights and placebo.matching.weight_mean is not None
    (sub,) = [s for s in placebo.subgroups if s.outcome == "post_trips"]
    assert {x.level for x in sub.levels} == {"yes", "no"} and all(x.effect.std_error for x in sub.levels if not x.withheld)
