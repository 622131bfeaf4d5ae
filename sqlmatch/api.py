"""The Python API the command line mirrors: load, compile, run, report.

    >>> from sqlmatch import api
    >>> spec = api.load("study.toml")                     # doctest: +SKIP
    >>> plan = api.compile_plan(spec, "postgres")          # doctest: +SKIP
    >>> results = api.run(spec, database="warehouse.duckdb")  # doctest: +SKIP
    >>> print(results.effect("post_trips").estimate)       # doctest: +SKIP
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from sqlmatch import aggregates
from sqlmatch.engines.base import Engine
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.errors import SpecError, SqlmatchError
from sqlmatch.estimate.att import normal_interval, relative_lift, stratified_att
from sqlmatch.estimate.binary import risk_ratio
from sqlmatch.estimate.ratio import ratio_effect
from sqlmatch.estimate.regression import wls_from_moments
from sqlmatch.plan import L1_BINS, Plan, build_plan
from sqlmatch.results import Effect, MatchingSummary, StudyResults
from sqlmatch.runner import Progress, RunOutput, run_plan
from sqlmatch.sensitivity import e_value, e_value_continuous, plain_words, robustness_value, rosenbaum_from_signed_rank
from sqlmatch.spec import Spec, load_spec

load = load_spec


def compile_plan(spec: Spec, dialect: str = "duckdb") -> Plan:
    """The study's SQL for `dialect`. A score-based method bakes the fitted model kept beside the
    spec (<spec>.model.json) into pure SQL; without one the plan stops where the model is fitted."""
    from sqlmatch.matching import method_for
    from sqlmatch.propensity import load_model

    model = load_model(spec) if method_for(spec.matching.method).NEEDS_SCORE else None
    return build_plan(spec, dialect, model=model)


def write_plan(plan: Plan, out_dir: str | Path) -> list[Path]:
    """Write the numbered .sql files and manifest.json; stale step files are removed."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    files = plan.files()
    for old in out.glob("[0-9][0-9]_*.sql"):
        if old.name not in files:
            old.unlink()
    written = []
    for name, text in files.items():
        path = out / name
        path.write_text(text, encoding="utf-8")
        written.append(path)
    return written


def check_plan(plan: Plan, folder: str | Path) -> str:
    """Unified diff between the SQL committed in `folder` and `plan`; empty when they agree."""
    import difflib

    folder = Path(folder)
    expected = plan.files()
    present = {p.name for p in folder.glob("[0-9][0-9]_*.sql")} | ({"manifest.json"} if (folder / "manifest.json").exists() else set())
    chunks = []
    for name in sorted(set(expected) | present):
        old = (folder / name).read_text(encoding="utf-8").splitlines(keepends=True) if name in present else []
        new = expected[name].splitlines(keepends=True) if name in expected else []
        chunks += difflib.unified_diff(old, new, fromfile=f"{folder}/{name}", tofile=f"compiled/{name}")
    return "".join(chunks)


def open_engine(spec: Spec, database: str | None = None, engine_url: str | None = None) -> Engine:
    """The engine for a run: the one `engine_url` names (see sqlmatch.engines.open_engine_url; it
    wins over `database`), else DuckDB on the file given on the command line or in the spec."""
    if engine_url is not None:
        from sqlmatch.engines import open_engine_url

        return open_engine_url(engine_url)
    if database is None and spec.database is not None:
        base = spec.source_path.parent if spec.source_path else Path.cwd()
        database = str((base / spec.database).resolve())
    if database is None:
        raise SpecError("study.database", "no database to run on.", "set database = \"file.duckdb\" under [study] or pass --database.")
    if database != ":memory:" and not Path(database).exists():
        raise SpecError("study.database", f"DuckDB file {database!r} does not exist.", "check the path (relative paths are read from the spec's folder).")
    return DuckDBEngine(database)


def connect(connection, dialect: str) -> Engine:
    """An engine over an open DB-API 2.0 connection: `api.run(spec, engine=api.connect(conn, "snowflake"))`."""
    from sqlmatch.engines.dbapi import DBAPIEngine

    return DBAPIEngine(connection, dialect)


def open_url_or_database(engine_url: str | None, database: str | None) -> Engine:
    """An engine without a spec (for `init`): a URL, or a DuckDB file that must exist."""
    if engine_url is not None:
        from sqlmatch.engines import open_engine_url

        return open_engine_url(engine_url)
    if database is None or not Path(database).exists():
        raise SqlmatchError(f"--database: DuckDB file {database!r} does not exist. Fix: pass --database FILE or --engine URL.")
    return DuckDBEngine(database)


def run(
    spec: Spec,
    engine: Engine | None = None,
    database: str | None = None,
    progress: Progress | None = None,
    engine_url: str | None = None,
    keep_tables: bool = True,
) -> StudyResults:
    """Run the study in the warehouse and estimate from the aggregates it returns.

    The study's work tables stay for inspection unless keep_tables is False (the command line
    drops them unless --keep); `cleanup` drops them later."""
    own = engine is None
    engine = engine or open_engine(spec, database, engine_url)
    try:
        output = run_plan(build_plan(spec, engine.dialect), spec, engine, progress=progress, keep_tables=keep_tables)
        results = estimate(spec, output.plan, output)
        if spec.results_table:
            from sqlmatch.history import record

            results.run_id = record(spec, results, engine)
    finally:
        if own:
            engine.close()
    if output.model is not None and spec.source_path is not None:
        from sqlmatch.propensity import model_path

        output.model.save(model_path(spec))
    return results


def cleanup(spec: Spec, engine: Engine | None = None, database: str | None = None, engine_url: str | None = None) -> list[str]:
    """Drop every table this study writes (and half-built leftovers); returns their names."""
    from sqlmatch.runner import drop_stray_tables, drop_work_tables

    own = engine is None
    engine = engine or open_engine(spec, database, engine_url)
    try:
        # Under the study's lock: cleanup must not drop the tables of a run still going.
        with engine.study_lock(spec.work_schema, spec.name):
            present = set(engine.table_names(spec.work_schema))
            plan = build_plan(spec, engine.dialect, model=_stand_in_model(spec))
            dropped = [t for t in plan.work_tables if t.split(".", 1)[1] in present]
            dropped += [f"{spec.work_schema}.{n}" for n in drop_stray_tables(spec, engine)]
            drop_work_tables(plan, engine)
    finally:
        if own:
            engine.close()
    return dropped


def _stand_in_model(spec: Spec):
    """Table names do not depend on coefficients: a placeholder model lets a score-based plan
    list every table it writes."""
    from sqlmatch.matching import method_for
    from sqlmatch.propensity import DesignColumn, FittedModel

    if not method_for(spec.matching.method).NEEDS_SCORE:
        return None
    return FittedModel([DesignColumn("intercept", "intercept")], [0.0], 0, 0.0, 0, "-", {})


def estimate(spec: Spec, plan: Plan, output: RunOutput) -> StudyResults:
    """Balance and effects from the aggregates of one run (pure: no database)."""
    r = output.results
    summary = r["matching_summary"].one()
    # Units per group left in the study (after units with a NULL attribute under missing = "drop")
    sizes = {int(g["treated"]): int(g["n_units"]) - int(g.get("n_dropped") or 0) for g in r["group_sizes"].records()}
    in_cells_t, in_cells_c = int(summary["n_treated"] or 0), int(summary["n_control"] or 0)
    matching = MatchingSummary(
        method=spec.matching.method,
        n_treated=sizes.get(1, 0),
        n_treated_matched=int(summary["n_treated_matched"] or 0),
        n_control=sizes.get(0, 0),
        n_control_matched=int(summary["n_control_matched"] or 0),
        strata=int(summary["n_strata"]),
        strata_dropped=int(summary["n_cells_dropped"]),
        n_treated_outside_support=sizes.get(1, 0) - in_cells_t,
        n_control_outside_support=sizes.get(0, 0) - in_cells_c,
    )
    balance = aggregates.numeric_balance(r["balance_numeric"], [f.name for f in spec.numeric_features])
    if "balance_levels" in r:
        balance += aggregates.level_balance(r["balance_levels"])
    numeric = [f.name for f in spec.numeric_features]
    effects = [
        _effect(o, r["outcome_strata"], r["outcome_unmatched"], r.get("outcome_regression"), numeric, spec.matching.method, r.get("pair_signed_rank"))
        for o in plan.outcomes
    ]
    l1 = r["imbalance_l1"].one()
    imbalance = {
        "l1_before": float(l1["l1_before"]),
        "l1_after": float(l1["l1_after"]),
        "histogram": f"{L1_BINS} equal-width bins per numeric matching feature x categorical levels ({int(l1['n_cells'])} cells)",
    }
    w = spec.windows
    return StudyResults(
        study=spec.name,
        cohort=spec.cohort,
        dialect=plan.dialect,
        windows={
            "unit": w.unit,
            "pre": [w.pre_start.isoformat(), w.cohort_start.isoformat()],
            "cohort": [w.cohort_start.isoformat(), w.cohort_end.isoformat()],
            "post": [w.post_start.isoformat(), w.post_end.isoformat()],
        },
        matching=matching,
        balance=balance,
        effects=effects,
        rows_fetched=output.rows_fetched,
        min_cell_size=spec.min_cell_size,
        imbalance=imbalance,
        histograms=_histograms(r),
        warnings=_warnings(spec, r, balance) + _model_warnings(spec, r, output.model),
        timings=output.timings,
    )


def _model_warnings(spec: Spec, r, fitted) -> list[str]:
    """A propensity model read from its file (baked into compiled SQL, perhaps long ago) may no
    longer describe the units it scores: say so, from the propensity_check aggregates."""
    if "propensity_check" not in r:
        return []
    from sqlmatch.propensity import check_model, load_model, model_path

    model = fitted if fitted is not None else load_model(spec)
    if model is None:
        return []
    c = check_model(r["propensity_check"].one(), model)
    where = model_path(spec).name if spec.source_path is not None else "the model file"
    if c is None:
        return [
            f"The SQL that ran applied other propensity coefficients than {where} now holds: the model file was "
            "rewritten after that SQL was compiled, so the scores came from the earlier fit. Compile again and let the "
            "scheduler run the new files."
        ]
    refit = (
        f"The scores use that fit's coefficients. Unless the change is small, refit: `sqlmatch run` fits the model "
        f"again and rewrites {where}; then compile again for the scheduler."
    )
    test = (
        f" (Rao's score test of those coefficients on this run's units: chi-square {c.score_statistic:.1f} on {c.df} df, p = {c.p_value:.2g})"
        if c.score_statistic is not None
        else ""
    )
    if c.n_units_now != c.n_units_fitted:
        return [
            f"The propensity model in {where} was fitted on {model.fitted_on} on {_small_count(c.n_units_fitted, spec.min_cell_size)} units; "
            f"this run applies it to {_small_count(c.n_units_now, spec.min_cell_size)} units, so the data changed since the fit{test}. " + refit
        ]
    if c.p_value is not None and c.p_value < 0.001:
        return [
            f"The propensity model in {where} was fitted on {model.fitted_on} on as many units as this run has, but its "
            f"coefficients no longer fit them{test}: the data changed since the fit. " + refit
        ]
    return []


def _warnings(spec: Spec, r, balance) -> list[str]:
    """Plain-words warnings from the aggregates: windows the events do not cover, features that
    carry no information."""
    import datetime as dt

    out = []
    w = spec.windows
    if "data_coverage" in r:
        c = r["data_coverage"].one()
        last, first = c["last_event_at"], c["first_event_at"]
        if last is not None and _as_date(last) < w.post_end - dt.timedelta(days=7):
            out.append(
                f"The events end on {_as_date(last)}, more than a week before the post window ends ({w.post_end}): "
                "if the data is still arriving, the outcomes are cut short for everyone. Wait for the data or use a shorter post window."
            )
        if first is not None and _as_date(first) > w.pre_start + dt.timedelta(days=7):
            out.append(
                f"The events start on {_as_date(first)}, more than a week after the pre window starts ({w.pre_start}): "
                "pre-window features may be incomplete."
            )
        if c["n_units"] and c["n_units_without_events"] / c["n_units"] > 0.5:
            out.append(f"{c['n_units_without_events'] / c['n_units']:.0%} of the units have no event in either window.")
    if spec.matching.method == "nearest" and spec.matching.replacement and "matching_summary" in r:
        m = r["matching_summary"].one()
        out.append(
            f"Nearest-neighbour matching with replacement used {int(m['n_control_matched'] or 0):,} distinct controls for "
            f"{int(m['n_treated_matched'] or 0):,} matched enrolled units. The standard errors treat a reused control as if it "
            "were a new one, so they are too small when controls are reused often (Abadie & Imbens 2006 give a variance "
            "that accounts for reuse); read the intervals as too narrow, or match without replacement."
        )
    out += _missing_warnings(spec, r)
    if "data_coverage" in r and "n_events_unknown" in r["data_coverage"].columns:
        u = r["data_coverage"].one()
        events, units = int(u["n_events_unknown"] or 0), int(u["n_units_unknown"] or 0)
        if events:
            n_units = _small_count(units, spec.min_cell_size)
            out.append(
                f"{events:,} events in the windows belong to {n_units} units that are not in {spec.units.display!r}: "
                "they are left out of every feature and outcome. If that is more than a few, check that events.unit_key "
                "and units.key name the same thing, and that the units table is complete."
            )
    for b in balance:
        if b.kind != "level" and b.mean_treated_before is None and b.mean_control_before is None:
            out.append(f"Feature {b.covariate!r} is NULL for every unit: it carries no information. Fix its definition or drop it.")
        elif b.kind != "level" and b.smd_before == 0.0 and b.variance_ratio_before is None:
            out.append(f"Feature {b.covariate!r} has the same value for every unit: it carries no information and can be dropped.")
    return out


def _small_count(n: int, min_cell: int) -> str:
    """A count for a warning: one under the minimum cell size could single out a few people."""
    return f"fewer than {min_cell}" if 0 < n < min_cell else f"{n:,}"


def _missing_warnings(spec: Spec, r) -> list[str]:
    """What each attribute's `missing` policy did, in counts (a count under the minimum cell size
    is not printed: it could single out a few people)."""
    if "group_sizes" not in r or not spec.attribute_features:
        return []
    groups = {int(g["treated"]): g for g in r["group_sizes"].records()}

    def count(n: int) -> str:
        return _small_count(n, spec.min_cell_size)

    out = []
    for f in spec.attribute_features:
        t, c = (int(groups.get(g, {}).get(f"{f.name}__null") or 0) for g in (1, 0))
        if not t + c:
            continue
        who = f"{count(t + c)} units ({count(t)} treated, {count(c)} control) have no value for {f.name!r}"
        if f.missing == "fill":
            out.append(f"{who}: filled with {f.fill:g} and flagged in the feature {f.indicator!r} ({f.key}.missing = \"fill\").")
        elif f.missing == "drop":
            out.append(f"{who}: they were left out of the study ({f.key}.missing = \"drop\"); the effect is for units with a value.")
        elif f.missing == "level":
            out.append(f"{who}: they form a level of their own, '(missing)' ({f.key}.missing = \"level\").")
    return out


def _as_date(value):
    import datetime as dt

    return value if isinstance(value, dt.date) and not isinstance(value, dt.datetime) else dt.date.fromisoformat(str(value)[:10])


def _histograms(r) -> dict:
    """feature name (or "propensity score") -> bins with low edge, width, group, count and weight."""
    out: dict[str, list[dict]] = {}
    if "feature_histograms" in r:
        for row in r["feature_histograms"].records():
            if row["low"] is not None:  # a feature NULL for every unit has no distribution to draw
                out.setdefault(row["feature"], []).append(_bin(row))
    if "score_histogram" in r:
        out["propensity score (logit)"] = [_bin(row) for row in r["score_histogram"].records() if row["low"] is not None]
    return out


def _bin(row: dict) -> dict:
    low, width, b = float(row["low"]), float(row["width"] or 0.0), int(row["bin"])
    return {
        "low": low + b * width,
        "high": low + (b + 1) * width,
        "treated": int(row["treated"]),
        "n_units": int(row["n_units"]),
        "sum_w": float(row["sum_w"] or 0.0),
    }


def _effect(outcome, matched, unmatched, regression=None, features=(), method: str = "", pair_ranks=None) -> Effect:
    """One outcome's effect, relative lift, risk ratio (binary), difference-in-differences (an
    outcome with a pre-window twin) and sensitivity figures, all from aggregates."""
    rr = None
    extra: dict = {}
    if outcome.kind == "ratio":
        m = ratio_effect(*aggregates.ratio_sums(matched, outcome.name), singleton="pool")
        n = ratio_effect(*aggregates.ratio_sums(unmatched, outcome.name), singleton="pool")
        t_sums, c_sums = aggregates.ratio_sums(matched, outcome.name)
        fields = dict(
            estimator="ratio of weighted sums, delta-method variance",
            estimate=m.estimate,
            std_error=m.std_error,
            ci_low=m.ci_low,
            ci_high=m.ci_high,
            n_treated=int(t_sums.n.sum()),
            n_control=int(c_sums.n.sum()),
            mean_treated=m.treated.estimate,
            mean_control=m.control.estimate,
        )
        # Lift R_1 / R_0 - 1, interval on the log scale (estimate/ratio.py).
        extra.update(lift=m.lift, lift_std_error=m.lift_std_error, lift_ci_low=m.lift_ci_low, lift_ci_high=m.lift_ci_high)
    else:
        t_mom, c_mom = aggregates.outcome_moments(matched, outcome.name)
        m = stratified_att(t_mom, c_mom)
        n = stratified_att(*aggregates.outcome_moments(unmatched, outcome.name))
        fields = dict(
            estimator="stratified difference in means" + (" (risk difference)" if outcome.kind == "binary" else ""),
            estimate=m.estimate,
            std_error=m.std_error,
            ci_low=m.ci_low,
            ci_high=m.ci_high,
            n_treated=m.n_treated,
            n_control=m.n_control,
            mean_treated=m.mean_treated,
            mean_control=m.mean_control,
        )
        if pair_ranks is not None and f"{outcome.name}__sum_d" in pair_ranks.columns:
            # 1:1 pairs: the paired-difference t interval (the pairs are not independent samples)
            from sqlmatch.estimate.pairs import paired_difference

            row = pair_ranks.one()
            pd_ = paired_difference(int(row["n_pairs"]), float(row[f"{outcome.name}__sum_d"]), float(row[f"{outcome.name}__sum_d2"]))
            fields.update(
                estimator="mean within-pair difference, paired t interval" + (" (risk difference)" if outcome.kind == "binary" else ""),
                estimate=pd_.estimate,
                std_error=pd_.std_error,
                ci_low=pd_.ci_low,
                ci_high=pd_.ci_high,
            )
        if outcome.kind == "binary":
            # Events per stratum and group are the sums of the 0/1 outcome; ATT stratum weights
            # n_1s / n_1 over the strata holding both groups (estimate/binary.py).
            keep = (t_mom.n > 0) & (c_mom.n > 0)
            rr = risk_ratio(t_mom.total[keep], t_mom.n[keep], c_mom.total[keep], c_mom.n[keep])
            extra.update(
                risk_ratio=rr.estimate,
                risk_ratio_ci_low=rr.ci_low,
                risk_ratio_ci_high=rr.ci_high,
                lift=rr.lift,
                lift_std_error=rr.std_error,
                lift_ci_low=rr.lift_ci_low,
                lift_ci_high=rr.lift_ci_high,
            )
        else:
            lift = relative_lift(m.mean_treated, m.var_mean_treated, m.mean_control, m.var_mean_control)
            extra.update(lift=lift.estimate, lift_std_error=lift.std_error, lift_ci_low=lift.ci_low, lift_ci_high=lift.ci_high)
        if getattr(outcome, "twin", None):
            # Difference-in-differences on the matched sample: the same stratified estimator
            # applied to (outcome - twin), per-stratum sums from the outcome_strata query.
            did = stratified_att(*aggregates.outcome_moments(matched, outcome.name, "did"))
            extra.update(did_twin=outcome.twin, did_estimate=did.estimate, did_std_error=did.std_error, did_ci_low=did.ci_low, did_ci_high=did.ci_high)
    sensitivity = _sensitivity(outcome, fields, rr, regression, list(features), method, pair_ranks)
    return Effect(
        outcome=outcome.name,
        kind=outcome.kind,
        **fields,
        naive_estimate=n.estimate,
        naive_std_error=n.std_error,
        naive_ci_low=n.ci_low,
        naive_ci_high=n.ci_high,
        **{k: _finite(v) for k, v in extra.items()},
        sensitivity=sensitivity,
    )


TREATMENT_WORDS = "enrolment"


def _finite(x):
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def _sensitivity(outcome, fields: dict, rr, regression, features: list[str], method: str, pair_ranks) -> dict:
    """E-value, robustness value and (when the method gives 1:1 pairs) Rosenbaum bounds."""
    out: dict = {}
    words: list[str] = []
    reg = fit = None
    rv_reason = None
    if regression is None:
        rv_reason = "the run has no outcome_regression step"
    else:
        try:
            reg = aggregates.regression_sums(regression, outcome.name, outcome.kind, features)
            fit = wls_from_moments(reg.xtx, reg.xty, reg.yty, reg.n, reg.names)
        except (ValueError, KeyError, np.linalg.LinAlgError) as err:
            rv_reason = f"the weighted regression could not be fitted ({err})"
            reg = reg if reg is not None and reg.n > 0 else None

    # E-value (VanderWeele & Ding 2017). Binary outcomes: the risk ratio and its interval.
    # Continuous and ratio outcomes: RR ~= exp(0.91 d), d = effect / SD, where SD is the pooled
    # SD sqrt((s2_1 + s2_0) / 2) of the outcome among the matched units, each group's variance
    # weighted by the matching weights (reliability-weight form, as in the balance table; ratio
    # outcomes: each unit's own ratio, weighted by matching weight x denominator).
    ev = None
    sd = None
    if outcome.kind == "binary":
        if rr is not None and all(math.isfinite(x) and x > 0 for x in (rr.estimate, rr.ci_low, rr.ci_high)):
            ev = e_value(rr.estimate, rr.ci_low, rr.ci_high)
            out["e_value_basis"] = "risk ratio"
    elif reg is not None:
        v1, v0 = reg.treated.variance, reg.control.variance
        sd = math.sqrt((v1 + v0) / 2.0) if math.isfinite(v1 + v0) else math.nan
        se = fields["std_error"]
        if sd > 0 and se is not None and math.isfinite(se):
            ev = e_value_continuous(fields["estimate"], se, sd)
            out["e_value_basis"] = "RR ~= exp(0.91 d), d = effect / pooled SD of the outcome in the matched sample"
    out["e_value"] = ev.point if ev else None
    out["e_value_ci"] = ev.ci if ev else None
    out["e_value_rr"] = ev.rr if ev else None
    out["e_value_sd"] = sd if ev and sd is not None else None
    if ev:
        words.append(plain_words(ev, treatment=TREATMENT_WORDS, outcome=outcome.name))

    # Robustness value (Cinelli & Hazlett 2020) of the treatment coefficient of the weighted
    # regression of the outcome on treatment and the numeric features (matched units, matching
    # weights as analytic weights); categorical features are not in that regression.
    rv = None
    if fit is not None and "treated" in fit.names and math.isfinite(fit.t("treated")) and fit.df > 1:
        rv = robustness_value(fit.t("treated"), fit.df)
    elif fit is not None and rv_reason is None:
        rv_reason = "the treatment coefficient of the weighted regression is not estimable"
    out["robustness_value"] = rv.rv_q if rv else None
    out["robustness_value_alpha"] = rv.rv_q_alpha if rv else None
    out["partial_r2"] = rv.partial_r2 if rv else None
    out["t_statistic"] = rv.t_stat if rv else None
    out["df"] = int(fit.df) if rv else None
    out["regression_estimate"] = fit.coef("treated") if rv else None
    out["regression_std_error"] = fit.se("treated") if rv else None
    out["regression_units"] = int(fit.n) if rv else None
    out["adjusted_for"] = [f for f in fit.names if f not in ("intercept", "treated")] if rv else []
    if rv:
        words.append(plain_words(rv, treatment=TREATMENT_WORDS, outcome=outcome.name))
    else:
        out["robustness_reason"] = rv_reason

    # Rosenbaum bounds need 1:1 matched pairs and their signed-rank aggregates (a `pair_signed_rank`
    # query with <outcome>__t_plus, __n_nonzero, __tie_term); stratum-based methods have none.
    scan = None
    if pair_ranks is not None and f"{outcome.name}__t_plus" in pair_ranks.columns:
        row = pair_ranks.one()
        n_nonzero = int(row[f"{outcome.name}__n_nonzero"] or 0)
        if n_nonzero > 0:
            alternative = "greater" if fields["estimate"] >= 0 else "less"
            scan = rosenbaum_from_signed_rank(
                float(row[f"{outcome.name}__t_plus"]), n_nonzero, float(row[f"{outcome.name}__tie_term"] or 0.0), alternative=alternative
            )
    if scan is not None:
        out["rosenbaum"] = {
            "alpha": scan.alpha,
            "alternative": scan.alternative,
            "gamma_at_alpha": scan.gamma_at_alpha,
            "first_gamma_above_alpha": scan.first_gamma_above_alpha,
            "gamma_max": scan.gamma_max,
            "p_upper_at_gamma_1": scan.rows[0].p_upper,
        }
        words.append(plain_words(scan, treatment=TREATMENT_WORDS, outcome=outcome.name))
    else:
        out["rosenbaum"] = None
        out["rosenbaum_reason"] = (
            f"They need 1:1 matched pairs and the signed-rank aggregates of their differences; this run's method "
            f"({method or 'unknown'}) returned none."
            if pair_ranks is None
            else "no matched pair differs in this outcome, so there is no signed-rank statistic to bound."
        )
    out["sentence"] = " ".join(words) if words else None
    return out


__all__ = ["load", "compile_plan", "write_plan", "open_engine", "run", "estimate", "normal_interval"]


def write_results(results: StudyResults, out_dir: str | Path) -> list[Path]:
    """results.json and report.md in out_dir."""
    from sqlmatch.report.markdown import render_markdown

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    json_path = out / "results.json"
    json_path.write_text(results.to_json(), encoding="utf-8")
    from sqlmatch.report.html import balance_plot, render_html

    svg = balance_plot(results)
    image = out / "balance.svg"
    if svg:
        image.write_text(svg, encoding="utf-8")
    md_path = out / "report.md"
    md_path.write_text(render_markdown(results, balance_image=image.name if svg else None), encoding="utf-8")

    html_path = out / "report.html"
    html_path.write_text(render_html(results), encoding="utf-8")
    return [json_path, md_path, html_path] + ([image] if svg else [])


def run_cohorts(spec: Spec, months: str, **run_options):
    """Run the study for every month of `months` ("FIRST:LAST") and pool each outcome's effect."""
    from sqlmatch.cohorts import CohortResults, month_range

    results = []
    for month in month_range(months):
        progress = run_options.get("progress")
        if progress is not None:
            progress.note(f"cohort {month}")
        results.append(run(spec.with_overrides(cohort=month), **run_options))
    return CohortResults.combine(results)


def write_cohort_results(combined, out_dir: str | Path) -> list[Path]:
    from sqlmatch.report.cohorts import render_cohorts_markdown

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    json_path = out / "results.json"
    json_path.write_text(combined.to_json(), encoding="utf-8")
    md_path = out / "report.md"
    md_path.write_text(render_cohorts_markdown(combined), encoding="utf-8")
    from sqlmatch.report.html import render_html

    pages = []
    for r in combined.cohorts:
        page = out / f"report-{r.cohort}.html"
        page.write_text(render_html(r), encoding="utf-8")
        pages.append(page)
    return [json_path, md_path] + pages


def compile_for_scheduler(spec: Spec, dialect: str = "duckdb") -> Plan:
    """The plan with every aggregate written to a table (`<study>_agg_<step>`), for orchestrators
    that run the SQL themselves; `report_from_tables` then builds the results. A score-based
    method needs its fitted model beside the spec."""
    from sqlmatch.matching import method_for
    from sqlmatch.propensity import load_model

    model = None
    if method_for(spec.matching.method).NEEDS_SCORE:
        model = load_model(spec)
        if model is None:
            raise SqlmatchError(
                "matching.method: a scheduled plan needs the fitted propensity model beside the spec. "
                "Fix: run `sqlmatch run` once (it writes <spec>.model.json), then compile again."
            )
    return build_plan(spec, dialect, model=model, materialize=True)


def report_from_tables(spec: Spec, engine: Engine | None = None, database: str | None = None, engine_url: str | None = None) -> StudyResults:
    """Results from the aggregate tables a scheduled run of `compile_for_scheduler`'s plan wrote:
    reads only those small tables, never the source tables."""
    from sqlglot import exp

    from sqlmatch.runner import RunOutput

    own = engine is None
    engine = engine or open_engine(spec, database, engine_url)
    try:
        plan = compile_for_scheduler(spec, engine.dialect)
        output = RunOutput(plan=plan)
        start = engine.rows_fetched
        for step in plan.steps:
            if not step.writes or not step.writes[0].split(".", 1)[1].startswith(f"{spec.name}_agg_"):
                continue
            schema, name = step.writes[0].split(".", 1)
            if engine.columns(schema, name) is None:
                raise SqlmatchError(
                    f"table {step.writes[0]} was not found: the scheduled plan has not run (completely). "
                    "Fix: run every step of the compiled plan in order, then `sqlmatch report` again."
                )
            query = exp.select("*").from_(exp.table_(name, db=schema, quoted=True))
            output.results[step.name] = engine.fetch(query.sql(engine.dialect))
        output.rows_fetched = engine.rows_fetched - start
    finally:
        if own:
            engine.close()
    # The same refusals as a direct run, in plan order: the scheduler ran the SQL without them.
    from sqlmatch.runner import check_step

    for name in output.results:
        check_step(spec, name, output.results)
    return estimate(spec, plan, output)
