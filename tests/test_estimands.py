"""Effects on the controls (ATC) and on everyone (ATE) for the stratum methods: the estimate and
its variance equal the subclassification formulas of Imbens & Rubin (2015, ch. 17) recomputed with
pandas from the matched rows, and the unit weights written in the warehouse give the same effect as
a weighted difference of means (the identity that makes balance after matching describe the
estimand's population)."""

from __future__ import annotations

import math
import tomllib

import duckdb
import numpy as np
import pytest

from sqlmatch import api
from sqlmatch.errors import SpecError
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC


def raw_spec(db, **matching) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    raw["matching"].update(matching)
    return raw


@pytest.mark.parametrize("estimand", ["att", "atc", "ate"])
def test_estimand_matches_the_subclassification_formula(demo_db, estimand):
    raw = raw_spec(demo_db, estimand=estimand)
    raw["effect"] = {"regression_adjustment": False}  # the plain formula (the adjusted default is checked in test_adjusted_estimator.py)
    results = api.run(parse_spec(raw), keep_tables=True)
    with duckdb.connect(str(demo_db), read_only=True) as con:
        rows = con.execute("SELECT * FROM sqlmatch.annual_pass_weighted_units WHERE match__weight IS NOT NULL").df()
    g = rows.groupby(["match__stratum", "treated"]).post_trips.agg(["count", "mean", "var"]).unstack("treated")
    n1, n0 = g["count"][1], g["count"][0]
    size = {"att": n1, "atc": n0, "ate": n1 + n0}[estimand]
    w = size / size.sum()
    tau = float((w * (g["mean"][1] - g["mean"][0])).sum())
    var = 0.0
    for t, n in ((1, n1), (0, n0)):
        v = g["var"][t].copy()
        pooled = float(((n - 1) * v)[n >= 2].sum() / (n - 1)[n >= 2].sum())  # one-unit cells: the pooled variance (att.py)
        v[n < 2] = pooled
        var += float((w**2 * v / n).sum())
    e = results.effect("post_trips")
    assert e.estimand == estimand
    assert e.estimate == pytest.approx(tau, rel=1e-9)
    assert e.std_error == pytest.approx(math.sqrt(var), rel=1e-9)
    # the unit weights: each group's weights sum to its matched count, and the weighted difference
    # of means is the same effect
    for t in (1, 0):
        part = rows[rows.treated == t]
        assert part.match__weight.sum() == pytest.approx(len(part), rel=1e-9)
    mean = lambda t: np.average(rows[rows.treated == t].post_trips, weights=rows[rows.treated == t].match__weight)  # noqa: E731
    assert mean(1) - mean(0) == pytest.approx(tau, rel=1e-9)


def test_nearest_neighbours_refuse_other_estimands(demo_db):
    with pytest.raises(SpecError) as err:
        parse_spec(raw_spec(demo_db, method="nearest_neighbour", estimand="ate"))
    assert err.value.key == "matching.estimand" and "coarsened_exact" in str(err.value)


@pytest.mark.parametrize("estimand", ["atc", "ate"])
def test_adjusted_headline_weights_strata_by_the_estimand(demo_db, estimand):
    """The default (regression-adjusted) headline of a stratum method uses the estimand's stratum
    weights: sum_s w_s [(ybar_1s - ybar_0s) - gamma'(xbar_1s - xbar_0s)] with w_s the estimand's
    share of stratum s and gamma the common within-cell slope, here recomputed from the matched rows
    with statsmodels OLS (one intercept per stratum-and-group cell). Before the fix the adjusted
    headline was the ATT whatever the estimand."""
    import statsmodels.formula.api as smf

    results = api.run(parse_spec(raw_spec(demo_db, estimand=estimand)), keep_tables=True)
    e = results.effect("post_trips")
    assert e.estimand == estimand and e.adjusted_for, "the default adjusts the stratum methods"
    features = list(e.adjusted_for)
    with duckdb.connect(str(demo_db), read_only=True) as con:
        rows = con.execute("SELECT * FROM sqlmatch.annual_pass_weighted_units WHERE match__weight IS NOT NULL").df()
    n = rows.groupby(["match__stratum", "treated"]).size().unstack("treated").fillna(0)
    both = n[(n[0] > 0) & (n[1] > 0)].index
    rows = rows[rows.match__stratum.isin(both)].copy()
    rows["cell"] = rows.match__stratum.astype(str) + "_" + rows.treated.astype(str)
    fit = smf.ols("post_trips ~ C(cell) + " + " + ".join(features), data=rows).fit()
    gamma = fit.params[features].to_numpy()
    g = rows.groupby(["match__stratum", "treated"])
    ybar = g.post_trips.mean().unstack("treated")
    xbar = {f: g[f].mean().unstack("treated") for f in features}
    n1, n0 = n.loc[both, 1], n.loc[both, 0]
    size = {"atc": n0, "ate": n1 + n0}[estimand]
    w = size / size.sum()
    diff = (ybar[1] - ybar[0]) - sum(gamma[j] * (xbar[f][1] - xbar[f][0]) for j, f in enumerate(features))
    tau = float((w * diff).sum())
    att = float(((n1 / n1.sum()) * diff).sum())
    assert abs(tau - att) > 1e-3, "the demo's strata must tell the estimands apart for this check to bite"
    assert e.estimate == pytest.approx(tau, rel=1e-8)
