"""score_weighting on the NHEFS data (causaldata's nhefs_complete; tests/nhefs.py) against Hernan &
Robins, Causal Inference: What If (2020), ch. 12-13: the effect of quitting smoking (qsmk) on
weight gain 1971-82 (kg) for everyone (estimand = "ate"). The book's figures are recalled from
memory (tests/nhefs.py), so they are checked with a tolerance; what can be checked exactly is
checked against statsmodels (Logit for the score, WLS on the same weights) and numpy."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from sqlmatch.spec import parse_spec

from nhefs import (
    BOOK_IPW,
    BOOK_IPW_CI,
    BOOK_STABILISED_MEAN,
    BOOK_STABILISED_RANGE,
    BOOK_STANDARDISED,
    CATEGORICAL,
    NUMERIC,
    SQUARED,
    load_nhefs,
    nhefs_spec,
)
from test_score_weighting import design, run_study
from test_weighting_doubly_robust import numpy_doubly_robust


@pytest.fixture(scope="module")
def nhefs(tmp_path_factory):
    db = str(tmp_path_factory.mktemp("nhefs") / "nhefs.duckdb")
    return db, load_nhefs(db)


def book_design(people) -> np.ndarray:
    """The book's treatment model on the rows, built by pandas (not from sqlmatch's design):
    intercept, the numeric confounders, the four squares, indicators of education, exercise and
    active (first level the reference)."""
    cols = [np.ones(len(people))] + [people[c].to_numpy(float) for c in NUMERIC] + [people[c].to_numpy(float) ** 2 for c in SQUARED]
    for c in CATEGORICAL:
        levels = sorted(people[c].unique())
        cols += [(people[c] == lv).to_numpy(float) for lv in levels[1:]]
    return np.column_stack(cols)


def run(db, **options):
    adjust = options.pop("regression_adjustment", False)
    raw = nhefs_spec(db, estimand="ate", common_support=False, **options)
    raw["effect"] = {"regression_adjustment": adjust}
    return run_study(db, parse_spec(raw))


def test_ip_weighted_average_effect_equals_statsmodels_and_the_book(nhefs):
    db, people = nhefs
    out, results, rows = run(db)
    t, y = people.qsmk.to_numpy(float), people.wt82_71.to_numpy(float)
    X = book_design(people)
    fit = sm.Logit(t, X).fit(disp=0, tol=1e-12, maxiter=100)
    e = fit.predict(X)
    w = np.where(t == 1, 1 / e, 1 / (1 - e))
    # the weights unit by unit (rows matched on the key)
    got = rows.set_index("unit_key").match__weight.reindex(people.person_id).to_numpy(float)
    np.testing.assert_allclose(got, w, rtol=1e-6)
    # the IP-weighted effect is the treatment coefficient of the weighted regression of y on qsmk
    # (the book's marginal structural model), here statsmodels WLS
    wls = sm.WLS(y, sm.add_constant(t), weights=w).fit(cov_type="HC0")
    effect = results.effect("weight_gain")
    assert effect.estimate == pytest.approx(wls.params[1], rel=1e-6)
    assert effect.estimand == "ate"
    # Hernan & Robins (2020) ch. 12, recalled: 3.4 kg, 95% CI about 2.4 to 4.5 with the robust
    # (sandwich) SE that treats the weights as known, the WLS HC0 interval here
    assert effect.estimate == pytest.approx(BOOK_IPW, abs=0.1)
    low, high = wls.conf_int()[1]
    assert low == pytest.approx(BOOK_IPW_CI[0], abs=0.1) and high == pytest.approx(BOOK_IPW_CI[1], abs=0.1)
    # counting the estimated score narrows the ATE's interval (Lunceford & Davidian 2004, section
    # 3.2: treating the fitted weights as known is conservative for the IPW average effect)
    assert effect.std_error < wls.bse[1]


def test_stabilised_weights_mean_and_range_equal_numpy_and_the_book(nhefs):
    db, people = nhefs
    plain = run(db)[1]
    out, results, rows = run(db, stabilised_weights=True)
    t = people.qsmk.to_numpy(float)
    X = book_design(people)
    e = sm.Logit(t, X).fit(disp=0, tol=1e-12, maxiter=100).predict(X)
    p = t.mean()
    sw = np.where(t == 1, p / e, (1 - p) / (1 - e))  # Robins, Hernan & Brumback 2000: P(A = a) / P(A = a | L)
    got = rows.set_index("unit_key").match__weight.reindex(people.person_id).to_numpy(float)
    np.testing.assert_allclose(got, sw, rtol=1e-6)
    m = results.matching
    assert m.stabilised_weights
    assert m.weight_mean == pytest.approx(sw.mean(), rel=1e-9)
    assert (m.weight_min, m.weight_max) == (pytest.approx(sw.min(), rel=1e-9), pytest.approx(sw.max(), rel=1e-9))
    # Hernan & Robins (2020) ch. 12, recalled: mean 0.999, range 0.33 to 4.30
    assert m.weight_mean == pytest.approx(BOOK_STABILISED_MEAN, abs=0.001)
    assert m.weight_min == pytest.approx(BOOK_STABILISED_RANGE[0], abs=0.01) and m.weight_max == pytest.approx(BOOK_STABILISED_RANGE[1], abs=0.01)
    # a constant factor per group leaves the normalised weighted means, and so the effect and its
    # sandwich variance, unchanged; the unstabilised ATE weights average about 2
    a, b = plain.effect("weight_gain"), results.effect("weight_gain")
    assert b.estimate == pytest.approx(a.estimate, rel=1e-9) and b.std_error == pytest.approx(a.std_error, rel=1e-9)
    assert plain.matching.weight_mean == pytest.approx(np.where(t == 1, 1 / e, 1 / (1 - e)).mean(), rel=1e-9)
    assert not plain.matching.stabilised_weights
    # both reports state the mean and range
    from sqlmatch.report.html import render_html
    from sqlmatch.report.markdown import render_markdown

    words = f"Stabilised weights: mean {m.weight_mean:.3g}, from {m.weight_min:.3g} to {m.weight_max:.3g}"
    assert words in render_markdown(results) and words in render_html(results)


def test_doubly_robust_effect_equals_statsmodels_and_is_near_the_books_standardisation(nhefs):
    db, people = nhefs
    out, results, rows = run(db, regression_adjustment=True, stabilised_weights=True)
    X = design(rows, out.model.columns)
    t = rows.treated.to_numpy(float)
    y = rows.weight_gain.to_numpy(float)
    beta = np.asarray(out.model.coefficients)
    est, se, coef = numpy_doubly_robust(X, t, y, beta, np.ones(len(t), dtype=bool), "ate")
    effect = results.effect("weight_gain")
    assert effect.estimate == pytest.approx(est, rel=1e-6)
    assert effect.std_error == pytest.approx(se, rel=1e-4)
    assert effect.unadjusted.estimate == pytest.approx(BOOK_IPW, abs=0.1)
    # the book's standardisation (ch. 13: one outcome regression with qsmk, the confounders and
    # qsmk x smokeintensity, predictions under qsmk = 1 and 0 averaged over everyone), by statsmodels
    p = people
    Z = book_design(p)
    tt = p.qsmk.to_numpy(float)
    design_book = lambda q: np.column_stack([Z, q, q * p.smokeintensity.to_numpy(float)])  # noqa: E731
    ols = sm.OLS(p.wt82_71.to_numpy(float), design_book(tt)).fit()
    standardised = float(np.mean(ols.predict(design_book(np.ones(len(p)))) - ols.predict(design_book(np.zeros(len(p))))))
    assert standardised == pytest.approx(BOOK_STANDARDISED, abs=0.1)  # recalled
    # two estimators of the same average effect, different outcome models: within a standard error
    assert abs(effect.estimate - standardised) < effect.std_error
