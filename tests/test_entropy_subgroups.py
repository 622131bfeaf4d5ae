"""Subgroup effects under entropy balancing: per level the enrolled mean minus the non-enrolled
units' weighted mean, with the study-wide weights (each group's weights normalised within the
level), and the sandwich covariance of all levels, which share the balance conditions and targets
fitted on every unit. Recomputed here with numpy from the stacked estimating equations (Zhao &
Percival 2017; Stefanski & Boos 2002; J by central finite differences), on the NSW data (Dehejia &
Wahba 1999, shipped in causaldata); the test of equal effects as the Wald statistic of that joint
covariance (scipy's chi-square)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import chi2

from sqlmatch.spec import parse_spec

from sandwich import relative_steps, sandwich_covariance
from nsw import load_nsw, nsw_spec
from test_entropy_balancing import moment_matrix, numpy_sandwich, run_study


@pytest.fixture(scope="module")
def nsw_db(tmp_path_factory):
    db = tmp_path_factory.mktemp("nsw_entropy_sub") / "nsw.duckdb"
    load_nsw(str(db))
    return str(db)


def joint_levels(C, t, w, y, levels):
    """Every level's effect and their joint sandwich covariance: per level t 1_l (y - mu1_l) and
    (1 - t) w 1_l (y - mu0_l), and the study's balance conditions (1 - t) w (z - m) and targets
    t (z - m) over all units, w proportional to exp(lam'z); V = J^-1 B J^-T."""
    tf = t.astype(float)
    m0 = C[t].mean(axis=0)
    Z = (C - m0) / C[~t].std(axis=0)
    p, L = C.shape[1], len(levels)
    A = np.column_stack([np.ones((~t).sum()), Z[~t]])
    lam = np.linalg.lstsq(A, np.log(w[~t]), rcond=None)[0][1:]
    ref = float((Z[~t] @ lam).max())

    def psi(theta):
        lm, m = theta[2 * L : 2 * L + p], theta[2 * L + p :]
        wt = np.where(t, 0.0, np.exp(Z @ lm - ref))
        cols = []
        for i, lv in enumerate(levels):
            cols += [tf * lv * (y - theta[2 * i]), wt * lv * (y - theta[2 * i + 1])]
        return np.column_stack(cols + [wt[:, None] * (Z - m), tf[:, None] * (Z - m)])

    wt = np.where(t, 0.0, np.exp(Z @ lam - ref))
    mus = []
    for lv in levels:
        mus += [np.sum(tf * lv * y) / np.sum(tf * lv), np.sum(wt * lv * y) / np.sum(wt * lv)]
    theta = np.concatenate([mus, lam, Z[t].mean(axis=0)])
    V, _ = sandwich_covariance(psi, theta, relative_steps(theta, len(theta)))
    D = np.zeros((L, len(theta)))
    for i in range(L):
        D[i, 2 * i], D[i, 2 * i + 1] = 1.0, -1.0
    return D @ theta, D @ V @ D.T


def test_nsw_levels_and_equal_effects_test_equal_numpy(nsw_db):
    raw = nsw_spec(nsw_db, "entropy_balancing")
    raw["subgroups"] = [{"name": "earned_1975", "where": "re75 > 0"}]
    spec = parse_spec(raw)
    out, results, rows = run_study(nsw_db, spec)
    t = rows.treated.to_numpy() == 1
    C, _ = moment_matrix(rows, spec)
    w = rows.match__weight.to_numpy(float)
    y = rows.earnings_after.to_numpy(float)
    (sub,) = results.subgroups
    got = {x.level: x for x in sub.levels}
    assert set(got) == {"yes", "no"}
    masks = {"yes": (rows.re75 > 0).to_numpy(float), "no": (rows.re75 <= 0).to_numpy(float)}
    for level, lv in masks.items():
        # one level alone: the published equations with u = 1_l y, v = 1_l
        est, se = numpy_sandwich(C, t, w, y * lv, lv)
        assert got[level].effect.estimate == pytest.approx(est, rel=1e-8)
        assert got[level].effect.std_error == pytest.approx(se, rel=1e-5)
        assert got[level].n_treated == int(np.sum(t & (lv == 1)))
        assert got[level].n_control == int(np.sum(~t & (lv == 1)))
    tau, V = joint_levels(C, t, w, y, [masks["no"], masks["yes"]])
    assert abs(V[0, 1]) > 1e-6 * math.sqrt(V[0, 0] * V[1, 1])  # the shared weights correlate the levels
    wald = (tau[1] - tau[0]) ** 2 / (V[0, 0] + V[1, 1] - 2 * V[0, 1])
    assert sub.q == pytest.approx(wald, rel=1e-5) and sub.df == 1
    assert sub.p_value == pytest.approx(chi2.sf(wald, 1), rel=1e-4)
    assert "balancing weights" in sub.test


def test_one_level_holding_every_unit_is_the_study_effect(nsw_db):
    """A condition every unit meets gives one level whose effect and SE are the study's own."""
    raw = nsw_spec(nsw_db, "entropy_balancing")
    raw["subgroups"] = [{"name": "everyone", "where": "age >= 0"}]
    spec = parse_spec(raw)
    _, results, _ = run_study(nsw_db, spec)
    (sub,) = results.subgroups
    (level,) = [x for x in sub.levels if x.level == "yes"]
    effect = results.effect("earnings_after")
    assert level.effect.estimate == pytest.approx(effect.estimate, rel=1e-10)
    assert level.effect.std_error == pytest.approx(effect.std_error, rel=1e-10)
