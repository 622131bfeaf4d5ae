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


def group_spec(db, terms: str = "squares", **matching) -> dict:
    """Each group's own slopes (an option; the default is the common slope on the features)."""
    raw = raw_spec(db, **matching)
    raw["effect"] = {"adjustment_slopes": "group", "adjustment_terms": terms}
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

    raw = raw_spec(demo_db, estimand=estimand)
    raw["effect"] = {"adjustment_slopes": "common", "adjustment_terms": "linear"}  # the common slope (each group's own is the default, below)
    results = api.run(parse_spec(raw), keep_tables=True)
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


def _matched_rows(db):
    with duckdb.connect(str(db), read_only=True) as con:
        rows = con.execute("SELECT * FROM sqlmatch.annual_pass_weighted_units WHERE match__weight IS NOT NULL").df()
    n = rows.groupby(["match__stratum", "treated"]).size().unstack("treated").fillna(0)
    both = n[(n[0] > 0) & (n[1] > 0)].index
    return rows[rows.match__stratum.isin(both)].copy()


def _group_predictions(rows, y: str, terms: list[str], estimand: str):
    """Each group's OLS of y on stratum dummies and the terms (statsmodels), its predictions averaged
    over the estimand's target units per stratum, and the pieces of the variance from that fit: the
    within-stratum variance of its residuals and the slopes' covariance (cov_params)."""
    import statsmodels.formula.api as smf

    target = {"att": rows[rows.treated == 1], "atc": rows[rows.treated == 0], "ate": rows}[estimand]
    w = target.groupby("match__stratum").size()
    w = w / w.sum()
    out = {}
    for g in (1, 0):
        part = rows[rows.treated == g]
        fit = smf.ols(f"{y} ~ C(match__stratum) + " + " + ".join(terms), data=part).fit()
        mu = fit.predict(target).groupby(target.match__stratum).mean()
        zt = target.groupby("match__stratum")[terms].mean()
        zg = part.groupby("match__stratum")[terms].mean()
        d = (w.to_numpy()[:, None] * (zt - zg).to_numpy()).sum(axis=0)
        cov = fit.cov_params().loc[terms, terms].to_numpy()  # sigma2 (Z'MZ)^-1, sigma2 = SSR / (n - strata - terms)
        resid = fit.resid.groupby(part.match__stratum)
        n, s2 = resid.size(), resid.var(ddof=1)
        s2[n < 2] = float(((n - 1) * s2)[n >= 2].sum() / (n - 1)[n >= 2].sum())  # one-unit cells: pooled (att.py)
        out[g] = (mu, float((w**2 * s2 / n).sum()) + float(d @ cov @ d), fit)
    return w, out


def _terms(rows, features):
    for f in features:
        rows[f"{f}_sq"] = rows[f].astype(float) ** 2
    return [*features, *(f"{f}_sq" for f in features)]


@pytest.mark.parametrize("estimand", ["att", "atc", "ate"])
def test_group_slopes_predict_each_group_at_the_estimands_target_means(demo_db, estimand):
    """The group adjustment ([effect] adjustment_slopes = "group": each group's own slopes on the
    numeric features and their squares, estimators/adjusted.py) is, per group, the OLS fit of y on stratum dummies and those terms
    (statsmodels) predicted at the estimand's target units, averaged over them: tau = mean over
    the target units of (yhat_1 - yhat_0) (Imbens & Rubin 2015, ch. 12, imputation by regression
    within subclasses; Lin 2013 for the separate slopes). Its variance: per group the
    within-stratum variance of that fit's residuals plus d' cov_params d for the slopes. Before the
    change the slope was common to both groups and the terms linear: the estimate differed."""
    results = api.run(parse_spec(group_spec(demo_db, estimand=estimand)), keep_tables=True)
    rows = _matched_rows(demo_db)
    spec = parse_spec(raw_spec(demo_db))
    features = [f.name for f in spec.numeric_features]
    terms = _terms(rows, features)
    for outcome in ("post_trips", "post_minutes"):
        e = results.effect(outcome)
        assert set(e.adjusted_for) == {*features, *(f"{f}^2" for f in features)}, "every feature and square has within-cell variation on the demo"
        w, fits = _group_predictions(rows, outcome, terms, estimand)
        tau = float((w * (fits[1][0] - fits[0][0])).sum())
        assert e.estimate == pytest.approx(tau, rel=1e-7)
        assert e.std_error == pytest.approx(math.sqrt(fits[1][1] + fits[0][1]), rel=1e-6)
        # the common linear slope gives another figure: the check tells the two apart
        assert abs(e.estimate - e.unadjusted.estimate) > 1e-6
    if estimand == "att":  # for the ATT the treated part is the treated mean itself
        mu1 = fits[1][0]
        ybar1 = rows[rows.treated == 1].groupby("match__stratum").post_minutes.mean()
        assert mu1.to_numpy() == pytest.approx(ybar1.to_numpy(), rel=1e-9)


@pytest.mark.parametrize("estimand", ["att", "ate"])
def test_ratio_outcome_adjusts_numerator_and_denominator(demo_db, estimand):
    """fare_per_trip (sum fare / sum trips): numerator and denominator each predicted as above by
    each group's OLS (statsmodels), R_g the ratio of their target means; the delta-method variance
    (Cochran 1977 §6.11, recalled) is the same variance for the linearised e = num - R_g den, fitted
    by statsmodels on e, over the mean denominator squared. With the common slope (the default)
    ratio outcomes stay unadjusted."""
    results = api.run(parse_spec(group_spec(demo_db, estimand=estimand)), keep_tables=True)
    rows = _matched_rows(demo_db)
    features = [f.name for f in parse_spec(raw_spec(demo_db)).numeric_features]
    terms = _terms(rows, features)
    e = results.effect("fare_per_trip")
    assert e.adjusted is not None and e.unadjusted is not None and "numerator and denominator adjusted" in e.estimator
    w, num = _group_predictions(rows, "fare_per_trip__num", terms, estimand)
    _, den = _group_predictions(rows, "fare_per_trip__den", terms, estimand)
    r = {g: float((w * num[g][0]).sum() / (w * den[g][0]).sum()) for g in (1, 0)}
    assert e.estimate == pytest.approx(r[1] - r[0], rel=1e-7)
    var = 0.0
    for g in (1, 0):
        rows_e = rows.assign(e_lin=rows.fare_per_trip__num - r[g] * rows.fare_per_trip__den)
        _, lin = _group_predictions(rows_e, "e_lin", terms, estimand)
        var += lin[g][1] / float((w * den[g][0]).sum()) ** 2
    assert e.std_error == pytest.approx(math.sqrt(var), rel=1e-6)


def test_products_add_every_pairwise_product_of_the_features(demo_db):
    """[effect] adjustment_terms = "products": the regressors are the features, their squares and
    every pairwise product; the ATT is each group's statsmodels OLS on those terms predicted at
    the treated units, as above."""
    raw = group_spec(demo_db, terms="products")
    results = api.run(parse_spec(raw), keep_tables=True)
    rows = _matched_rows(demo_db)
    features = [f.name for f in parse_spec(raw).numeric_features]
    terms = _terms(rows, features)
    for i, a in enumerate(features):
        for b in features[i + 1:]:
            rows[f"{a}_by_{b}"] = rows[a].astype(float) * rows[b].astype(float)
            terms.append(f"{a}_by_{b}")
    e = results.effect("post_trips")
    assert len(e.adjusted_for) == len(terms) == 20
    w, fits = _group_predictions(rows, "post_trips", terms, "att")
    assert e.estimate == pytest.approx(float((w * (fits[1][0] - fits[0][0])).sum()), rel=1e-7)
    assert e.std_error == pytest.approx(math.sqrt(fits[1][1] + fits[0][1]), rel=1e-6)


def test_too_many_adjustment_sums_are_refused_naming_the_key(demo_db):
    """17 numeric features with pairwise products need more than columns.MAX_ADJUSTMENT_SUMS sums."""
    from sqlmatch.plan import build_plan

    raw = raw_spec(demo_db)
    raw["features"] += [{"name": f"pre_trips_{k}", "aggregate": "count"} for k in range(12)]
    raw["effect"] = {"adjustment_terms": "products"}
    with pytest.raises(SpecError) as err:
        build_plan(parse_spec(raw), "duckdb")
    assert err.value.key == "effect.adjustment_terms" and "17 numeric features" in str(err.value) and '"squares"' in str(err.value)
    raw["effect"] = {"adjustment_terms": "squares"}  # the squares of the same 17 features: 821 entries, one query
    assert build_plan(parse_spec(raw), "duckdb").step("outcome_strata").name == "outcome_strata"
