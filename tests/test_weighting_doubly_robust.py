"""The doubly robust option of score_weighting (effect.regression_adjustment = true: a weighted
regression of the outcome on the score model's columns in each group, its predictions averaged
over the target units; Kang & Schafer 2007, Statistical Science 22:523; Wooldridge 2007, Journal of
Econometrics 141:1281) against computations outside sqlmatch on the NSW data (Dehejia & Wahba
1999, from the causaldata package): the coefficients by statsmodels WLS on the rows, the effect by
numpy, and the sandwich SE from the per-unit stacked estimating equations with a finite-difference
Jacobian (Stefanski & Boos 2002, The American Statistician 56:29), not sqlmatch's closed form."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm

from sqlmatch.spec import parse_spec

from sandwich import relative_steps, sandwich_covariance
from nsw import load_nsw, nsw_spec
from test_score_weighting import design, numpy_weights, raw_weights, run_study

TARGETS = {"att": "enrolled", "atc": "not_enrolled", "ate": "everyone"}


@pytest.fixture(scope="module")
def nsw_db(tmp_path_factory):
    db = tmp_path_factory.mktemp("nsw_dr") / "nsw.duckdb"
    load_nsw(str(db))
    return str(db)


def numpy_doubly_robust(X, t, y, beta, keep, estimand):
    """Effect, WLS coefficients per group (statsmodels), and the SE from the stacked equations
    psi = [(t - e) x, t a (y - x'd1 - nu1), (1 - t) a (y - x'd0 - nu0), s (x'(d1 - d0) - kappa)]
    with the slopes d held at their estimates, J by central differences."""
    effect_for = TARGETS[estimand]
    target = keep & {"att": t == 1, "atc": t == 0, "ate": np.ones(len(t), dtype=bool)}[estimand]
    a0 = np.where(keep, raw_weights(t, X @ beta, effect_for), 0.0)
    coef = {}
    for g in (1, 0):
        m = keep & (t == g)
        coef[g] = sm.WLS(y[m], X[m], weights=a0[m]).fit().params
    xbar = X[target].mean(axis=0)
    est = xbar @ (coef[1] - coef[0])
    d = {g: np.concatenate([[0.0], coef[g][1:]]) for g in (1, 0)}

    def psi(theta):
        nu1, nu0, kappa, b = theta[0], theta[1], theta[2], theta[3:]
        e = 1 / (1 + np.exp(-(X @ b)))
        a = np.where(keep, raw_weights(t, X @ b, effect_for), 0.0)
        return np.column_stack(
            [t * a * (y - X @ d[1] - nu1), (1 - t) * a * (y - X @ d[0] - nu0), target * (X @ (d[1] - d[0]) - kappa), (t - e)[:, None] * X]
        )

    nu = {g: np.sum((t == g) * a0 * (y - X @ d[g])) / np.sum((t == g) * a0) for g in (1, 0)}
    theta = np.concatenate([[nu[1], nu[0], xbar @ (d[1] - d[0])], beta])
    sd = X.std(axis=0)
    V, P = sandwich_covariance(psi, theta, relative_steps(theta, 3, 1.0 / np.where(sd > 0, sd, 1.0)))
    grad = np.zeros(len(theta))
    grad[:3] = (1.0, -1.0, 1.0)
    assert theta[0] - theta[1] + theta[2] == pytest.approx(est, rel=1e-7)  # nu1 - nu0 + kappa is the mean predicted difference
    return est, math.sqrt(grad @ V @ grad), coef


@pytest.mark.parametrize(
    "options",
    [{"common_support": False}, {"estimand": "ate", "score_margin": 0.001}, {"estimand": "atc", "score_margin": 0.001}],
    ids=["att", "ate", "atc"],
)
def test_nsw_doubly_robust_effect_and_sandwich_equal_numpy(nsw_db, options):
    raw = nsw_spec(nsw_db, "score_weighting", **options)
    raw["effect"] = {"regression_adjustment": True}
    spec = parse_spec(raw)
    out, results, rows = run_study(nsw_db, spec)
    X = design(rows, out.model.columns)
    t = rows.treated.to_numpy().astype(float)
    beta = np.asarray(out.model.coefficients)
    estimand = options.get("estimand", "att")
    w, _ = numpy_weights(t, X @ beta, options.get("common_support", True), options.get("score_margin", 0.0), None, TARGETS[estimand])
    keep = ~np.isnan(w)
    y = rows.earnings_after.to_numpy(dtype=float)
    est, se, _ = numpy_doubly_robust(X, t, y, beta, keep, estimand)
    e = results.effect("earnings_after")
    assert e.estimate == pytest.approx(est, rel=1e-6)
    assert e.std_error == pytest.approx(se, rel=1e-5)
    assert e.adjusted.estimate == e.estimate and "doubly robust" in e.estimator
    # the plain weighted difference is kept beside it
    assert e.unadjusted is not None and e.unadjusted.estimate != pytest.approx(e.estimate, rel=1e-3)
