"""Propensity score fitted in the warehouse by Newton-Raphson on aggregates, and subclassification
on it, checked against statsmodels, numpy and the NSW job-training data."""

from __future__ import annotations

import json
import shutil
import tomllib

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from sqlmatch.effects import study_results
from sqlmatch import api
from sqlmatch.cli import main
from sqlmatch.errors import DataError
from sqlmatch.propensity import load_model
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC
from nsw import DW_STRATIFICATION, EXPERIMENTAL_INTERVAL, load_nsw, nsw_spec


def demo_score_spec(folder, **matching) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(folder / "bikeshare.duckdb")
    raw["matching"] = {"method": "score_bins", **matching}
    # the Newton fit of a given design is what these tests check against statsmodels: terms as written
    raw["propensity"] = {"features": ["pre_trips", "pre_minutes", "pre_active_days", "age_band", "home_district"], "log1p": ["pre_trips", "pre_minutes"], "terms": "linear"}
    return raw


@pytest.fixture(scope="module")
def demo_scored(demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("scored")
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    spec_path = folder / "study.toml"
    spec = parse_spec(demo_score_spec(folder, bins=10), source_path=spec_path)
    results = api.run(spec)
    with duckdb.connect(str(folder / "bikeshare.duckdb"), read_only=True) as con:
        measures = con.execute("SELECT * FROM sqlmatch.annual_pass_measures").df()
        scores = con.execute("SELECT * FROM sqlmatch.annual_pass_scores").df()
        edges = con.execute("SELECT k, edge FROM sqlmatch.annual_pass_score_edges ORDER BY k").df()
    return spec, results, measures, scores, edges, load_model(spec)


def test_coefficients_equal_statsmodels_logit(demo_scored):
    """statsmodels Logit (Newton, on the rows) and sqlmatch (Newton, on aggregates) agree to 1e-6."""
    spec, _, m, _, _, model = demo_scored
    X = pd.DataFrame({"intercept": 1.0, "log1p_pre_trips": np.log1p(m.pre_trips), "log1p_pre_minutes": np.log1p(m.pre_minutes), "pre_active_days": m.pre_active_days})
    for feature in ("age_band", "home_district"):
        levels = sorted(m[feature].unique())
        for i, level in enumerate(levels[1:], start=1):
            X[f"{feature}__l{i}"] = (m[feature] == level).astype(float)
    fit = sm.Logit(m.treated.astype(float), X).fit(disp=0, tol=1e-12, maxiter=100)
    ours = dict(zip([c.name for c in model.columns], model.coefficients))
    assert list(ours) == list(X.columns)
    np.testing.assert_allclose([ours[c] for c in X.columns], fit.params.to_numpy(), rtol=1e-6, atol=1e-8)
    assert model.log_likelihood == pytest.approx(fit.llf, rel=1e-9)


def test_fit_on_grouped_units_equals_statsmodels_on_rows(demo_dir, tmp_path):
    """With count and category features only, the Newton steps sum over the distinct combinations
    of feature values (the propensity_cells table), not over the units: the coefficients still equal
    statsmodels Logit fitted on one row per unit (to 1e-6), and the grouped table has exactly as many
    rows as pandas finds distinct combinations among the units."""
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    raw = demo_score_spec(tmp_path, bins=5)
    raw["propensity"] = {"features": ["pre_trips", "age_band", "home_district"], "terms": "linear"}
    spec = parse_spec(raw, source_path=tmp_path / "study.toml")
    api.run(spec)
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb"), read_only=True) as con:
        m = con.execute("SELECT * FROM sqlmatch.annual_pass_measures").df()
        cells = con.execute("SELECT * FROM sqlmatch.annual_pass_score_cells").df()
    distinct = m[["pre_trips", "age_band", "home_district"]].drop_duplicates()
    assert len(cells) == len(distinct) < len(m) / 5
    assert cells.cell__units.sum() == len(m) and cells.cell__treated.sum() == m.treated.sum()
    X = pd.DataFrame({"intercept": 1.0, "pre_trips": m.pre_trips})
    for feature in ("age_band", "home_district"):
        for i, level in enumerate(sorted(m[feature].unique())[1:], start=1):
            X[f"{feature}__l{i}"] = (m[feature] == level).astype(float)
    fit = sm.Logit(m.treated.astype(float), X).fit(disp=0, tol=1e-12, maxiter=100)
    model = load_model(spec)
    assert [c.name for c in model.columns] == list(X.columns)
    np.testing.assert_allclose(model.coefficients, fit.params.to_numpy(), rtol=1e-6, atol=1e-8)
    assert model.log_likelihood == pytest.approx(fit.llf, rel=1e-9)
    assert model.n_units == len(m)


def test_scores_are_the_linear_predictor(demo_scored):
    _, _, m, scores, _, model = demo_scored
    merged = m.merge(scores, on=["unit_key", "treated"])
    b = dict(zip([c.name for c in model.columns], model.coefficients))
    eta = b["intercept"] + b["log1p_pre_trips"] * np.log1p(merged.pre_trips) + b["log1p_pre_minutes"] * np.log1p(merged.pre_minutes) + b["pre_active_days"] * merged.pre_active_days
    for feature in ("age_band", "home_district"):
        for i, level in enumerate(sorted(m[feature].unique())[1:], start=1):
            eta = eta + b[f"{feature}__l{i}"] * (merged[feature] == level)
    np.testing.assert_allclose(merged.score, eta, rtol=1e-9, atol=1e-9)


def test_subclass_boundaries_equal_numpy_quantiles(demo_scored):
    """Boundaries at k/K quantiles of the treated scores: numpy.quantile (linear interpolation)."""
    spec, _, _, scores, edges, _ = demo_scored
    K = spec.matching.bins
    expected = np.quantile(scores[scores.treated == 1].score, np.arange(1, K) / K)
    np.testing.assert_allclose(edges.edge, expected, rtol=1e-9, atol=1e-12)


def test_subclass_weights_recomputed_from_the_scores(demo_scored):
    """Each unit's subclass and weight recomputed with numpy / pandas from its score: common
    support [max of the groups' lowest scores, min of their highest] (common practice), subclass k
    holding scores in (edge_k, edge_k+1], then the stratum weights (treated 1, control
    (n_T,s / n_C,s) * (N_C / N_T); Iacus, King & Porro 2012, as recalled from memory); units outside
    the support or in a subclass without both groups have NULL weight."""
    spec, _, _, scores, edges, _ = demo_scored
    with duckdb.connect(str(spec.source_path.parent / "bikeshare.duckdb"), read_only=True) as con:
        weighted = con.execute("SELECT unit_key, match__weight FROM sqlmatch.annual_pass_weighted_units").df()
    s = scores.merge(weighted, on="unit_key", validate="one_to_one")
    low = max(s.score[s.treated == 1].min(), s.score[s.treated == 0].min())
    high = min(s.score[s.treated == 1].max(), s.score[s.treated == 0].max())
    inside = (s.score >= low) & (s.score <= high)
    subclass = pd.Series(np.searchsorted(edges.edge.to_numpy(), s.score, side="left"), index=s.index).where(inside)
    counts = s[inside].groupby(subclass[inside]).treated.agg(n_t="sum", n="count")
    counts["n_c"] = counts.n - counts.n_t
    kept = counts[(counts.n_t > 0) & (counts.n_c > 0)]
    ratio = (kept.n_t / kept.n_c * kept.n_c.sum() / kept.n_t.sum()).reindex(subclass).to_numpy()
    matched = subclass.isin(kept.index)
    expected = pd.Series(np.where(s.treated == 1, 1.0, ratio), index=s.index).where(matched)
    assert (s.match__weight.isna() == expected.isna()).all()
    np.testing.assert_allclose(s.match__weight[matched], expected[matched], rtol=1e-12)


def test_balance_after_subclassification(demo_scored):
    """|SMD| < 0.1 after matching for the features in the model (0.1: common practice, Austin 2009)."""
    _, results, *_ = demo_scored
    after = {b.covariate: b.smd_after for b in results.balance}
    for name in ("pre_trips", "pre_minutes", "pre_active_days"):
        assert abs(after[name]) < 0.1, (name, after[name])
    assert all(abs(v) < 0.1 for k, v in after.items() if k.startswith(("age_band=", "home_district=")))


def test_model_file_is_written_and_compile_bakes_it(demo_scored, tmp_path, capsys):
    spec, *_ = demo_scored
    path = spec.source_path.with_name("study.model.json")
    body = json.loads(path.read_text())
    assert [c["describes"] for c in body["coefficients"]][:3] == ["intercept", "log(1 + pre_trips)", "log(1 + pre_minutes)"]
    plan = api.compile_plan(spec, "postgres")
    assert plan.complete and "propensity_scores" in [s.name for s in plan.steps]
    path.rename(path.with_suffix(".bak"))
    try:
        partial = api.compile_plan(spec, "postgres")
        assert not partial.complete
        assert partial.steps[-1].name == "categorical_levels"
        assert "continues_after" in partial.manifest()
    finally:
        path.with_suffix(".bak").rename(path)


def test_separation_is_reported_with_the_feature(tmp_path):
    """A feature that is 1 exactly for enrolled units separates the groups: a clear error names it."""
    db = tmp_path / "nsw.duckdb"
    load_nsw(str(db))
    with duckdb.connect(str(db)) as con:
        con.execute("ALTER TABLE men ADD COLUMN badge DOUBLE")
        con.execute("UPDATE men SET badge = CASE WHEN enrolled_on IS NULL THEN 0 ELSE 1 END")
    raw = nsw_spec(str(db), "score_bins")
    raw["features"].append({"name": "badge", "aggregate": "attribute", "attribute": "badge"})
    with pytest.raises(DataError) as info:
        api.run(parse_spec(raw))
    assert "badge" in str(info.value)
    with duckdb.connect(str(db), read_only=True) as con:
        assert con.execute("SELECT COUNT(*) FROM information_schema.tables WHERE table_schema = 'sqlmatch'").fetchone()[0] == 0


@pytest.fixture(scope="module")
def nsw_db(tmp_path_factory):
    db = tmp_path_factory.mktemp("nsw") / "nsw.duckdb"
    load_nsw(str(db))
    return str(db)


def test_nsw_logit_equals_statsmodels(nsw_db):
    """Dehejia & Wahba's CPS specification (squares, zero-earnings dummies, an interaction):
    coefficients equal statsmodels Logit on the same rows."""
    spec = parse_spec(nsw_spec(nsw_db, "score_bins", bins=10))
    from sqlmatch.engines.duckdb import DuckDBEngine
    from sqlmatch.plan import build_plan
    from sqlmatch.runner import run_plan

    with DuckDBEngine(nsw_db) as engine:
        out = run_plan(build_plan(spec, "duckdb"), spec, engine)
        rows = engine.con.execute("SELECT * FROM sqlmatch.nsw_measures").df()
    names = [c.name for c in out.model.columns][1:]
    fit = sm.Logit(rows.treated.astype(float), sm.add_constant(rows[names])).fit(disp=0, tol=1e-12, maxiter=200)
    np.testing.assert_allclose(out.model.coefficients, fit.params.to_numpy(), rtol=1e-6)


@pytest.mark.parametrize("bins", [5, 10, 20])
def test_nsw_att_inside_the_experimental_interval(nsw_db, bins):
    """NSW treated vs CPS comparison men (Dehejia & Wahba 1999, Table 3): the subclassification ATT
    on 1978 earnings lies inside the experimental 95% interval [479, 3110]; the naive difference
    (-8,498) does not. Reported beside DW's CPS-1 stratification estimate 1,713 (SE 1,115)."""
    results = api.run(parse_spec(nsw_spec(nsw_db, "score_bins", bins=bins)))
    effect = results.effect("earnings_after")
    low, high = EXPERIMENTAL_INTERVAL
    assert low <= effect.estimate <= high, (effect.estimate, DW_STRATIFICATION)
    assert effect.ci_low < high and effect.ci_high > low  # the intervals overlap
    assert not low <= effect.naive.estimate <= high
    assert effect.naive.estimate == pytest.approx(-8498, abs=1)


def test_method_override_on_the_command_line(demo_dir, tmp_path, capsys):
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    shutil.copyfile(DEMO_SPEC, tmp_path / "annual_pass.toml")
    code = main(["run", str(tmp_path / "annual_pass.toml"), "--out", str(tmp_path / "out"), "--method", "score_bins", "--quiet"])
    assert code == 0
    results = json.loads((tmp_path / "out" / "results.json").read_text())
    assert results["matching"]["method"] == "score_bins"
    assert (tmp_path / "annual_pass.model.json").exists()


def test_fit_on_a_sample_of_controls_with_the_intercept_corrected(demo_dir, tmp_path):
    """All treated and a hashed 30% of controls: slopes equal statsmodels Logit on exactly those rows,
    and the intercept is the sample's plus log(0.3) (prior correction, King & Zeng 2001)."""
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    raw = demo_score_spec(tmp_path, bins=5)
    raw["propensity"] = {"features": ["pre_trips", "pre_active_days"], "sample_controls": 0.3, "terms": "linear"}
    spec = parse_spec(raw, source_path=tmp_path / "study.toml")
    api.run(spec)
    model = load_model(spec)
    assert model.sampled_controls == 0.3
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb"), read_only=True) as con:
        m = con.execute("SELECT * FROM sqlmatch.annual_pass_measures").df()
    key = m.unit_key.astype("int64")
    sampled = (m.treated == 1) | ((((key.abs() % 4294967296) * 40503 + 12345) % 4294967296 % 10000) < 3000)
    rows = m[sampled]
    assert 0.25 < (rows.treated == 0).sum() / (m.treated == 0).sum() < 0.35
    fit = sm.Logit(rows.treated.astype(float), sm.add_constant(rows[["pre_trips", "pre_active_days"]])).fit(disp=0, tol=1e-12)
    np.testing.assert_allclose(model.coefficients[1:], fit.params.to_numpy()[1:], rtol=1e-6)
    assert model.coefficients[0] == pytest.approx(fit.params["const"] + np.log(0.3), rel=1e-6)
    full = sm.Logit(m.treated.astype(float), sm.add_constant(m[["pre_trips", "pre_active_days"]])).fit(disp=0)
    assert model.coefficients[0] == pytest.approx(full.params["const"], abs=0.15)  # close to the fit on every unit


def test_rows_fetched_for_subclassification_does_not_grow_with_the_data(tmp_path):
    """Ten times the riders: the same rows reach Python (levels, Newton steps, strata, bins). The
    terms are fixed here: with `terms = "stepwise"` the rounds of the search depend on which terms the
    data support (at most one per candidate, a number set by the spec's features, not by the rows)."""
    from sqlmatch.demo_run import build_demo

    fetched = []
    for riders in (3_000, 30_000):
        spec_path = build_demo(tmp_path / str(riders), riders=riders, seed=7)
        raw = tomllib.loads(spec_path.read_text())
        raw["matching"] = {"method": "score_bins", "bins": 10}
        raw["propensity"] = {"terms": "linear"}
        results = api.run(parse_spec(raw, source_path=spec_path), keep_tables=False)
        fetched.append(results.rows_fetched)
    assert fetched[0] == fetched[1]


def _design(m: pd.DataFrame, columns) -> np.ndarray:
    """The model's design matrix from the unit rows, written out with numpy (not sqlmatch's SQL)."""
    out = []
    for c in columns:
        if c.kind == "intercept":
            out.append(np.ones(len(m)))
        elif c.kind == "numeric":
            out.append(m[c.feature].to_numpy(dtype=float))
        elif c.kind == "log1p":
            out.append(np.log1p(np.maximum(m[c.feature].to_numpy(dtype=float), 0.0)))
        else:
            out.append((m[c.feature].fillna("(missing)") == c.level).to_numpy(dtype=float))
    return np.column_stack(out)


def test_a_stored_model_on_changed_data_is_flagged(demo_dir, tmp_path):
    """`sqlmatch run` fits the model and writes its file; a plan compiled with that file (the path a
    scheduler takes) applies the stored coefficients. On the same data nothing is said. After some
    controls leave the units table the results say the model was fitted on other units, and the
    score statistic equals g' H^-1 g computed with numpy from the unit rows at the stored
    coefficients (Rao 1948, as recalled from memory)."""
    from sqlmatch.engines.duckdb import DuckDBEngine
    from sqlmatch.plan import build_plan
    from sqlmatch.propensity import check_model
    from sqlmatch.runner import run_plan

    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    spec = parse_spec(demo_score_spec(tmp_path, bins=5), source_path=tmp_path / "study.toml")
    fitted = api.run(spec)
    assert not any("propensity model" in w for w in fitted.warnings)
    model = load_model(spec)

    def baked_run():
        with DuckDBEngine(str(tmp_path / "bikeshare.duckdb")) as engine:
            output = run_plan(build_plan(spec, "duckdb", model=model), spec, engine)
        assert output.model is None  # nothing refitted: the stored coefficients were applied
        return output, study_results(spec, output.plan, output)

    same, results = baked_run()
    assert not any("propensity model" in w for w in results.warnings)
    assert check_model(same.results["propensity_check"].one(), model).score_statistic < 1e-6

    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        con.execute("DELETE FROM riders WHERE pass_bought_on IS NULL AND rider_id % 5 = 0")
    output, results = baked_run()
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb"), read_only=True) as con:
        m = con.execute("SELECT * FROM sqlmatch.annual_pass_measures").df()
    assert len(m) < model.n_units - 100
    (warning,) = [w for w in results.warnings if "propensity model" in w]
    assert f"on {model.n_units:,} units" in warning and f"to {len(m):,} units" in warning

    check = check_model(output.results["propensity_check"].one(), model)
    X = _design(m, model.columns)
    p = 1.0 / (1.0 + np.exp(-(X @ np.asarray(model.coefficients))))
    g = X.T @ (m.treated.to_numpy(dtype=float) - p)
    H = (X * (p * (1 - p))[:, None]).T @ X
    expected = float(g @ np.linalg.solve(H, g))
    assert check.n_units_now == len(m)
    assert check.score_statistic == pytest.approx(expected, rel=1e-6)
    assert expected > 1.0 and check.df == len(model.columns)


def test_a_stored_model_whose_coefficients_no_longer_fit_is_flagged(demo_dir, tmp_path):
    """Same units, changed features: the pre-window trips of a third of the enrolled units are removed,
    so the unit count matches the model file but the stored coefficients are far from the best fit
    (the score statistic's p-value far below 0.001): the results say so."""
    from sqlmatch.engines.duckdb import DuckDBEngine
    from sqlmatch.plan import build_plan
    from sqlmatch.runner import run_plan

    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    spec = parse_spec(demo_score_spec(tmp_path, bins=5), source_path=tmp_path / "study.toml")
    api.run(spec)
    model = load_model(spec)
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        con.execute(
            "DELETE FROM trips WHERE started_at < TIMESTAMP '2026-03-01' AND rider_id % 3 = 0 AND rider_id IN "
            "(SELECT rider_id FROM riders WHERE pass_bought_on >= DATE '2026-03-01' AND pass_bought_on < DATE '2026-04-01')"
        )
    with DuckDBEngine(str(tmp_path / "bikeshare.duckdb")) as engine:
        output = run_plan(build_plan(spec, "duckdb", model=model), spec, engine)
    results = study_results(spec, output.plan, output)
    (warning,) = [w for w in results.warnings if "propensity model" in w]
    assert "as many units as this run has" in warning and "no longer fit" in warning
