"""Subgroup effects under score_weighting: per level the weighted difference with the level's own
(normalised) weights and the sandwich SE counting the score fitted on every unit, recomputed with
numpy from the stacked estimating equations (Lunceford & Davidian 2004; finite-difference
Jacobian), on the NSW data (Dehejia & Wahba 1999, causaldata); the test of equal effects as the
Wald statistic of the same joint covariance (scipy's chi-square); small levels withheld."""

from __future__ import annotations

import json
import math
import tomllib

import duckdb
import numpy as np
import pytest
from scipy.stats import chi2

from sqlmatch import api
from sqlmatch.spec import parse_spec

from sandwich import relative_steps, sandwich_covariance
from conftest import DEMO_SPEC
from nsw import load_nsw, nsw_spec
from test_score_weighting import design, numpy_sandwich, numpy_weights, raw_weights, run_study


@pytest.fixture(scope="module")
def nsw_db(tmp_path_factory):
    db = tmp_path_factory.mktemp("nsw_sub") / "nsw.duckdb"
    load_nsw(str(db))
    return str(db)


def joint_levels(X, t, y, beta, keep, levels):
    """Every level's effect and their joint sandwich covariance: psi per level (t a 1_l (y - mu1_l),
    (1 - t) a 1_l (y - mu0_l)) and one logit score over all units; J by central differences."""
    L = len(levels)

    def psi(theta):
        b = theta[2 * L :]
        e = 1 / (1 + np.exp(-(X @ b)))
        a = np.where(keep, raw_weights(t, X @ b), 0.0)
        cols = []
        for i, lv in enumerate(levels):
            cols += [t * a * lv * (y - theta[2 * i]), (1 - t) * a * lv * (y - theta[2 * i + 1])]
        return np.column_stack(cols + [(t - e)[:, None] * X])

    a = np.where(keep, raw_weights(t, X @ beta), 0.0)
    mus = []
    for lv in levels:
        mus += [np.sum(t * a * lv * y) / np.sum(t * a * lv), np.sum((1 - t) * a * lv * y) / np.sum((1 - t) * a * lv)]
    theta = np.concatenate([mus, beta])
    sd = X.std(axis=0)
    V, _ = sandwich_covariance(psi, theta, relative_steps(theta, 2 * L, 1.0 / np.where(sd > 0, sd, 1.0)))
    D = np.zeros((L, len(theta)))
    for i in range(L):
        D[i, 2 * i], D[i, 2 * i + 1] = 1.0, -1.0
    V = D @ V @ D.T
    return D @ theta, V


def test_nsw_levels_and_equal_effects_test_equal_numpy(nsw_db):
    raw = nsw_spec(nsw_db, "score_weighting", common_support=False)
    raw["subgroups"] = [{"name": "earned_1975", "where": "re75 > 0"}]
    spec = parse_spec(raw)
    out, results, rows = run_study(nsw_db, spec)
    X = design(rows, out.model.columns)
    t = rows.treated.to_numpy(float)
    beta = np.asarray(out.model.coefficients)
    y = rows.earnings_after.to_numpy(float)
    w, caps = numpy_weights(t, X @ beta, common_support=False)
    keep = ~np.isnan(w)
    (sub,) = results.subgroups
    got = {x.level: x for x in sub.levels}
    assert set(got) == {"yes", "no"}
    masks = {"yes": (rows.re75 > 0).to_numpy(float), "no": (rows.re75 <= 0).to_numpy(float)}
    for level, lv in masks.items():
        # one level alone: the published equations with u = 1_l y, v = 1_l
        est, se, _ = numpy_sandwich(X, t, y * lv, lv, beta, keep, caps)
        assert got[level].effect.estimate == pytest.approx(est, rel=1e-6)
        assert got[level].effect.std_error == pytest.approx(se, rel=1e-5)
        assert got[level].n_treated == int(np.sum(keep & (t == 1) & (lv == 1)))
        assert got[level].n_control == int(np.sum(keep & (t == 0) & (lv == 1)))
    tau, V = joint_levels(X, t, y, beta, keep, [masks["no"], masks["yes"]])
    assert abs(V[0, 1]) > 1e-6 * math.sqrt(V[0, 0] * V[1, 1])  # the shared score correlates the levels
    d = tau[1] - tau[0]
    wald = d**2 / (V[0, 0] + V[1, 1] - 2 * V[0, 1])
    assert sub.q == pytest.approx(wald, rel=1e-5) and sub.df == 1
    assert sub.p_value == pytest.approx(chi2.sf(wald, 1), rel=1e-4)


def test_a_small_level_is_withheld_under_weighting(demo_db):
    with duckdb.connect(str(demo_db)) as con:
        cohort = "pass_bought_on >= DATE '2026-03-01' AND pass_bought_on < DATE '2026-04-01'"
        ids = [r for (r,) in con.execute(f"SELECT rider_id FROM riders WHERE {cohort} ORDER BY rider_id LIMIT 3").fetchall()]
        ids += [r for (r,) in con.execute("SELECT rider_id FROM riders WHERE pass_bought_on IS NULL ORDER BY rider_id LIMIT 300").fetchall()]
        con.execute(f"UPDATE riders SET home_district = 'Tiny Quay' WHERE rider_id IN ({', '.join(map(str, ids))})")
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(demo_db)
    raw["matching"] = {"method": "score_weighting", "on": ["pre_trips", "age_band"]}
    raw["subgroups"] = [{"feature": "home_district"}]
    raw["report"] = {"min_cell_size": 5}
    results = api.run(parse_spec(raw))
    sub = results.subgroups[0]
    tiny = next(x for x in sub.levels if x.level == "Tiny Quay")
    assert tiny.withheld and tiny.effect.estimate is None
    others = [x for x in sub.levels if not x.withheld]
    assert len(others) >= 2 and all(x.effect.std_error is not None and x.effect.std_error > 0 for x in others)
    assert sub.q is not None and sub.df == len([x for x in others if x.effect.estimate is not None]) - 1
    text = json.dumps(json.loads(results.to_json())["subgroups"])
    assert '"n_treated": 3' not in text
    assert "Wald chi-square of equal effects" in json.loads(results.to_json())["subgroups"][0]["heterogeneity"]["test"]
    from sqlmatch.report.markdown import render_markdown

    assert "Wald chi-square of equal effects" in render_markdown(results) and "Cochran" not in render_markdown(results)
