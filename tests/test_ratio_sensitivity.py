"""The robustness value of a ratio outcome (fare per trip = sum of fares / sum of trips) must come
from a regression whose treatment coefficient is the headline ratio effect.

Simulation with a known mechanism (invented riders, numpy): heavy riders take many cheap trips,
light riders few dear ones; the pass cuts every fare by 20% and triples the trips of heavy riders
(light riders: +10%). So the enrolled group's trips shift towards cheap riders, and the ratio of
sums R_1 - R_0 (the headline) holds that shift as well as the price cut. A regression of each
rider's own ratio weighted by its trips, adjusted for the pre-window fare per trip, removes the
shift and estimates the price cut alone: it was about 0.1 above the headline, 10 of its standard
errors, and the robustness value described that other number.

The regression is now of the linearised ratio z_i = R_g + (y_i - R_g x_i) / xbar_g (g the unit's
group; Cochran 1977, *Sampling Techniques*, §6.3; Woodruff 1971, JASA 66:411-414, both recalled),
whose weighted group means are exactly R_1 and R_0. Checked against statsmodels WLS on the rows.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from sqlmatch import api
from sqlmatch.sensitivity import robustness_value
from sqlmatch.spec import parse_spec

MONTHS = pd.date_range("2025-09-01", "2026-06-01", freq="MS")  # pre Sep..Feb, cohort March, post Apr..Jun
CUTS = [1, 2, 3, 4, 5, 6, 8, 10, 12, 15, 20, 25, 30, 40, 50, 60, 80]


def _simulate(path: str, riders: int = 4000, seed: int = 1) -> None:
    rng = np.random.default_rng(seed)
    heavy = rng.random(riders) < 0.4
    rate = np.where(heavy, 8.0, 1.0) * np.exp(0.3 * rng.standard_normal(riders))  # trips a month
    fare = np.where(heavy, 1.0, 4.0) * np.exp(0.2 * rng.standard_normal(riders))  # a rider's usual fare
    pre = rng.poisson(np.outer(rate, np.ones(6)))
    takeup = 1.0 / (1.0 + np.exp(-(-3.0 + 0.8 * np.log1p(pre.sum(axis=1)))))
    treated = rng.random(riders) < takeup
    more = np.where(treated, np.where(heavy, 3.0, 1.1), 1.0)
    post = rng.poisson(np.outer(rate * more, np.ones(3)))
    counts = np.concatenate([pre, np.zeros((riders, 1), dtype=int), post], axis=1)  # 10 months
    price = np.where(treated[:, None] & (np.arange(10) >= 7)[None, :], 0.8, 1.0)
    rider, month = np.nonzero(counts)
    reps = counts[rider, month]
    rider, month = np.repeat(rider, reps), np.repeat(month, reps)
    day = rng.integers(0, 28, len(rider))
    trips = pd.DataFrame(
        {
            "rider_id": rider + 1,
            "started_at": MONTHS.values[month] + (day * 86400 + 3600).astype("timedelta64[s]"),
            "fare": np.round(fare[rider] * price[rider, month], 2),
        }
    )
    units = pd.DataFrame(
        {
            "rider_id": np.arange(1, riders + 1),
            "pass_bought_on": np.where(treated, np.datetime64("2026-03-10"), np.datetime64("NaT")).astype("datetime64[D]"),
        }
    )
    with duckdb.connect(path) as con:
        con.execute("CREATE TABLE riders AS SELECT rider_id, CAST(pass_bought_on AS DATE) AS pass_bought_on FROM units")
        con.execute("CREATE TABLE trips AS SELECT rider_id, CAST(started_at AS TIMESTAMP) AS started_at, fare FROM trips")


def _spec(database: str) -> dict:
    return {
        "study": {"name": "fares", "work_schema": "sqlmatch", "database": database},
        "units": {"table": "riders", "key": "rider_id", "enrolled_on": "pass_bought_on"},
        "events": {"table": "trips", "unit_key": "rider_id", "time": "started_at"},
        "treatment": {"cohort": "2026-03", "control_pool": "never_by_post_end"},
        "windows": {"unit": "month", "pre": 6, "post": 3},
        "features": [
            {"name": "pre_trips", "aggregate": "count"},
            {"name": "pre_fare_per_trip", "aggregate": "mean", "measure": "fare"},
        ],
        "outcomes": [{"name": "fare_per_trip", "aggregate": "ratio", "numerator": "fare"}],
        "matching": {"method": "coarsened_exact", "on": ["pre_trips"], "cut_points": {"pre_trips": CUTS}},
    }


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    path = str(tmp_path_factory.mktemp("fares") / "fares.duckdb")
    _simulate(path)
    spec = parse_spec(_spec(path))
    results = api.run(spec)
    with duckdb.connect(path, read_only=True) as con:
        rows = con.execute("SELECT * FROM sqlmatch.fares_weighted_units WHERE NOT match__weight IS NULL").df()
    return results, rows


def _linearised(rows: pd.DataFrame) -> pd.Series:
    """z = R_g + (y - R_g x) / xbar_g per unit, R_g and xbar_g with the matching weights (pandas)."""
    w, y, x, t = rows.match__weight, rows.fare_per_trip__num, rows.fare_per_trip__den, rows.treated
    r = {g: (w * y)[t == g].sum() / (w * x)[t == g].sum() for g in (0, 1)}
    xbar = {g: (w * x)[t == g].sum() / w[t == g].sum() for g in (0, 1)}
    return t.map(r) + (y - t.map(r) * x) / t.map(xbar)


def test_the_regression_estimates_the_headline_ratio_effect(study):
    results, rows = study
    (e,) = results.effects
    s = e.sensitivity
    # the mechanism is there: the trip-weighted regression of each rider's own ratio, adjusted for
    # the features, lies far from the ratio of sums (statsmodels on the rows)
    d = rows[rows.fare_per_trip__den > 0]
    own = sm.WLS(d.fare_per_trip__num / d.fare_per_trip__den, sm.add_constant(d[["treated", "pre_trips", "pre_fare_per_trip"]].astype(float)), weights=d.match__weight * d.fare_per_trip__den).fit()
    assert own.params["treated"] - e.estimate > 5 * own.bse["treated"]
    # sqlmatch's regression coefficient is the headline's, within a fraction of its standard error
    assert abs(s["regression_estimate"] - e.estimate) < 0.25 * s["regression_std_error"]


def test_the_ratio_regression_equals_statsmodels_on_the_linearised_values(study):
    """WLS of z on treatment and the numeric features, matching weights as analytic weights
    (statsmodels), and its robustness value (Cinelli & Hazlett 2020) from that t and df."""
    results, rows = study
    (e,) = results.effects
    s = e.sensitivity
    X = sm.add_constant(rows[["treated", "pre_trips", "pre_fare_per_trip"]].astype(float))
    ref = sm.WLS(_linearised(rows), X, weights=rows.match__weight).fit()
    assert s["regression_estimate"] == pytest.approx(ref.params["treated"], rel=1e-9)
    assert s["regression_std_error"] == pytest.approx(ref.bse["treated"], rel=1e-6)
    assert s["df"] == int(ref.df_resid) and s["regression_units"] == len(rows)
    rv = robustness_value(ref.tvalues["treated"], ref.df_resid)
    assert s["robustness_value"] == pytest.approx(rv.rv_q, rel=1e-6)
    assert s["partial_r2"] == pytest.approx(rv.partial_r2, rel=1e-6)
    # without features the coefficient is R_1 - R_0 exactly (the group means of z)
    plain = sm.WLS(_linearised(rows), X[["const", "treated"]], weights=rows.match__weight).fit()
    # (the plain ratio: the headline is regression-adjusted by default, ratio outcomes too)
    assert plain.params["treated"] == pytest.approx((e.unadjusted or e).estimate, rel=1e-9)
