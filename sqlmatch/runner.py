"""Runs a plan on an engine: preflight, each step in order, aggregates back.

Nothing here computes statistics; the runner hands the aggregate query results to the
estimators (see api.py). On any error the study's work tables are dropped, so a failed run
leaves nothing half-written behind.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import sys
import time
from dataclasses import dataclass, field

from sqlglot import exp

from sqlmatch.columns import stat
from sqlmatch.dialects import BUILDING_SUFFIX
from sqlmatch.engines.base import Engine, QueryResult, merged
from sqlmatch.errors import DataError, SpecError
from sqlmatch.matching import method_for
from sqlmatch.plan import TIME_ZONE, Plan
from sqlmatch.spec import Spec, filter_columns

NUMERIC_TYPE_WORDS = ("INT", "DOUBLE", "FLOAT", "DECIMAL", "NUMERIC", "REAL", "HUGEINT", "BIGINT", "SMALLINT", "TINYINT", "UBIGINT", "UINTEGER")
TIME_TYPE_WORDS = ("DATE", "TIMESTAMP")


@dataclass
class RunOutput:
    plan: Plan | None = None
    model: object = None  # propensity.FittedModel when the method needed a score
    results: dict[str, QueryResult] = field(default_factory=dict)
    timings: dict[str, float] = field(default_factory=dict)
    rows_fetched: int = 0
    repeats: dict[str, int] = field(default_factory=dict)  # a repeated step's count (e.g. greedy rounds)


class Progress:
    """One line per step on stderr, so a scheduler's log shows where time went."""

    def __init__(self, quiet: bool = False, stream=None, verbose: bool = False):
        self.quiet = quiet
        self.verbose = verbose and not quiet
        self.stream = stream or sys.stderr

    def step(self, index: int, total: int, name: str, seconds: float, rows: int | None = None, fetched: bool = False) -> None:
        if self.quiet:
            return
        what = "" if rows is None else (f"{rows:>12,} rows fetched" if fetched else f"{rows:>12,} rows written")
        print(f"sqlmatch: [{index + 1:>2}/{total}] {name:<22} {seconds:8.2f}s {what}".rstrip(), file=self.stream, flush=True)

    def note(self, text: str) -> None:
        if not self.quiet:
            print(f"sqlmatch: {text}", file=self.stream, flush=True)


def _find(columns: dict[str, str], name: str) -> str | None:
    """Exact match first; engines that fold unquoted names may report another case."""
    if name in columns:
        return name
    lowered = {c.lower(): c for c in columns}
    return lowered.get(name.lower())


def preflight(spec: Spec, engine: Engine) -> None:
    """Check every table and column the spec names exists, before any table is created."""
    units = engine.columns(spec.units.schema, spec.units.name)
    if units is None:
        raise SpecError("units.table", f"table {spec.units.display!r} was not found.", "check the name and schema, and that the engine's user can read it.")
    events = engine.columns(spec.events.schema, spec.events.name)
    if events is None:
        raise SpecError("events.table", f"table {spec.events.display!r} was not found.", "check the name and schema, and that the engine's user can read it.")

    def need(cols, table, key, column, kinds=None, kind_text=""):
        found = _find(cols, column)
        if found is None:
            shown = ", ".join(sorted(cols)[:20])
            raise SpecError(key, f"column {column!r} is not in table {table!r}.", f"use one of its columns: {shown}.")
        if kinds and not any(word in cols[found].upper() for word in kinds):
            raise SpecError(key, f"column {column!r} of {table!r} has type {cols[found]}, not {kind_text}.", f"name a {kind_text} column or cast it in a view.")

    need(units, spec.units.display, "units.key", spec.unit_key)
    if spec.propensity.sample_controls < 1.0:
        need(units, spec.units.display, "propensity.sample_controls", spec.unit_key, ("INT",), "integer (the sample hashes integer unit keys)")
    need(units, spec.units.display, "units.enrolled_on", spec.enrolled_on, TIME_TYPE_WORDS, "date or timestamp")
    for i, f in enumerate(spec.features):
        if f.attribute:
            kinds = None if f.categorical else NUMERIC_TYPE_WORDS
            need(units, spec.units.display, f"features[{i}] ({f.name}).attribute", f.attribute, kinds, "numeric")
        elif f.expression is not None and f.aggregate == "attribute":  # a derived one reads features, checked in the spec
            for col in filter_columns(f.expression):
                need(units, spec.units.display, f"{f.key}.expression", col)
    for i, tree in enumerate(spec.filters):
        for col in filter_columns(tree):
            need(units, spec.units.display, f"eligibility.filters[{i}]", col)
    need(events, spec.events.display, "events.unit_key", spec.event_unit_key)
    need(events, spec.events.display, "events.time", spec.event_time, TIME_TYPE_WORDS, "date or timestamp")
    for i, f in enumerate(spec.features):
        if f.measure:
            need(events, spec.events.display, f"features[{i}] ({f.name}).measure", f.measure, NUMERIC_TYPE_WORDS, "numeric")
    for i, o in enumerate(spec.outcomes):
        for attr in ("measure", "numerator", "denominator"):
            col = getattr(o, attr)
            if col:
                need(events, spec.events.display, f"outcomes[{i}] ({o.name}).{attr}", col, NUMERIC_TYPE_WORDS, "numeric")


def _drop(engine: Engine, schema: str, name: str) -> None:
    drop = exp.Drop(tables=[exp.table_(name, db=schema, quoted=True)], kind="TABLE", exists=True)
    engine.execute(drop.sql(engine.dialect))


def drop_stray_tables(spec: Spec, engine: Engine) -> list[str]:
    """Tables a killed run left half-built (`<table>__building` of a table this study's plan can
    write, never any other name); dropped before a new run."""
    from sqlmatch.plan import writable_tables

    present = set(engine.table_names(spec.work_schema))
    ours = {t.split(".", 1)[1] + BUILDING_SUFFIX for t in writable_tables(spec, engine.dialect)}
    stray = sorted(present & ours)
    for name in stray:
        _drop(engine, spec.work_schema, name)
    return stray


def drop_work_tables(plan_or_tables, engine: Engine) -> list[str]:
    """Drop every table the plan writes (and any half-built one), last written first; returns the
    names dropped, each once."""
    tables = plan_or_tables.work_tables if isinstance(plan_or_tables, Plan) else tuple(plan_or_tables)
    dropped: list[str] = []
    for table in reversed(tuple(dict.fromkeys(tables))):
        schema, name = table.split(".", 1)
        for candidate in (name + BUILDING_SUFFIX, name):
            if engine.columns(schema, candidate) is not None:
                _drop(engine, schema, candidate)
                dropped.append(f"{schema}.{candidate}")
    return dropped


def _check_groups(spec: Spec, result: QueryResult) -> None:
    sizes = {int(g["treated"]): int(g["n_units"]) for g in result.records()}
    if not sizes.get(1):
        raise DataError(
            "treatment.cohort",
            f"no unit enrolled in {spec.cohort} passes the eligibility filters: the cohort is empty.",
            "pick a month in which units enrolled, or loosen eligibility.filters.",
        )
    if not sizes.get(0):
        raise DataError(
            "treatment.control_pool",
            "no eligible control unit: every unit in the study enrolled.",
            "loosen eligibility.filters, or use control_pool = \"not_yet_enrolled\".",
        )


def _check_missing(spec: Spec, result: QueryResult) -> None:
    """Refuse NULL numeric attributes that have no policy, and a study that dropping units with
    NULL attributes (missing = "drop") would leave without a treated or a control unit."""
    rows = result.records()
    by_group = {int(r["treated"]): r for r in rows}
    for f in spec.attribute_features:
        nulls = {g: int(r.get(stat(f.name, "null")) or 0) for g, r in by_group.items()}
        if f.missing == "error" and sum(nulls.values()):
            raise DataError(
                f"{f.key}.missing",
                f"{sum(nulls.values()):,} units in the study ({nulls.get(1, 0):,} treated, {nulls.get(0, 0):,} control) have no value "
                f"for {f.name!r} ({f'column {f.attribute!r}' if f.attribute else f'expression {f.expression_text!r}'} of {spec.units.display!r}).",
                f'say what a missing value means: missing = "fill" with fill = <number> (adds the indicator feature {f.name}_missing) '
                'or missing = "drop" (those units leave the study).',
            )
    dropped = [f.name for f in spec.attribute_features if f.missing == "drop"]
    for group, what, key in ((1, "treated", "treatment.cohort"), (0, "control", "treatment.control_pool")):
        r = by_group.get(group)
        if dropped and r is not None and int(r["n_units"]) - int(r.get("n_dropped") or 0) <= 0:
            raise DataError(
                key,
                f"every {what} unit has a NULL in {', '.join(dropped)} (missing = \"drop\"), so none is left in the study.",
                'fill those values instead (missing = "fill" with fill = <number>), or fix the source column.',
            )


def _check_keys_unique(spec: Spec, result: QueryResult) -> None:
    row = result.one()
    if row["n_rows"] != row["n_keys"]:
        raise DataError(
            "units.key",
            f"{spec.unit_key!r} is not unique in {spec.units.display!r}: {row['n_rows'] - row['n_keys']:,} of the study's "
            f"{row['n_rows']:,} rows repeat a key, so those units would count twice.",
            "deduplicate the units table (e.g. a view keeping one row per key) or name the right key column.",
        )


def _check_matched(spec: Spec, result: QueryResult, group_sizes: QueryResult | None = None) -> None:
    """Refuse a run that matched no treated unit, or fewer than matching.min_treated of them."""
    row = result.one()
    kept = int(row["n_treated_matched"] or 0)
    if not kept:
        raise DataError(
            "matching",
            "no treated unit found a control unit to match, so nothing was matched.",
            "match on fewer features (matching.on) or coarser cut points (matching.cut_points).",
        )
    minimum = spec.matching.min_treated
    if kept < minimum:
        sizes = {int(g["treated"]): int(g["n_units"]) - int(g.get("n_dropped") or 0) for g in group_sizes.records()} if group_sizes is not None else {}
        cohort = int(sizes.get(1) or row["n_treated"] or 0)
        loosen = method_for(spec.matching.method).loosen
        raise DataError(
            "matching.min_treated",
            f"only {kept:,} of the {cohort:,} treated units in the cohort were matched, fewer than "
            f"matching.min_treated = {minimum:,}, too few to estimate an effect from.",
            f"loosen the matching with {loosen}, or lower matching.min_treated if an effect on so few units is acceptable.",
        )


def _measure_sources(spec: Spec) -> dict[str, tuple[str, str, str]]:
    """Measure column -> (spec key, source column, source table) for the measures built from
    numbers, whose totals data_coverage returns."""
    out = {}
    for f in spec.event_features:
        if f.measure:
            out[f.name] = (f"{f.key}.measure", f.measure, spec.events.display)
    for f in spec.attribute_features:
        if not f.categorical and f.expression_text is not None:
            out[f.name] = (f"{f.key}.expression", f.expression_text, spec.units.display)
        elif not f.categorical:
            out[f.name] = (f"{f.key}.attribute", f.attribute, spec.units.display)
    for o in spec.outcomes:
        if o.aggregate == "sum":
            out[o.name] = (f"{o.key}.measure", o.measure, spec.events.display)
        elif o.aggregate == "ratio":
            out[o.name + "__num"] = (f"{o.key}.numerator", o.numerator, spec.events.display)
            if o.denominator:
                out[f"{o.name}__den"] = (f"{o.key}.denominator", o.denominator, spec.events.display)
    return out


def _check_coverage(spec: Spec, result: QueryResult) -> None:
    """Refuse a post window the events do not reach (every outcome would be 0, an effect of
    nothing) and a measure whose total is NaN or infinite (a NaN or infinity in its column: it
    would spread into every mean, bin and estimate)."""
    row = result.one()
    w = spec.windows
    last = row.get("last_event_at")
    if last is None:
        raise DataError(
            "windows",
            f"no unit of the study has an event between {w.pre_start} and {w.post_end} (the pre and post windows) in {spec.events.display!r}.",
            "check events.table, events.unit_key and events.time, or pick a treatment.cohort whose windows the events cover.",
        )
    last = last if isinstance(last, dt.date) and not isinstance(last, dt.datetime) else dt.date.fromisoformat(str(last)[:10])
    if last < w.post_start:
        raise DataError(
            "windows.post",
            f"the post window [{w.post_start}, {w.post_end}) holds no event of the study's units: the last event is on {last}, "
            "so every outcome would be 0.",
            "pick an earlier treatment.cohort (the post window follows it), or wait until the post window's events have arrived.",
        )
    for f in spec.derived_features:
        nulls = int(row.get(stat(f.name, "null")) or 0)
        if nulls:
            raise DataError(
                f"{f.key}.expression",
                f"{f.expression_text!r} gives no value (NULL) for {nulls:,} units of the study (a division by zero, "
                "ln or sqrt outside their domain, or a NULL feature it reads).",
                "guard it (e.g. CASE WHEN pre_trips > 0 THEN pre_fare / pre_trips ELSE 0 END), or set fill = <number> for those units.",
            )
        total = row.get(stat(f.name, "total"))
        if total is not None and not math.isfinite(float(total)):
            raise DataError(
                f"{f.key}.expression",
                f"{f.expression_text!r} gives NaN or infinite values (its total over the study's units is {float(total)}), "
                "e.g. exp() of a large number, or a feature it reads holds them.",
                "keep its values finite: transform the features (ln(1 + x) rather than exp(x)) or cap them (least(x, <number>)).",
            )
    for column, (key, source, table) in _measure_sources(spec).items():
        total = row.get(stat(column, "total"))
        if total is not None and not math.isfinite(float(total)):
            raise DataError(
                key,
                f"{'column' if not key.endswith('.expression') else 'the expression'} {source!r} of {table!r} holds NaN or infinite "
                f"values (the total of {column!r} over the study's units is {float(total)}).",
                "clean the column, or name a view in the spec that keeps only the rows whose value is a finite number (or NULL).",
            )


def _check_ratio_denominators(spec: Spec, name: str, result: QueryResult) -> None:
    """Refuse a ratio outcome whose denominator sums to 0 over a group: the ratio is undefined."""
    where = "matched" if name == "outcome_strata" else "study's"
    w = spec.windows
    for o in spec.outcomes:
        if o.aggregate != "ratio":
            continue
        totals = {0: 0.0, 1: 0.0}
        for r in result.records():
            totals[int(r["treated"])] += float(r.get(stat(o.name, "sum_x")) or 0.0)
        for group, word in ((1, "treated"), (0, "control")):
            if totals[group] > 0:
                continue
            if o.denominator:
                key, what = f"{o.key}.denominator", f"the denominator, column {o.denominator!r} of {spec.events.display!r},"
                fix = f"a ratio needs a denominator with a positive total: check {o.denominator!r}, or remove the outcome."
            else:
                key, what = o.key, f"the denominator, the number of events with a value for {o.numerator!r},"
                fix = f"check {o.numerator!r} in the post window, or remove the outcome."
            raise DataError(
                key,
                f"{what} sums to {totals[group]:g} over the {where} {word} units in the post window [{w.post_start}, {w.post_end}), so the ratio is undefined.",
                fix,
            )


def check_step(spec: Spec, name: str, results: dict[str, QueryResult]) -> None:
    """The refusals that follow one aggregate step's result (empty groups, NULLs without a policy,
    duplicate keys, too few matched, an oversized candidate join). The runner calls it as each
    step returns, so a run stops early; `sqlmatch report` calls it on a scheduler's tables."""
    result = results[name]
    if name == "group_sizes":
        _check_groups(spec, result)
        _check_missing(spec, result)
    elif name == "unit_key_check":
        _check_keys_unique(spec, result)
    elif name == "data_coverage":
        _check_coverage(spec, result)
    elif name in ("outcome_strata", "outcome_unmatched"):
        _check_ratio_denominators(spec, name, result)
    elif name == "matching_summary":
        _check_matched(spec, result, results.get("group_sizes"))
    check = method_for(spec.matching.method).checks.get(name)
    if check is not None:
        check(spec, result)


def _pause_for_tests(step: str) -> None:
    """Test hook: SQLMATCH_PAUSE_BEFORE_SWAP=<step> halts a run with that step's table half-built,
    so a test can kill the process there (see tests/test_interruptions.py)."""
    if os.environ.get("SQLMATCH_PAUSE_BEFORE_SWAP") == step:
        print(f"sqlmatch: paused before swapping in {step}", file=sys.stderr, flush=True)
        time.sleep(300)


def _part_follows(plan: Plan, i: int) -> bool:
    """Step i is part of a split query whose next part is the next step: its refusals wait for it."""
    base = plan.steps[i].part_of or plan.steps[i].name
    return i + 1 < len(plan.steps) and plan.steps[i + 1].part_of == base


def _run_steps(plan: Plan, spec: Spec, engine: Engine, out: RunOutput, progress: Progress) -> None:
    """Run the plan's steps not yet run (by name), collecting query results into `out`."""
    total = len(plan.steps)
    for i, step in enumerate(plan.steps):
        if step.name in out.timings:
            continue
        if progress.verbose:
            progress.note(f"{step.name}: {step.purpose} (reads {', '.join(step.reads) or '-'})")
        t0 = time.perf_counter()
        written = None
        if step.kind == "setup":
            if step.name == "work_schema" and engine.schema_exists(spec.work_schema):
                out.timings[step.name] = time.perf_counter() - t0
                continue  # exists: creating it needs a privilege its user may not have
            for statement in step.statements:
                engine.execute(statement)
        elif step.kind == "table":
            # build under a temporary name, then drop the old table and rename in one transaction
            for _ in range(step.max_repeats):
                engine.execute(step.statements[0])
                written = engine.execute(step.statements[1])
                _pause_for_tests(step.name)
                engine.execute_atomic(list(step.statements[2:]))
                if step.repeat_check is None:
                    break
                check = engine.fetch(step.repeat_check).one()
                out.repeats[step.name] = int(check.get("n_rounds") or 0)
                if not check["n_open"]:
                    break
        else:
            (statement,) = step.statements
            fetched = engine.fetch(statement)
            if step.part_of is None:
                out.results[step.name] = fetched
            else:  # a later part of a split query: its columns join part 1's row
                out.results[step.part_of] = merged([out.results[step.part_of], fetched], step.part_of)
            if not _part_follows(plan, i):
                check_step(spec, step.part_of or step.name, out.results)
        out.timings[step.name] = time.perf_counter() - t0
        rows = written if step.kind == "table" else (len(fetched.rows) if step.kind == "query" else None)
        progress.step(i, total, step.name, out.timings[step.name], rows=rows, fetched=step.kind == "query")


def fit_propensity(spec: Spec, engine: Engine, out: RunOutput, progress: Progress):
    """Newton-Raphson in the warehouse: one aggregate query per step (see propensity.py)."""
    from sqlmatch import propensity
    from sqlmatch.propensity import evaluate_newton, newton_statements

    levels: dict[str, list[str]] = {}
    if "categorical_levels" in out.results:
        for row in out.results["categorical_levels"].records():
            levels.setdefault(row["feature"], []).append(str(row["level"]))
    levels = {k: sorted(v) for k, v in levels.items()}
    columns = propensity.design_columns(spec, levels)
    t0 = time.perf_counter()

    def fit(cols, start=None):
        return propensity.newton(
            lambda beta: evaluate_newton(engine.fetch, newton_statements(spec, engine.dialect, cols, beta)),
            cols,
            ridge=spec.propensity.ridge,
            max_iterations=spec.propensity.max_iterations,
            start=start,
        )

    if spec.propensity.terms == "stepwise":
        model = propensity.stepwise(
            fit,
            lambda cols, beta, pairs: evaluate_newton(engine.fetch, newton_statements(spec, engine.dialect, cols, beta, pairs)),
            columns,
            progress,
        )
    else:
        model = fit(columns)
    model.levels = levels
    share = round(spec.propensity.sample_controls * 10000) / 10000
    if share < 1.0:
        # Controls sampled at rate r shift the logit by log(r): the intercept fitted on the sample is
        # b0 - log(r) (prior correction, King & Zeng 2001, Political Analysis 9:137), so add log(r) back.
        model.coefficients[0] += math.log(share)
        model.sampled_controls = share
    out.timings["propensity_fit"] = time.perf_counter() - t0
    progress.note(f"propensity model: {model.iterations} Newton steps, {out.timings['propensity_fit']:.2f}s")
    return model


def run_plan(plan: Plan, spec: Spec, engine: Engine, progress: Progress | None = None, keep_tables: bool = True) -> RunOutput:
    """Run a study. A partial plan (score-based method, no model yet) is run up to the model, the
    model is fitted in the warehouse, then the full plan is built and its remaining steps run;
    `out.plan` is the plan that ran in full and `out.model` the fitted model."""
    from sqlmatch.plan import build_plan

    progress = progress or Progress(quiet=True)
    preflight(spec, engine)
    # Held from before the leftovers are dropped until the last table is dropped: a second run of
    # the same study on the same database (where the engine can tell) is refused here, before it
    # could drop this run's half-built tables or swap its own in under them. A refused run drops
    # nothing, since every table it would drop belongs to the run holding the lock.
    with engine.study_lock(spec.work_schema, spec.name), engine.session_time_zone(TIME_ZONE):
        drop_stray_tables(spec, engine)
        out = RunOutput(plan=plan)
        start_rows = engine.rows_fetched
        try:
            _run_steps(plan, spec, engine, out, progress)
            if not plan.complete:
                out.model = (method_for(spec.matching.method).fit or fit_propensity)(spec, engine, out, progress)
                out.plan = build_plan(spec, plan.dialect, model=out.model)
                _run_steps(out.plan, spec, engine, out, progress)
        except BaseException:
            drop_work_tables(out.plan, engine)
            raise
        out.rows_fetched = engine.rows_fetched - start_rows
        if not keep_tables:
            drop_work_tables(out.plan, engine)
    return out
