"""Regression adjustment within strata (estimators/adjusted.py) against statsmodels' least
squares on the NSW data (Dehejia & Wahba 1999; LaLonde 1986; from the `causaldata` package):
the effect is the combination of the cell intercepts of y ~ cell + x, and the variance the
published plug-in formula recomputed from the rows with numpy."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

sm = pytest.importorskip("statsmodels.api")
pytest.importorskip("causaldata")

from sqlmatch.estimators.adjusted import CellSums, adjusted_att  # noqa: E402

from nsw import nsw_frames  # noqa: E402

X = ["age", "educ", "re74", "re75", "nodegree"]


@pytest.fixture(scope="module")
def men() -> pd.DataFrame:
    units, events = nsw_frames()
    y = events[events.paid_on.dt.year == 1978].set_index("person_id").earnings
    df = units.set_index("person_id").join(y.rename("y"))
    df["t"] = df.enrolled_on.notna().astype(int)
    return df.reset_index()


def sums(df: pd.DataFrame, strata: list) -> tuple[CellSums, CellSums]:
    out = []
    for g in (1, 0):
        n, sx, sxx, sy, syy, sxy = [], [], [], [], [], []
        for s in strata:
            cell = df[(df.stratum == s) & (df.t == g)]
            x, y = cell[X].to_numpy(float), cell.y.to_numpy(float)
            n.append(len(cell)); sx.append(x.sum(0)); sxx.append(x.T @ x); sy.append(y.sum()); syy.append(y @ y); sxy.append(x.T @ y)
        out.append(CellSums.of(n, sx, sxx, sy, syy, sxy))
    return out[0], out[1]


def test_one_stratum_is_the_treatment_coefficient_of_ols(men):
    df = men.assign(stratum=0)
    got = adjusted_att(*sums(df, [0]), X, slopes="common")
    fit = sm.OLS(df.y, sm.add_constant(df[["t"] + X])).fit()
    assert got.effect.estimate == pytest.approx(fit.params["t"], rel=1e-9)
    assert got.slopes == pytest.approx(fit.params[X].to_numpy(), rel=1e-7)


def test_strata_combine_the_cell_intercepts_of_ancova(men):
    # strata: no earnings in 1975 (u75) crossed with `black` (every cell holds both groups)
    df = men.copy()
    df["stratum"] = (df.u75 * 2 + df.black).astype(int)
    strata = sorted(df.stratum.unique())
    assert all(((df.stratum == s) & (df.t == g)).any() for s in strata for g in (0, 1))
    got = adjusted_att(*sums(df, strata), X, slopes="common")
    # y = alpha_(s, g) + gamma' x: one dummy per cell, no constant
    cell = pd.get_dummies(df.stratum.astype(str) + "_" + df.t.astype(str), dtype=float)
    fit = sm.OLS(df.y, pd.concat([cell, df[X]], axis=1)).fit()
    w = np.array([((df.stratum == s) & (df.t == 1)).sum() for s in strata], float)
    w /= w.sum()
    tau = sum(wi * (fit.params[f"{s}_1"] - fit.params[f"{s}_0"]) for wi, s in zip(w, strata))
    # tau = sum_s w_s [(ybar_1s - ybar_0s) - gamma'(xbar_1s - xbar_0s)] is the cell-intercept contrast
    assert got.effect.estimate == pytest.approx(tau, rel=1e-8)
    assert got.slopes == pytest.approx(fit.params[X].to_numpy(), rel=1e-7)
    # variance: sum_s w_s^2 (s2_u1s / n_1s + s2_u0s / n_0s), u = y - gamma' x, from the rows
    u = df.y - df[X].to_numpy(float) @ fit.params[X].to_numpy()
    var = 0.0
    for wi, s in zip(w, strata):
        for g in (1, 0):
            us = u[(df.stratum == s) & (df.t == g)]
            var += wi**2 * us.var(ddof=1) / len(us)
    assert got.effect.std_error == pytest.approx(np.sqrt(var), rel=1e-7)


def test_a_column_constant_within_cells_gets_no_slope(men):
    df = men.assign(stratum=0)
    df["nodegree"] = 1.0  # no variation at all
    got = adjusted_att(*sums(df, [0]), X, slopes="common")
    assert "nodegree" not in got.adjusted_for and got.slopes[X.index("nodegree")] == 0.0
    fit = sm.OLS(df.y, sm.add_constant(df[["t"] + [x for x in X if x != "nodegree"]])).fit()
    assert got.effect.estimate == pytest.approx(fit.params["t"], rel=1e-9)


def test_the_run_adjusts_as_statsmodels_does_on_the_matched_units(demo_db):
    """End to end on the demo: the adjusted effect from the warehouse's sums equals statsmodels'
    cell-intercept contrast fitted on the matched units' rows (read here only to check); with
    [effect] regression_adjustment = false it stays beside the plain headline; by default (and with
    true) it is the headline and the plain one is kept as `unadjusted`."""
    import tomllib

    import duckdb

    from sqlmatch import api
    from sqlmatch.spec import parse_spec

    from conftest import DEMO_SPEC

    db = demo_db
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    raw["effect"] = {"regression_adjustment": False, "adjustment_slopes": "common", "adjustment_terms": "linear"}
    spec = parse_spec(raw)
    plain = api.run(spec, keep_tables=True)
    assert all(e.unadjusted is None and "within-stratum regression" not in e.estimator for e in plain.effects)
    features = [f.name for f in spec.numeric_features]
    with duckdb.connect(str(db), read_only=True) as con:
        rows = con.execute("SELECT * FROM sqlmatch.annual_pass_weighted_units WHERE match__weight IS NOT NULL").df()
    for outcome in ("post_trips", "active_last_month"):
        e = plain.effect(outcome)
        cells = rows.match__stratum.astype(str) + "_" + rows.treated.astype(str)
        both = rows.groupby("match__stratum").treated.nunique() == 2
        keep = rows.match__stratum.isin(both[both].index)
        x = rows.loc[keep, features].astype(float)
        x = x.loc[:, x.std() > 0]
        fit = sm.OLS(rows.loc[keep, outcome].astype(float), pd.concat([pd.get_dummies(cells[keep], dtype=float), x], axis=1)).fit()
        treated = rows[keep & (rows.treated == 1)].match__stratum.value_counts()
        w = treated / treated.sum()
        tau = sum(w[s] * (fit.params[f"{s}_1"] - fit.params[f"{s}_0"]) for s in w.index)
        assert e.adjusted.estimate == pytest.approx(tau, rel=1e-6, abs=1e-9)
        assert set(e.adjusted_for) == set(x.columns)
    del raw["effect"]
    default = api.run(parse_spec(raw))
    raw["effect"] = {"regression_adjustment": True}
    adjusted = api.run(parse_spec(raw))
    assert [e.estimate for e in default.effects] == pytest.approx([e.estimate for e in adjusted.effects], rel=1e-9)
    for e0, e1 in zip(plain.effects, adjusted.effects):
        # the default is the common slope on the features (checked against statsmodels above): ratio
        # outcomes stay unadjusted (only each group's own slopes adjust them)
        if e0.kind == "ratio":
            assert e1.adjusted is None and e1.estimate == pytest.approx(e0.estimate, rel=1e-12)
            continue
        assert e1.estimate == pytest.approx(e0.adjusted.estimate) and e1.std_error == pytest.approx(e0.adjusted.std_error)
        assert e1.unadjusted.estimate == pytest.approx(e0.estimate) and "within-stratum regression" in e1.estimator


def _fit_rows(df, cols):
    return sm.OLS(df.y, sm.add_constant(df[cols])).fit()


def test_group_slopes_are_each_groups_ols_predicted_at_the_target_means(men):
    """Each group's own slopes (the default), one stratum: the ATT is the treated mean minus the
    controls' OLS (statsmodels) predicted at the treated's mean features, the ATC the treated's
    OLS predicted at the controls' means minus their mean (Lin 2013, separate slopes; Imbens &
    Rubin 2015 ch. 12). Variance: the residual variances of each fit over n plus the slopes' term
    d' cov_params d, d = target mean - the group's mean."""
    df = men.assign(stratum=0)
    t, c = df[df.t == 1], df[df.t == 0]
    f1, f0 = _fit_rows(t, X), _fit_rows(c, X)
    for estimand, target in (("att", t), ("atc", c)):
        got = adjusted_att(*sums(df, [0]), X, estimand=estimand)
        assert got.own_slopes == (True, True)
        zt = sm.add_constant(target[X], has_constant="add").mean()
        mu1, mu0 = float(f1.params @ zt), float(f0.params @ zt)
        assert got.effect.estimate == pytest.approx(mu1 - mu0, rel=1e-9)
        var = 0.0
        for fit, part in ((f1, t), (f0, c)):
            d = (target[X].mean() - part[X].mean()).to_numpy()
            var += fit.resid.var(ddof=1) / len(part) + d @ fit.cov_params().loc[X, X].to_numpy() @ d
        assert got.effect.std_error == pytest.approx(np.sqrt(var), rel=1e-8)
    assert got.slopes == pytest.approx(f0.params[X].to_numpy(), rel=1e-7)
    assert got.slopes_treated == pytest.approx(f1.params[X].to_numpy(), rel=1e-7)


def test_a_group_too_small_for_its_own_slopes_takes_the_common_slope(men):
    """40 controls for 5 slopes (fewer than MIN_UNITS_PER_SLOPE = 10 per slope beyond the intercept):
    the controls take the common slope of both groups, so the ATT is the treatment coefficient of
    y ~ t + x (statsmodels), and the controls' slope term is d' cov_params d of that fit; the
    treated keep their own residuals."""
    df = pd.concat([men[men.t == 1], men[men.t == 0].head(40)]).assign(stratum=0)
    got = adjusted_att(*sums(df, [0]), X)
    assert got.own_slopes == (True, False)
    pooled = _fit_rows(df, ["t"] + X)
    assert got.effect.estimate == pytest.approx(pooled.params["t"], rel=1e-9)
    assert got.slopes == pytest.approx(pooled.params[X].to_numpy(), rel=1e-7)
    t, c = df[df.t == 1], df[df.t == 0]
    own = _fit_rows(t, X)
    d0 = (t[X].mean() - c[X].mean()).to_numpy()
    u0 = c.y - c[X].to_numpy() @ pooled.params[X].to_numpy()
    var = own.resid.var(ddof=1) / len(t) + u0.var(ddof=1) / len(c) + d0 @ pooled.cov_params().loc[X, X].to_numpy() @ d0
    assert got.effect.std_error == pytest.approx(np.sqrt(var), rel=1e-8)
    # with both groups too small for slopes of their own, one common slope and one slope term
    few = pd.concat([men[men.t == 1].head(45), men[men.t == 0].head(45)]).assign(stratum=0)
    both = adjusted_att(*sums(few, [0]), X)
    fit = _fit_rows(few, ["t"] + X)
    assert both.own_slopes == (False, False) and both.effect.estimate == pytest.approx(fit.params["t"], rel=1e-9)
    t, c = few[few.t == 1], few[few.t == 0]
    u = few.y - few[X].to_numpy() @ fit.params[X].to_numpy()
    d = (t[X].mean() - c[X].mean()).to_numpy()  # d_1 - d_0 = 0 - (xbar_1 - xbar_0), squared the same
    var = u[few.t == 1].var(ddof=1) / len(t) + u[few.t == 0].var(ddof=1) / len(c) + d @ fit.cov_params().loc[X, X].to_numpy() @ d
    assert both.effect.std_error == pytest.approx(np.sqrt(var), rel=1e-8)
