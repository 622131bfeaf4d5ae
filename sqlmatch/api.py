"""The Python API the command line mirrors: load, compile, run, report.

    >>> from sqlmatch import api
    >>> spec = api.load("study.toml")                     # doctest: +SKIP
    >>> plan = api.compile_plan(spec, "postgres")          # doctest: +SKIP
    >>> results = api.run(spec, database="warehouse.duckdb")  # doctest: +SKIP
    >>> print(results.effect("post_trips").estimate)       # doctest: +SKIP
"""

from __future__ import annotations

from pathlib import Path

from sqlmatch import aggregates
from sqlmatch.engines.base import Engine
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.errors import SpecError
from sqlmatch.estimate.att import normal_interval, stratified_att
from sqlmatch.estimate.ratio import ratio_effect
from sqlmatch.plan import L1_BINS, Plan, build_plan
from sqlmatch.results import Effect, MatchingSummary, StudyResults
from sqlmatch.runner import Progress, RunOutput, run_plan
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


def run(
    spec: Spec,
    engine: Engine | None = None,
    database: str | None = None,
    progress: Progress | None = None,
    engine_url: str | None = None,
) -> StudyResults:
    """Run the study in the warehouse and estimate from the aggregates it returns."""
    own = engine is None
    engine = engine or open_engine(spec, database, engine_url)
    try:
        output = run_plan(build_plan(spec, engine.dialect), spec, engine, progress=progress)
    finally:
        if own:
            engine.close()
    if output.model is not None and spec.source_path is not None:
        from sqlmatch.propensity import model_path

        output.model.save(model_path(spec))
    return estimate(spec, output.plan, output)


def estimate(spec: Spec, plan: Plan, output: RunOutput) -> StudyResults:
    """Balance and effects from the aggregates of one run (pure: no database)."""
    r = output.results
    summary = r["matching_summary"].one()
    sizes = {int(row[0]): int(row[1]) for row in r["group_sizes"].rows}
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
    effects = [_effect(o, r["outcome_strata"], r["outcome_unmatched"]) for o in plan.outcomes]
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
        timings=output.timings,
    )


def _effect(outcome, matched, unmatched) -> Effect:
    if outcome.kind == "ratio":
        m = ratio_effect(*aggregates.ratio_sums(matched, outcome.name), singleton="pool")
        n = ratio_effect(*aggregates.ratio_sums(unmatched, outcome.name), singleton="pool")
        t_sums, c_sums = aggregates.ratio_sums(matched, outcome.name)
        return Effect(
            outcome=outcome.name,
            kind="ratio",
            estimator="ratio of weighted sums, delta-method variance",
            estimate=m.estimate,
            std_error=m.std_error,
            ci_low=m.ci_low,
            ci_high=m.ci_high,
            n_treated=int(t_sums.n.sum()),
            n_control=int(c_sums.n.sum()),
            mean_treated=m.treated.estimate,
            mean_control=m.control.estimate,
            naive_estimate=n.estimate,
            naive_std_error=n.std_error,
            naive_ci_low=n.ci_low,
            naive_ci_high=n.ci_high,
        )
    m = stratified_att(*aggregates.outcome_moments(matched, outcome.name))
    n = stratified_att(*aggregates.outcome_moments(unmatched, outcome.name))
    return Effect(
        outcome=outcome.name,
        kind=outcome.kind,
        estimator="stratified difference in means" + (" (risk difference)" if outcome.kind == "binary" else ""),
        estimate=m.estimate,
        std_error=m.std_error,
        ci_low=m.ci_low,
        ci_high=m.ci_high,
        n_treated=m.n_treated,
        n_control=m.n_control,
        mean_treated=m.mean_treated,
        mean_control=m.mean_control,
        naive_estimate=n.estimate,
        naive_std_error=n.std_error,
        naive_ci_low=n.ci_low,
        naive_ci_high=n.ci_high,
    )


__all__ = ["load", "compile_plan", "write_plan", "open_engine", "run", "estimate", "normal_interval"]


def write_results(results: StudyResults, out_dir: str | Path) -> list[Path]:
    """results.json and report.md in out_dir."""
    from sqlmatch.report.markdown import render_markdown

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    json_path = out / "results.json"
    json_path.write_text(results.to_json(), encoding="utf-8")
    md_path = out / "report.md"
    md_path.write_text(render_markdown(results), encoding="utf-8")
    return [json_path, md_path]
