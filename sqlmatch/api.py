"""The Python API the command line mirrors: load, compile, run, report.

    >>> from sqlmatch import api
    >>> spec = api.load("study.toml")                     # doctest: +SKIP
    >>> plan = api.compile_plan(spec, "postgres")          # doctest: +SKIP
    >>> results = api.run(spec, database="warehouse.duckdb")  # doctest: +SKIP
    >>> print(results.effect("post_trips").estimate)       # doctest: +SKIP
"""

from __future__ import annotations

from pathlib import Path

from sqlmatch.effects import study_results
from sqlmatch.engines.base import Engine
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.errors import SpecError, SqlmatchError
from sqlmatch.plan import Plan, build_plan
from sqlmatch.results import StudyResults
from sqlmatch.runner import Progress, run_plan
from sqlmatch.spec import Spec, load_spec

load = load_spec


def compile_plan(spec: Spec, dialect: str = "duckdb") -> Plan:
    """The study's SQL for `dialect`. A score-based method bakes the fitted model kept beside the
    spec (<spec>.model.json) into pure SQL; without one the plan stops where the model is fitted."""
    from sqlmatch.matching import method_for
    from sqlmatch.propensity import load_model

    method = method_for(spec.matching.method)
    if method.uses_score:
        model = load_model(spec)
    else:
        model = method.load_fit(spec) if method.load_fit is not None else None
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


def compiled_mode(folder: str | Path) -> dict | None:
    """How the plan in `folder` was compiled, from its manifest.json: {"mode": "scheduler" or
    "direct", "dialect": ...}; None without a readable manifest. A scheduler plan is the one whose
    steps write the <study>_agg_ tables (the manifest has no explicit mode field)."""
    import json

    path = Path(folder) / "manifest.json"
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
        study, steps, dialect = manifest["study"], manifest["steps"], manifest["dialect"]
    except (OSError, ValueError, KeyError, TypeError):
        return None
    marker = f".{study}_agg_"
    scheduled = any(marker in table for s in steps for table in s.get("writes", ()))
    return {"mode": manifest.get("mode") or ("scheduler" if scheduled else "direct"), "dialect": dialect}


def model_file_text(spec: Spec) -> str:
    """The model file's path for messages ("<spec>.model.json" when the spec has no file)."""
    from sqlmatch.propensity import model_path

    path = model_path(spec)
    return str(path) if path is not None else "<spec>.model.json"


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


def path_from_spec_folder(path: str | Path, spec_path: str | Path) -> str:
    """`path` as a spec at `spec_path` should name it: relative to the spec's folder (how
    open_engine reads [study] database), absolute when no relative path exists."""
    import os

    target = Path(path).resolve()
    try:
        return Path(os.path.relpath(target, Path(spec_path).resolve().parent)).as_posix()
    except ValueError:  # another drive on Windows
        return str(target)


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
    from sqlmatch.matching import method_for

    own = engine is None
    engine = engine or open_engine(spec, database, engine_url)
    try:
        output = run_plan(build_plan(spec, engine.dialect), spec, engine, progress=progress, keep_tables=keep_tables)
        results = study_results(spec, output.plan, output)
        if spec.placebo_months:
            from sqlmatch.results import PlaceboCheck

            placebo = run(spec.placebo_spec(), engine=engine, progress=progress, keep_tables=keep_tables)
            results.placebo = PlaceboCheck(spec.placebo_months, placebo)
        if spec.results_table:
            from sqlmatch.history import record

            results.run_id = record(spec, results, engine)
    finally:
        if own:
            engine.close()
    method = method_for(spec.matching.method)
    if output.model is not None and spec.source_path is not None and method.uses_score:
        from sqlmatch.propensity import model_path

        output.model.save(model_path(spec))
    elif output.model is not None and spec.source_path is not None and method.save_fit is not None:
        method.save_fit(spec, output.model)
    return results


def cleanup(spec: Spec, engine: Engine | None = None, database: str | None = None, engine_url: str | None = None) -> list[str]:
    """Drop every table this study's plan can write (and half-built leftovers of them), nothing
    else; returns the distinct names dropped."""
    from sqlmatch.plan import part_tables, writable_tables
    from sqlmatch.runner import drop_stray_tables, drop_work_tables

    own = engine is None
    engine = engine or open_engine(spec, database, engine_url)
    try:
        # Under the study's lock: cleanup must not drop the tables of a run still going.
        with engine.study_lock(spec.work_schema, spec.name):
            dropped = [f"{spec.work_schema}.{n}" for n in drop_stray_tables(spec, engine)]
            dropped += drop_work_tables(writable_tables(spec, engine.dialect), engine)
            # a killed `--cohorts` run's influence tables (run_cohorts drops them when it ends)
            from sqlmatch.cohorts import leftover_influence_tables

            present = engine.table_names(spec.work_schema)
            leftovers = leftover_influence_tables(spec, present) + part_tables(spec, present, engine.dialect)
            dropped += drop_work_tables([f"{spec.work_schema}.{n}" for n in leftovers], engine)
    finally:
        if own:
            engine.close()
    return sorted(set(dropped))


def check_output_folder(out_dir: str | Path) -> Path:
    """The folder results go to: refused before any work when the path is an existing file."""
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise SqlmatchError(f"--out: {str(out)!r} is a file, not a folder. Fix: pass a folder (it is created if missing).")
    return out


def _write_all(out_dir: str | Path, files: dict[str, str]) -> list[Path]:
    """Write every file of one result set, each to a temporary name first and then renamed into
    place, only after all of them rendered: a failed rerun leaves the previous set whole, never
    one run's results.json beside another's report."""
    import os

    out = check_output_folder(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    temporary = []
    try:
        for name, text in files.items():
            tmp = out / f".{name}.partial"
            tmp.write_text(text, encoding="utf-8")
            temporary.append((tmp, out / name))
        for tmp, final in temporary:
            os.replace(tmp, final)
    finally:
        for tmp, _ in temporary:
            tmp.unlink(missing_ok=True)
    return [final for _, final in temporary]


def write_results(results: StudyResults, out_dir: str | Path, progress: Progress | None = None) -> list[Path]:
    """results.json, report.md, report.html (and balance.svg) in out_dir, all rendered before any is written."""
    import time

    from sqlmatch.report.html import balance_plot, render_html
    from sqlmatch.report.markdown import render_markdown

    start = time.perf_counter()
    svg = balance_plot(results)
    files = {
        "results.json": results.to_json(),
        "report.md": render_markdown(results, balance_image="balance.svg" if svg else None),
        "report.html": render_html(results),
    }
    if svg:
        files["balance.svg"] = svg
    written = _write_all(out_dir, files)
    if progress is not None:
        progress.note(f"reports rendered and written in {time.perf_counter() - start:.2f}s")
    return written


def run_cohorts(
    spec: Spec,
    months: str,
    engine: Engine | None = None,
    database: str | None = None,
    progress: Progress | None = None,
    engine_url: str | None = None,
    keep_tables: bool = True,
):
    """Run the study for every month of `months` ("FIRST:LAST") and pool each outcome's effect.
    After each month's run its units' influence terms are written to a table of the work
    schema; one aggregate query over them gives the months' covariances (sqlmatch/cohorts.py).
    Those tables are dropped at the end (they are only read by that query)."""
    from sqlmatch.cohorts import CohortResults, covariance_matrices, covariance_row, covariance_steps, influence_step, month_range, pooled_interval_refusal
    from sqlmatch.plan import measure_columns, writable_tables
    from sqlmatch.runner import drop_work_tables

    months_list = month_range(months)
    refusal = pooled_interval_refusal(spec)
    own = engine is None
    engine = engine or open_engine(spec, database, engine_url)
    results, influence, covariances, parts = [], [], None, [None]
    try:
        for month in months_list:
            if progress is not None:
                progress.note(f"cohort {month}")
            cohort = spec.with_overrides(cohort=month)
            results.append(run(cohort, engine=engine, progress=progress, keep_tables=True))
            if refusal is None:
                step = influence_step(cohort, engine.dialect, month)
                influence.append(step.writes[0])
                engine.execute(step.statements[0])
                engine.execute(step.statements[1])
                engine.execute_atomic(list(step.statements[2:]))
            if not keep_tables:
                drop_work_tables(writable_tables(cohort, engine.dialect), engine)
        if refusal is None:
            parts = covariance_steps(spec, engine.dialect, influence)
            row = covariance_row(engine.fetch, parts)
            covariances = covariance_matrices(row, measure_columns(spec)[1], len(influence))
    finally:
        drop_work_tables(influence, engine)
        if own:
            engine.close()
    return CohortResults.combine(results, covariances=covariances, refusal=refusal, estimand=spec.matching.estimand, covariance_rows=len(parts))


def write_cohort_results(combined, out_dir: str | Path) -> list[Path]:
    from sqlmatch.report.cohorts import render_cohorts_markdown
    from sqlmatch.report.html import render_html

    files = {"results.json": combined.to_json(), "report.md": render_cohorts_markdown(combined)}
    files.update({f"report-{r.cohort}.html": render_html(r) for r in combined.cohorts})
    return _write_all(out_dir, files)


def plan_model(spec: Spec):
    """The fitted propensity model a score-based method's full plan needs (None for the others);
    refused when it is missing."""
    from sqlmatch.matching import method_for
    from sqlmatch.propensity import load_model

    method = method_for(spec.matching.method)
    if method.fit is not None:
        fitted = method.load_fit(spec) if method.load_fit is not None else None
        if fitted is None:
            raise SqlmatchError(
                f"matching.method: {spec.matching.method} fits its weights by Newton steps that sqlmatch runs and reads between "
                "the steps, so the plan a scheduler runs needs that fit stored beside the spec. Fix: run `sqlmatch run` once (it "
                "writes <spec>.balancing.json), then compile again; the scheduled runs apply that fit's weights to their units."
            )
        return fitted
    if not method.uses_score:
        return None
    model = load_model(spec)
    if model is None:
        raise SqlmatchError(
            "matching.method: a scheduled plan needs the fitted propensity model beside the spec. "
            "Fix: run `sqlmatch run` once (it writes <spec>.model.json), then compile again."
        )
    return model


def compile_for_scheduler(spec: Spec, dialect: str = "duckdb") -> Plan:
    """The plan with every aggregate written to a table (`<study>_agg_<step>`), for orchestrators
    that run the SQL themselves; `report_from_tables` then builds the results. A score-based
    method needs its fitted model beside the spec."""
    return build_plan(spec, dialect, model=plan_model(spec), materialize=True)


def report_from_tables(spec: Spec, engine: Engine | None = None, database: str | None = None, engine_url: str | None = None) -> StudyResults:
    """Results from the aggregate tables a scheduled run of `compile_for_scheduler`'s plan wrote:
    reads only those small tables, never the source tables."""
    from sqlglot import exp

    from sqlmatch.engines.base import QueryResult, merged
    from sqlmatch.plan import FINGERPRINT_COLUMN, changed_sections, spec_fingerprint
    from sqlmatch.runner import RunOutput

    own = engine is None
    engine = engine or open_engine(spec, database, engine_url)
    try:
        plan = compile_for_scheduler(spec, engine.dialect)
        expected = spec_fingerprint(spec)  # what each aggregate table must carry
        output = RunOutput(plan=plan)
        start = engine.rows_fetched
        stale = []
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
            result = engine.fetch(query.sql(engine.dialect))
            stored = {r[result.columns.index(FINGERPRINT_COLUMN)] for r in result.rows} if FINGERPRINT_COLUMN in result.columns else {None}
            if stored - {expected}:
                stale.append((step.name, changed_sections(next(iter(stored - {expected})), expected)))
                continue
            keep = [i for i, c in enumerate(result.columns) if c != FINGERPRINT_COLUMN]
            result = QueryResult(tuple(result.columns[i] for i in keep), tuple(tuple(r[i] for i in keep) for r in result.rows))
            if step.part_of is None:
                output.results[step.name] = result
            elif step.part_of in output.results:  # a later part of a split query: joins part 1's columns
                output.results[step.part_of] = merged([output.results[step.part_of], result], step.part_of)
        output.rows_fetched = engine.rows_fetched - start
    finally:
        if own:
            engine.close()
    if stale:
        sections = sorted({c for _, changed in stale for c in changed})
        raise SqlmatchError(
            f"the aggregate tables of step(s) {', '.join(n for n, _ in stale)} were written by SQL compiled from another "
            f"version of the spec (changed since: {', '.join(sections) or 'unknown, the tables carry no fingerprint'}): "
            "reporting them would mix two studies. Fix: compile the spec again (`sqlmatch compile --for-scheduler`), "
            "let the scheduler run the new files, then `sqlmatch report`."
        )
    # The same refusals as a direct run, in plan order: the scheduler ran the SQL without them.
    from sqlmatch.runner import check_step

    for name in output.results:
        check_step(spec, name, output.results)
    return study_results(spec, plan, output)
