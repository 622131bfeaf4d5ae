"""The Abadie & Imbens (2006) variance of nearest-neighbour matching with replacement, computed
in SQL from aggregates, checked against an independent numpy implementation of the published
formula on the rows of a small demo warehouse.

sigma2 is estimated from neighbour differences of each group's regression residual on the study's
numeric features (the bias correction's regression; a choice of ours, the paper matches on the
features), which the numpy side computes with statsmodels WLS.

Source: Abadie & Imbens (2006), "Large sample properties of matching estimators for average
treatment effects", Econometrica 74(1):235-267, section 4 (recalled from memory): the variance of
the matching estimator of the effect on the treated conditional on the features,
    V = (1 / N_1^2) sum_i (W_i - (1 - W_i) K_M(i) / M)^2 sigma2(X_i, W_i),
with sigma2(X_i, W_i) = J / (J + 1) (Y_i - mean of the J nearest units of i's own group)^2, J = 1.

The reported standard error is the paper's variance of the estimator of the population effect on
the treated (Abadie & Imbens 2006, section 4; recalled from memory, theorem number not checked):
    V_pop = (1 / N_1^2) [sum_treated (Y_i - Yhat_i(0) - tau)^2 + sum_controls (w_j^2 - sum_i share_ij^2) sigma2_j],
Yhat_i(0) the share-weighted mean of i's matches (bias-corrected with the controls' regression when
the correction is on; Abadie & Imbens 2011, recalled); w_j^2 - sum_i share_ij^2 is K_M (K_M - 1) / M^2
without ties. The numpy side builds each treated unit's matched mean from the matches table.

The bias correction (Abadie & Imbens 2011, Journal of Business & Economic Statistics 29(1):1-11,
recalled) is checked in its per-treated-unit form with the controls' regression fitted by
statsmodels WLS.

Row-level reads of the work tables happen here, in the test, only to check the SQL."""

from __future__ import annotations

import shutil

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from sqlmatch import api
from sqlmatch.spec import parse_spec

from test_neighbours import demo_raw, match_shares

CONFIGS = {"k1": {}, "k2_blocks": {"controls_per_treated": 2, "block_on": ["age_band"]}, "k1_uncorrected": {"bias_correction": False}}


@pytest.fixture(scope="module")
def runs(demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("matching_variance")
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    database = str(folder / "bikeshare.duckdb")
    out = {}
    for name, matching in CONFIGS.items():
        spec = parse_spec(demo_raw(database, f"mv_{name}", **matching))
        results = api.run(spec)
        with duckdb.connect(database, read_only=True) as con:
            read = lambda t: con.execute(f"SELECT * FROM sqlmatch.{spec.name}_{t}").df()  # noqa: E731
            tables = {t: read(t) for t in ("scores", "match_weights", "measures", "nearest_neighbour_matches", "nearest_neighbour_units")}
        shares = match_shares(tables["nearest_neighbour_matches"], tables["nearest_neighbour_units"])
        tables["matches"] = pd.DataFrame([(a, b, w) for (a, b), w in shares.items()], columns=["treated_key", "control_key", "share"])
        out[name] = (spec, results, tables)
    return out


def nearest_same_group(units: pd.DataFrame, exact: list[str]) -> list[np.ndarray]:
    """Brute force: for each unit, the positions of all its nearest other units of the same group and
    exact block by |score difference| (at 10 decimal places): every unit at the smallest distance
    (distance 0 for units sharing its score). Empty when it has none."""
    score = np.round(units.score.to_numpy(), 10)
    same = units.treated.to_numpy()[:, None] == units.treated.to_numpy()[None, :]
    for f in exact:
        v = units[f].fillna("(missing)").to_numpy()
        same &= v[:, None] == v[None, :]
    np.fill_diagonal(same, False)
    gap = np.where(same, np.round(np.abs(score[:, None] - score[None, :]), 10), np.inf)
    out = []
    for i in range(len(units)):
        out.append(np.flatnonzero(gap[i] == gap[i].min()) if np.isfinite(gap[i]).any() else np.array([], dtype=int))
    return out


def tie_averaged_sigma2(y: np.ndarray, nearest: list[np.ndarray]) -> np.ndarray:
    """sigma2_i = (y_i - y_l)^2 / 2 (Abadie & Imbens 2006, J = 1) averaged over every nearest unit l."""
    return np.array([np.mean(0.5 * (y[i] - y[nb]) ** 2) if len(nb) else np.nan for i, nb in enumerate(nearest)])


def numpy_variance(spec, tables, value, population: bool = True) -> float:
    """V from the rows: weights summed per unit (a control's is K_M(i) / M), sigma2 from the
    nearest same-group unit, value(units) the per-unit quantity whose variance is taken; V_pop
    (population=True) or the conditional V."""
    w = tables["match_weights"].groupby("unit_key").weight.sum()
    scores = tables["scores"].dropna(subset=["score"])
    measures = tables["measures"].drop(columns=[c for c in scores.columns if c != "unit_key"], errors="ignore")
    units = scores.merge(measures, on="unit_key")
    units = units.reset_index(drop=True)
    y = value(units, w)
    q = y.copy()
    weight = units.unit_key.map(w).to_numpy(dtype=float)
    matched = ~np.isnan(weight)
    # sigma2 from the residual of each group's regression on the numeric features among its matched
    # units (weights w, statsmodels WLS), as sqlmatch does when the bias correction is on
    features = [f.name for f in spec.numeric_features]
    X = sm.add_constant(units[features].to_numpy(float), has_constant="add")
    slopes = {0: np.zeros(len(features))}
    for g in (0, 1) if spec.matching.bias_correction else ():
        fit_on = matched & (units.treated.to_numpy() == g)
        beta = sm.WLS(y[fit_on], X[fit_on], weights=weight[fit_on]).fit().params
        slopes[g] = beta[1:]
        rows = units.treated.to_numpy() == g
        y = np.where(rows, y - X[:, 1:] @ beta[1:], y)
    nearest = nearest_same_group(units, list(spec.matching.block_on))
    sigma2 = tie_averaged_sigma2(y, nearest)
    assert all(len(nearest[i]) for i in np.flatnonzero(matched))  # every matched unit has a neighbour here (no borrowing to check)
    # the demo's scores tie: the averaging over several nearest units is exercised
    assert sum(len(nearest[i]) > 1 for i in np.flatnonzero(matched)) > 10
    n1 = weight[matched & (units.treated.to_numpy() == 1)].sum()
    if not population:
        return float(np.sum(weight[matched] ** 2 * sigma2[matched]) / n1**2)
    # V_pop: each treated unit's difference from its (corrected) matched mean, then the reused controls' rest
    pos = pd.Series(np.arange(len(units)), index=units.unit_key)
    m = tables["matches"]
    ti, ci, share = pos.loc[m.treated_key].to_numpy(), pos.loc[m.control_key].to_numpy(), m.share.to_numpy(float)
    xs = units[features].to_numpy(float)
    yhat0 = np.bincount(ti, weights=share * (q[ci] + (xs[ti] - xs[ci]) @ slopes[0]), minlength=len(units))
    treated = np.unique(ti)
    assert len(treated) == n1 and np.allclose(np.bincount(ti, weights=share)[treated], 1.0)
    a = q[treated] - yhat0[treated]
    share2 = np.bincount(ci, weights=share**2, minlength=len(units))
    controls = matched & (units.treated.to_numpy() == 0)
    reuse = np.sum((weight[controls] ** 2 - share2[controls]) * sigma2[controls])
    return float((np.sum((a - a.mean()) ** 2) + reuse) / n1**2)


@pytest.mark.parametrize("name", list(CONFIGS))
def test_standard_errors_equal_numpy_abadie_imbens(runs, name):
    spec, results, tables = runs[name]
    if name == "k2_blocks":  # shares below 1, so w^2 - share2 differs from the no-tie w^2 - w
        assert (tables["matches"].share < 1).any()
    trips = numpy_variance(spec, tables, lambda u, w: u.post_trips.to_numpy(dtype=float))
    # V_pop is not the conditional V here (the check can tell them apart)
    assert abs(np.sqrt(trips) / np.sqrt(numpy_variance(spec, tables, lambda u, w: u.post_trips.to_numpy(dtype=float), population=False)) - 1) > 1e-4
    assert results.effect("post_trips").std_error == pytest.approx(np.sqrt(trips), rel=1e-9)
    did = numpy_variance(spec, tables, lambda u, w: (u.post_trips - u.pre_trips).to_numpy(dtype=float))
    assert results.effect("post_trips").did.std_error == pytest.approx(np.sqrt(did), rel=1e-9)

    def linearised(u, w):
        # ratio R_g = sum w y / sum w x per group, u = (y - R_g x) / xbar_g, xbar_g = sum w x / N_1
        wt = u.unit_key.map(w).fillna(0.0).to_numpy()
        y, x, g = u["fare_per_trip__num"].to_numpy(float), u["fare_per_trip__den"].to_numpy(float), u.treated.to_numpy()
        n1 = wt[g == 1].sum()
        out = np.empty(len(u))
        for k in (0, 1):
            s = g == k
            r = np.sum(wt[s] * y[s]) / np.sum(wt[s] * x[s])
            out[s] = (y[s] - r * x[s]) / (np.sum(wt[s] * x[s]) / n1)
        return out

    fare = numpy_variance(spec, tables, linearised)
    assert results.effect("fare_per_trip").std_error == pytest.approx(np.sqrt(fare), rel=1e-9)

    # the relative lift m1 / m0 - 1 (delta method, e.g. Casella & Berger 2002, section 5.5.4, recalled):
    # rho - rho_hat ~ (m1 - rho m0) / m0, so its SE is the matching variance of the quantity y / m0
    # for the treated and rho y / m0 for the controls; the two means are dependent (shared controls),
    # which the old form (treated and control parts as independent) could not count
    effect = results.effect("post_trips")
    m0, rho = effect.mean_control, effect.lift.estimate + 1.0
    assert rho == pytest.approx(effect.mean_treated / m0, rel=1e-12)

    def scaled(u, w):
        y = u.post_trips.to_numpy(dtype=float)
        return np.where(u.treated.to_numpy() == 1, y / m0, rho * y / m0)

    assert effect.lift.std_error == pytest.approx(np.sqrt(numpy_variance(spec, tables, scaled)), rel=1e-9)
    lo, hi = effect.lift.ci_low, effect.lift.ci_high
    se_log = effect.lift.std_error / rho
    assert (lo, hi) == pytest.approx((rho * np.exp(-1.959963984540054 * se_log) - 1, rho * np.exp(1.959963984540054 * se_log) - 1), rel=1e-9)

    ratio = results.effect("fare_per_trip")
    r0, rho_f = ratio.mean_control, ratio.lift.estimate + 1.0

    def scaled_ratio(u, w):
        return np.where(u.treated.to_numpy() == 1, linearised(u, w) / r0, rho_f * linearised(u, w) / r0)

    assert ratio.lift.std_error == pytest.approx(np.sqrt(numpy_variance(spec, tables, scaled_ratio)), rel=1e-6)


def test_matched_difference_squares_by_hand():
    """Two treated units, one variable (1) and one feature (2): t = (3, 5), c = (1, 2), feature t = (1, 0),
    c = (0, 1); a_i = t1 - c1 - b (tx - cx) with b = 2: a = (3 - 1 - 2, 5 - 2 + 2) = (0, 5), so n = 2,
    sum a = 5, sum a^2 = 25 (hand arithmetic)."""
    from sqlmatch.estimators.matching_variance import matched_difference_squares

    t1, c1, tx, cx = np.array([3.0, 5.0]), np.array([1.0, 2.0]), np.array([1.0, 0.0]), np.array([0.0, 1.0])
    row = {"n_treated": 2, "t1": t1.sum(), "c1": c1.sum(), "t2": tx.sum(), "c2": cx.sum()}
    for key, (a, b) in {"p1_1": (0, 0), "p1_2": (0, 1), "p2_2": (1, 1)}.items():
        va, vb = ((t1, c1), (tx, cx))[a], ((t1, c1), (tx, cx))[b]
        row.update({f"{key}__tt": va[0] @ vb[0], f"{key}__tc": va[0] @ vb[1], f"{key}__ct": va[1] @ vb[0], f"{key}__cc": va[1] @ vb[1]})
    n, total, square = matched_difference_squares(row, {1: 1.0, 2: -2.0}, {1: 1.0, 2: -2.0})
    assert (n, total, square) == (2, pytest.approx(5.0), pytest.approx(25.0))


def test_a_unit_without_a_neighbour_borrows_its_groups_mean_sigma2():
    """Hand arithmetic: treated part (1 + 1 + 1) units, sigma2 sums 0.5 + 1.5 over the two with a
    neighbour, so the third borrows their mean 1.0: V_T = 3 / 3^2; controls: w^2 = 4 and 1 with
    neighbours (w^2 sigma2 summed 4 * 0.25 + 1 * 0.75 = 1.75, unweighted 1.0, mean 0.5), one of
    w^2 = 4 without: 1.75 + 4 * 0.5 = 3.75, V_C = 3.75 / 9."""
    from sqlmatch.engines.base import QueryResult
    from sqlmatch.estimators.matching_variance import matching_variance

    cols = ("treated", "n_units", "n_with_neighbour", "sum_w", "sum_w2", "sum_w2_with_neighbour", "p1_1__w2_dd", "p1_1__dd")
    result = QueryResult(cols, ((0, 3, 2, 5.0, 9.0, 5.0, 1.75, 1.0), (1, 3, 2, 3.0, 3.0, 2.0, 2.0, 2.0)))
    mv = matching_variance(result, {1: {1: 1.0}, 0: {1: 1.0}})
    assert mv.var_treated == pytest.approx(3.0 / 9.0)
    assert mv.var_control == pytest.approx(3.75 / 9.0)
    assert mv.units_without_neighbour == 2
    assert mv.std_error == pytest.approx(np.sqrt(6.75 / 9.0))


def test_without_the_correction_the_estimate_is_the_matching_estimator(runs):
    spec, results, tables = runs["k1_uncorrected"]
    x = tables["measures"].set_index("unit_key").post_trips
    m = tables["matches"]
    per = m.assign(yc=x.loc[m.control_key].to_numpy(float) * m.share).groupby("treated_key").yc.sum()
    effect = results.effect("post_trips")
    assert effect.estimate == pytest.approx(float(np.mean(x.loc[per.index].to_numpy(float) - per.to_numpy())), rel=1e-9)
    assert "bias-corrected" not in effect.estimator and "Abadie-Imbens" in effect.estimator


@pytest.mark.parametrize("name", ["k1", "k2_blocks"])
@pytest.mark.parametrize("outcome", ["post_trips", "active_last_month"])
def test_bias_corrected_estimate_equals_the_per_unit_form(runs, name, outcome):
    """(1 / N_1) sum_i [(Y_i - share-weighted mean Y of i's matches) - (mu0(X_i) - the same mean of mu0)], mu0 the
    controls' linear regression on the study's numeric features, fitted on the matched
    controls weighted by K_M / M (statsmodels WLS)."""
    spec, results, tables = runs[name]
    features = [f.name for f in spec.numeric_features]
    x = tables["measures"].set_index("unit_key")
    w = tables["match_weights"].groupby(["unit_key", "treated"]).weight.sum().reset_index()
    controls = w[w.treated == 0]
    fit = sm.WLS(x.loc[controls.unit_key, outcome].to_numpy(float), sm.add_constant(x.loc[controls.unit_key, features].to_numpy(float)), weights=controls.weight.to_numpy()).fit()
    mu0 = pd.Series(fit.predict(sm.add_constant(x[features].to_numpy(float))), index=x.index)
    m = tables["matches"]
    m = m.assign(yc=x.loc[m.control_key, outcome].to_numpy(float) * m.share, muc=mu0.loc[m.control_key].to_numpy() * m.share)
    per = m.groupby("treated_key")[["yc", "muc"]].sum()
    yt, mut = x.loc[per.index, outcome].to_numpy(float), mu0.loc[per.index].to_numpy()
    expected = float(np.mean((yt - per.yc.to_numpy()) - (mut - per.muc.to_numpy())))
    effect = results.effect(outcome)
    assert effect.estimate == pytest.approx(expected, rel=1e-9, abs=1e-12)
    assert "bias-corrected" in effect.estimator
    # the interval is centred on the corrected estimate
    assert (effect.ci_low + effect.ci_high) / 2 == pytest.approx(expected, rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("distance", ["score", "mahalanobis"])
def test_variance_windows_run_over_tie_sets_not_units(distance):
    """The variance step's neighbour search sorts the tie sets (one row per group, block and score: a
    GROUP BY of the units), not the units: every window reads the tie_sets CTE and orders by its score
    alone, and the units' own rows are never sorted. On the score distance the scores come from the
    units table of the grouped search (score_compared), otherwise from the scores table."""
    import sqlglot
    from sqlglot import exp

    from sqlmatch.plan import build_plan
    from test_neighbours import STAND_IN_MODEL

    spec = parse_spec(demo_raw("unused.duckdb", "mv_plan", distance=distance))
    step = build_plan(spec, "duckdb", model=STAND_IN_MODEL).step("matching_variance")
    (query,) = [sql for sql in step.statements if "LAG(" in sql.upper()]
    tree = sqlglot.parse_one(query, read="duckdb")
    ctes = {c.alias: c.this for c in tree.find_all(exp.CTE)}
    assert list(ctes["tie_sets"].args["group"].expressions)  # the tie sets are a GROUP BY
    windowed = [name for name, body in ctes.items() if list(body.find_all(exp.Window))]
    assert windowed == ["ordered"]
    assert {t.name for t in ctes["ordered"].find_all(exp.Table)} == {"tie_sets"}
    orders = {o.sql("duckdb") for w in ctes["ordered"].find_all(exp.Window) for o in w.args["order"].expressions}
    assert orders == {"t.score"}
    assert ("nearest_neighbour_units" in query) == (distance == "score")
