"""The SQL path against independent computations on the same rows.

The test itself reads row-level data from the demo warehouse (sqlmatch never does) and recomputes
each statistic with numpy / pandas / statsmodels; sqlmatch's figures come only from aggregates.
"""

from __future__ import annotations

import dataclasses

import shutil

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from sqlmatch import api

from conftest import DEMO_SPEC


@pytest.fixture(scope="module")
def study(demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("reference")
    database = folder / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", database)
    # the plain stratified estimator (the regression-adjusted default: test_adjusted_estimator.py)
    spec = dataclasses.replace(api.load(DEMO_SPEC), regression_adjustment=False)
    results = api.run(spec, database=str(database))
    with duckdb.connect(str(database), read_only=True) as con:
        rows = con.execute(
            "SELECT m.*, w.match__stratum AS stratum, w.match__weight AS weight FROM sqlmatch.annual_pass_measures m "
            "LEFT JOIN sqlmatch.annual_pass_weighted_units w USING (unit_key)"
        ).df()
    return spec, results, rows


def austin_smd(x1, x0, w1=None, w0=None, binary=False, scale=None):
    """Austin (2009, Stat Med 28:3083): pooled-SD standardized difference; weighted variances are the
    reliability-weight unbiased form, numpy.cov(aweights=...). `scale`: the denominator to use
    instead, after matching the pooled SD before matching (Stuart 2010, Stat Sci 25:1, recalled)."""
    m1, m0 = np.average(x1, weights=w1), np.average(x0, weights=w0)
    if binary:
        v1, v0 = m1 * (1 - m1), m0 * (1 - m0)
    else:
        v1 = float(np.cov(x1, aweights=w1)) if w1 is not None else np.var(x1, ddof=1)
        v0 = float(np.cov(x0, aweights=w0)) if w0 is not None else np.var(x0, ddof=1)
    sd = np.sqrt((v1 + v0) / 2) if scale is None else scale
    return (m1 - m0) / sd, v1 / v0


def pooled_sd(x1, x0, binary=False):
    if binary:
        p1, p0 = np.mean(x1), np.mean(x0)
        return np.sqrt((p1 * (1 - p1) + p0 * (1 - p0)) / 2)
    return np.sqrt((np.var(x1, ddof=1) + np.var(x0, ddof=1)) / 2)


def test_numeric_balance_equals_numpy(study):
    spec, results, rows = study
    matched = rows[rows.weight.notna()]
    for f in spec.numeric_features:
        b = next(b for b in results.balance if b.covariate == f.name)
        t, c = rows[rows.treated == 1][f.name], rows[rows.treated == 0][f.name]
        smd, vr = austin_smd(t.to_numpy(), c.to_numpy())
        assert b.smd_before == pytest.approx(smd, rel=1e-9, abs=1e-12)
        assert b.variance_ratio_before == pytest.approx(vr, rel=1e-9)
        mt, mc = matched[matched.treated == 1], matched[matched.treated == 0]
        before_sd = pooled_sd(t.to_numpy(), c.to_numpy())
        smd_w, vr_w = austin_smd(mt[f.name].to_numpy(), mc[f.name].to_numpy(), mt.weight.to_numpy(), mc.weight.to_numpy(), scale=before_sd)
        assert b.smd_after == pytest.approx(smd_w, rel=1e-9, abs=1e-12)
        assert b.variance_ratio_after == pytest.approx(vr_w, rel=1e-9)


def test_categorical_levels_use_the_binary_form(study):
    spec, results, rows = study
    matched = rows[rows.weight.notna()]
    for f in spec.categorical_features:
        for level in sorted(rows[f.name].dropna().unique()):
            b = next(b for b in results.balance if b.covariate == f"{f.name}={level}")
            ind = (rows[f.name] == level).astype(float)
            smd, _ = austin_smd(ind[rows.treated == 1].to_numpy(), ind[rows.treated == 0].to_numpy(), binary=True)
            assert b.smd_before == pytest.approx(smd, rel=1e-9, abs=1e-12)
            mi = (matched[f.name] == level).astype(float)
            smd_w, _ = austin_smd(
                mi[matched.treated == 1].to_numpy(),
                mi[matched.treated == 0].to_numpy(),
                matched.weight[matched.treated == 1].to_numpy(),
                matched.weight[matched.treated == 0].to_numpy(),
                binary=True,
                scale=pooled_sd(ind[rows.treated == 1].to_numpy(), ind[rows.treated == 0].to_numpy(), binary=True),
            )
            assert b.smd_after == pytest.approx(smd_w, rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("outcome", ["post_trips", "post_minutes", "active_last_month"])
def test_att_equals_statsmodels_wls(study, outcome):
    """Point estimate: WLS of outcome on treatment with the matching weights (statsmodels)."""
    _, results, rows = study
    matched = rows[rows.weight.notna()]
    X = sm.add_constant(matched.treated.astype(float))
    fit = sm.WLS(matched[outcome], X, weights=matched.weight).fit()
    assert results.effect(outcome).estimate == pytest.approx(fit.params["treated"], rel=1e-9)


@pytest.mark.parametrize("outcome", ["post_trips", "active_last_month"])
def test_stratified_variance_equals_a_row_level_computation(study, outcome):
    """Imbens & Rubin (2015, ch. 17): V = sum_s w_s^2 (s2_1s/n_1s + s2_0s/n_0s), recomputed with pandas
    from the rows (strata whose group has a single unit borrow the group's pooled variance)."""
    _, results, rows = study
    matched = rows[rows.weight.notna()]
    g = matched.groupby(["stratum", "treated"])[outcome].agg(["count", "mean", "var"]).unstack("treated")
    n1, n0 = g[("count", 1)], g[("count", 0)]
    pooled = {}
    for t in (0, 1):
        sub = g.xs(t, axis=1, level=1)
        ok = sub["count"] >= 2
        pooled[t] = ((sub["count"][ok] - 1) * sub["var"][ok]).sum() / (sub["count"][ok] - 1).sum()
    v1 = g[("var", 1)].where(n1 >= 2, pooled[1])
    v0 = g[("var", 0)].where(n0 >= 2, pooled[0])
    w = n1 / n1.sum()
    se = np.sqrt(np.sum(w**2 * (v1 / n1 + v0 / n0)))
    assert results.effect(outcome).std_error == pytest.approx(se, rel=1e-9)


def test_ratio_outcome_equals_weighted_sums(study):
    """Fare per trip: ratio of weighted sums per group (the matching weights), from the rows."""
    _, results, rows = study
    matched = rows[rows.weight.notna()]
    r = {}
    for t in (0, 1):
        g = matched[matched.treated == t]
        r[t] = (g.weight * g.fare_per_trip__num).sum() / (g.weight * g.fare_per_trip__den).sum()
    assert results.effect("fare_per_trip").estimate == pytest.approx(r[1] - r[0], rel=1e-9)


def test_naive_difference_equals_pandas(study):
    _, results, rows = study
    means = rows.groupby("treated").post_trips.mean()
    assert results.effect("post_trips").naive.estimate == pytest.approx(means[1] - means[0], rel=1e-9)


def test_matching_counts_equal_the_rows(study):
    _, results, rows = study
    m = results.matching
    assert m.n_treated == int((rows.treated == 1).sum())
    assert m.n_control == int((rows.treated == 0).sum())
    assert m.n_treated_matched == int(((rows.treated == 1) & rows.weight.notna()).sum())
    assert m.n_control_matched == int(((rows.treated == 0) & rows.weight.notna()).sum())
    # control weights sum to the number of matched controls (the normalisation of the weights)
    cw = rows[(rows.treated == 0) & rows.weight.notna()].weight.sum()
    assert cw == pytest.approx(m.n_control_matched, rel=1e-12)


def test_cem_weights_equal_the_published_formula(study):
    """Coarsened exact matching weights recomputed with pandas from the rows and the spec file's cut
    points (Iacus, King & Porro 2012, Political Analysis 20:1; the formula as recalled from memory:
    treated 1, control in stratum s (n_T,s / n_C,s) * (N_C / N_T), N over matched units); a cell
    without a treated or a control unit is dropped (weight NULL, kept in the table)."""
    import tomllib

    spec, _, rows = study
    raw = tomllib.loads(DEMO_SPEC.read_text())
    cuts = raw["matching"]["cut_points"]["pre_trips"]
    # bin k holds cut[k-1] <= x < cut[k]
    bins = np.searchsorted(cuts, rows.pre_trips, side="right")
    cell = pd.Series(bins, index=rows.index).astype(str) + "|" + rows.age_band.fillna("(missing)")
    counts = rows.groupby(cell).treated.agg(n_t="sum", n="count")
    counts["n_c"] = counts.n - counts.n_t
    kept = counts[(counts.n_t > 0) & (counts.n_c > 0)]
    big_n_t, big_n_c = kept.n_t.sum(), kept.n_c.sum()
    in_kept = cell.isin(kept.index)
    ratio = (kept.n_t / kept.n_c * big_n_c / big_n_t).reindex(cell).to_numpy()
    expected = pd.Series(np.where(rows.treated == 1, 1.0, ratio), index=rows.index).where(in_kept)
    assert (rows.weight.isna() == expected.isna()).all()
    assert 0 < int(expected.isna().sum())  # the demo drops some cells: both branches are exercised
    np.testing.assert_allclose(rows.weight[in_kept], expected[in_kept], rtol=1e-12)
    # one stratum per kept cell, and a unit's stratum is its cell's
    assert rows.stratum[in_kept].nunique() == len(kept)
    assert (rows[in_kept].groupby(cell[in_kept]).stratum.nunique() == 1).all()


def test_l1_imbalance_equals_pandas(study):
    """L1 = 1/2 sum |f - g| over the cells of a fixed histogram (Iacus, King & Porro 2011, JASA
    106:345): recomputed with pandas from the rows, unweighted before and weighted after."""
    spec, results, rows = study
    cells = []
    for name in spec.matching.on:
        feature = spec.feature(name)
        if feature.categorical:
            cells.append(rows[name].fillna("(missing)"))
        else:
            low, high = rows[name].min(), rows[name].max()
            width = (high - low) / 10
            cells.append(np.minimum(np.floor((rows[name] - low) / width), 9).astype(int))
    key = pd.Series(list(zip(*cells)), index=rows.index)
    weight = rows.weight.fillna(0.0)

    def l1(w):
        t = w[rows.treated == 1].groupby(key[rows.treated == 1]).sum() / w[rows.treated == 1].sum()
        c = w[rows.treated == 0].groupby(key[rows.treated == 0]).sum() / w[rows.treated == 0].sum()
        return 0.5 * t.sub(c, fill_value=0.0).abs().sum()

    assert results.imbalance["l1_before"] == pytest.approx(l1(pd.Series(1.0, index=rows.index)), rel=1e-9)
    assert results.imbalance["l1_after"] == pytest.approx(l1(weight), rel=1e-9)
    assert results.imbalance["l1_after"] < results.imbalance["l1_before"]
