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
    got = adjusted_att(*sums(df, [0]), X)
    fit = sm.OLS(df.y, sm.add_constant(df[["t"] + X])).fit()
    assert got.effect.estimate == pytest.approx(fit.params["t"], rel=1e-9)
    assert got.slopes == pytest.approx(fit.params[X].to_numpy(), rel=1e-7)


def test_strata_combine_the_cell_intercepts_of_ancova(men):
    # strata: no earnings in 1975 (u75) crossed with `black` (every cell holds both groups)
    df = men.copy()
    df["stratum"] = (df.u75 * 2 + df.black).astype(int)
    strata = sorted(df.stratum.unique())
    assert all(((df.stratum == s) & (df.t == g)).any() for s in strata for g in (0, 1))
    got = adjusted_att(*sums(df, strata), X)
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
    got = adjusted_att(*sums(df, [0]), X)
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
    raw["effect"] = {"regression_adjustment": False}
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
        if e0.kind == "ratio":
            assert e1.adjusted is None and e1.estimate == pytest.approx(e0.estimate, rel=1e-12)
            continue
        assert e1.estimate == pytest.approx(e0.adjusted.estimate) and e1.std_error == pytest.approx(e0.adjusted.std_error)
        assert e1.unadjusted.estimate == pytest.approx(e0.estimate) and "within-stratum regression" in e1.estimator
