"""Command line: argument parsing only; the work is done by sqlmatch.api."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from sqlmatch import api
from sqlmatch.dialects import DIALECTS, check_dialect
from sqlmatch.errors import SqlmatchError
from sqlmatch.matching import method_for
from sqlmatch.results import WARNING_KINDS, warning_kind
from sqlmatch.runner import Progress

FAIL_ON_HELP = (
    "exit with status 1 (after writing the results) when the run raised a warning of one of these kinds, "
    "comma-separated: " + "; ".join(f"{k} ({v})" for k, v in WARNING_KINDS.items()) + "; or all"
).replace("%", "%%")  # argparse expands % in help texts


def _fail_on(text: str) -> frozenset[str]:
    kinds = {k.strip() for k in text.split(",") if k.strip()}
    if "all" in kinds:
        return frozenset(WARNING_KINDS)
    unknown = sorted(kinds - set(WARNING_KINDS))
    if unknown or not kinds:
        raise argparse.ArgumentTypeError(
            f"unknown warning kind(s) {', '.join(unknown) or '(none given)'}; the kinds are {', '.join(WARNING_KINDS)}, or all"
        )
    return frozenset(kinds)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="sqlmatch",
        description="Observational-study matching compiled to SQL and run in the warehouse; only aggregates come back.",
    )
    sub = p.add_subparsers(dest="command", required=True)

    c = sub.add_parser("compile", help="write the study's SQL plan as numbered .sql files and a manifest")
    c.add_argument("spec", help="study spec (.toml)")
    c.add_argument("--dialect", help=f"target SQL dialect: {', '.join(DIALECTS)} (default duckdb; with --check, the folder's)")
    target = c.add_mutually_exclusive_group(required=True)
    target.add_argument("--out", help="folder for the .sql files and manifest.json")
    target.add_argument("--check", metavar="DIR", help="compare with the SQL committed in DIR (in the mode and dialect its manifest.json records); print a unified diff and exit 1 if they differ")
    c.add_argument("--for-scheduler", action="store_true", help="write every aggregate to a table so a scheduler can run the plan; then `sqlmatch report`")

    r = sub.add_parser("run", help="run the study in the warehouse and write results.json and report.md")
    r.add_argument("spec", help="study spec (.toml)")
    r.add_argument("--out", required=True, help="folder for results.json and report.md")
    r.add_argument("--database", help="DuckDB file holding the tables (overrides study.database)")
    r.add_argument(
        "--engine",
        metavar="URL",
        help="engine to run on, overriding --database: duckdb:///path.duckdb, postgresql://user@host:port/db "
        "(password from the URL, PGPASSWORD or ~/.pgpass), spark://local or sc://host:port",
    )
    months = r.add_mutually_exclusive_group()
    months.add_argument("--cohort", help="enrolment month to study, YYYY-MM (overrides treatment.cohort)")
    months.add_argument("--cohorts", metavar="FIRST:LAST", help="run every month from FIRST to LAST (YYYY-MM:YYYY-MM) and pool the effects")
    r.add_argument("--method", help="matching method (overrides matching.method); see `sqlmatch methods`")
    r.add_argument("--quiet", action="store_true", help="no progress lines on stderr")
    r.add_argument("--verbose", action="store_true", help="also say what each step computes and reads")
    r.add_argument("--keep", action="store_true", help="keep the study's work tables after the run (for debugging)")
    r.add_argument("--fail-on", type=_fail_on, default=frozenset(), metavar="KINDS", help=FAIL_ON_HELP)

    d = sub.add_parser("demo", help="build the bike-share demo warehouse and run the demo study end to end")
    d.add_argument("--out", required=True, help="folder for the demo database, compiled SQL, results.json and report.md")
    d.add_argument("--riders", type=int, default=20_000, help="number of riders to simulate (default 20000; trips are about 20x)")
    d.add_argument("--seed", type=int, default=20260301, help="seed of the simulation")
    d.add_argument("--quiet", action="store_true", help="no progress lines on stderr")
    d.add_argument("--verbose", action="store_true", help="also say what each step computes and reads")
    d.add_argument("--fail-on", type=_fail_on, default=frozenset(), metavar="KINDS", help=FAIL_ON_HELP)

    rp = sub.add_parser("report", help="results and reports from the aggregate tables a scheduled plan wrote (see compile --for-scheduler)")
    rp.add_argument("spec", help="study spec (.toml)")
    rp.add_argument("--out", required=True, help="folder for results.json, report.md and report.html")
    rp.add_argument("--database", help="DuckDB file holding the tables (overrides study.database)")
    rp.add_argument("--engine", help="engine URL (overrides --database)")
    rp.add_argument("--fail-on", type=_fail_on, default=frozenset(), metavar="KINDS", help=FAIL_ON_HELP)

    k = sub.add_parser("cleanup", help="drop the study's work tables from the warehouse")
    k.add_argument("spec", help="study spec (.toml)")
    k.add_argument("--database", help="DuckDB file holding the tables (overrides study.database)")
    k.add_argument("--engine", help="engine URL (overrides --database)")

    i = sub.add_parser("init", help="write a commented starter spec for your tables (reads column names and types only)")
    i.add_argument("--units", required=True, help="units table, e.g. riders or analytics.riders")
    i.add_argument("--events", required=True, help="events table, e.g. trips")
    i.add_argument("--database", help="DuckDB file holding the tables")
    i.add_argument("--engine", help="engine URL (overrides --database)")
    i.add_argument("--name", default="my_study", help="study name (prefix of the tables sqlmatch writes)")
    i.add_argument("--cohort", help="enrolment month to study, YYYY-MM (without it the spec holds a placeholder marked GUESS)")
    i.add_argument("--out", required=True, help="path of the spec to write (refuses to overwrite)")

    sub.add_parser("methods", help="list the matching methods")
    return p


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        return _dispatch(args)
    except SqlmatchError as err:
        print(f"sqlmatch: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print("sqlmatch: interrupted; the study's work tables were dropped.", file=sys.stderr)
        return 130


def _dispatch(args) -> int:
    if args.command == "methods":
        from sqlmatch.matching import describe

        for name, text in describe():
            print(f"{name:<18} {text}")
        return 0
    if args.command == "compile":
        spec = api.load(args.spec)
        for_scheduler, dialect = args.for_scheduler, args.dialect
        if args.check:
            compiled = api.compiled_mode(args.check)
            if compiled is not None:
                if for_scheduler and compiled["mode"] != "scheduler":
                    raise SqlmatchError(
                        f"--for-scheduler: {args.check} holds a {compiled['mode']} plan (manifest.json), not a scheduler one. "
                        f"Fix: drop --for-scheduler to check it as it was compiled."
                    )
                for_scheduler = compiled["mode"] == "scheduler"
                if dialect is not None and dialect != compiled["dialect"]:
                    raise SqlmatchError(
                        f"--dialect: {args.check} was compiled for {compiled['dialect']} (manifest.json), not {dialect}. "
                        f"Fix: pass --dialect {compiled['dialect']} or leave it out."
                    )
                dialect = dialect or compiled["dialect"]
        dialect = check_dialect(dialect or "duckdb")
        plan = api.compile_for_scheduler(spec, dialect) if for_scheduler else api.compile_plan(spec, dialect)
        if not plan.complete and method_for(spec.matching.method).fit is not None:
            raise SqlmatchError(
                f"matching.method: {spec.matching.method} fits its weights by Newton steps that `sqlmatch run` runs and reads "
                "between the steps, so a compiled plan would stop before them. Fix: run `sqlmatch run` once (it stores the fit "
                "beside the spec, <spec>.balancing.json), then compile again: the compiled SQL applies that fit's weights."
            )
        if not plan.complete:
            # A partial plan would stop before matching: nothing to review or schedule.
            raise SqlmatchError(
                f"matching.method: {spec.matching.method} needs the fitted propensity model {api.model_file_text(spec)}, which does not exist. "
                "Fix: run `sqlmatch run` once (it fits the model and writes that file), then compile again."
            )
        mode_flag = " --for-scheduler" if for_scheduler else ""
        if args.check:
            diff = api.check_plan(plan, args.check)
            if diff:
                sys.stdout.write(diff)
                print(
                    f"sqlmatch: the SQL in {args.check} differs from what {args.spec} compiles to ({'scheduler' if for_scheduler else 'direct'} plan); "
                    f"run `sqlmatch compile {args.spec} --dialect {dialect}{mode_flag} --out {args.check}` and review the diff.",
                    file=sys.stderr,
                )
                return 1
            print(f"sqlmatch: {args.check} matches {args.spec}")
            return 0
        written = api.write_plan(plan, args.out)
        print(f"sqlmatch: wrote {len(written)} files to {args.out}")
        return 0
    if args.command == "run":
        api.check_output_folder(args.out)
        spec = api.load(args.spec)
        if args.cohort or args.method:
            spec = spec.with_overrides(cohort=args.cohort, method=args.method)
        if args.cohorts:
            combined = api.run_cohorts(
                spec, args.cohorts, database=args.database, progress=Progress(quiet=args.quiet, verbose=args.verbose), engine_url=args.engine, keep_tables=args.keep
            )
            paths = api.write_cohort_results(combined, args.out)
            print(f"sqlmatch: wrote {', '.join(str(p) for p in paths)}")
            return _summary(combined.cohorts, args.fail_on, pooled=combined.pooled)
        progress = Progress(quiet=args.quiet, verbose=args.verbose)
        results = api.run(spec, database=args.database, progress=progress, engine_url=args.engine, keep_tables=args.keep)
        paths = api.write_results(results, args.out, progress=progress)
        print(f"sqlmatch: wrote {', '.join(str(p) for p in paths)}")
        return _summary([results], args.fail_on)
    if args.command == "init":
        from sqlmatch.init_spec import starter_spec

        out = Path(args.out)
        if out.exists():
            raise SqlmatchError(f"--out: {out} exists; sqlmatch init does not overwrite. Fix: choose another path or remove it.")
        engine = api.open_url_or_database(args.engine, args.database)
        # With --engine the URL is not written: it may hold a password; runs pass --engine again.
        database = None if args.engine is not None else api.path_from_spec_folder(args.database, out)
        try:
            text = starter_spec(engine, args.units, args.events, study=args.name, cohort=args.cohort, database=database)
        finally:
            engine.close()
        out.write_text(text, encoding="utf-8")
        print(f"sqlmatch: wrote {out}; review the lines marked GUESS, then `sqlmatch compile {out} --out sql/`")
        if args.cohort is None:
            from sqlmatch.init_spec import PLACEHOLDER_COHORT

            print(
                f"sqlmatch: treatment.cohort is a placeholder ({PLACEHOLDER_COHORT}), not read from the data: "
                f"set it to the enrolment month to study, or pass --cohort YYYY-MM to `sqlmatch run`."
            )
        return 0
    if args.command == "report":
        results = api.report_from_tables(api.load(args.spec), database=args.database, engine_url=args.engine)
        paths = api.write_results(results, args.out)
        print(f"sqlmatch: wrote {', '.join(str(p) for p in paths)}")
        return _summary([results], args.fail_on)
    if args.command == "cleanup":
        dropped = api.cleanup(api.load(args.spec), database=args.database, engine_url=args.engine)
        print(f"sqlmatch: dropped {len(dropped)} tables" + (f": {', '.join(dropped)}" if dropped else ""))
        return 0
    if args.command == "demo":
        from sqlmatch.demo_run import run_demo

        if args.riders < 500:
            raise SqlmatchError("--riders: the demo needs at least 500 riders to have a cohort worth matching.")
        results, paths = run_demo(Path(args.out), riders=args.riders, seed=args.seed, progress=Progress(quiet=args.quiet, verbose=args.verbose))
        print(f"sqlmatch: wrote {', '.join(str(p) for p in paths)}")
        return _summary([results], args.fail_on)
    raise AssertionError(args.command)  # argparse guarantees a known command


def _summary(runs, fail_on: frozenset[str], pooled=None, stream=None) -> int:
    """The result and every warning on stderr, where a scheduler's log keeps them: one line per
    outcome and per warning (its kind in brackets). Returns the exit status: 1 when a warning's
    kind is in `fail_on`, else 0."""
    from sqlmatch.report.words import figure_line, headline

    stream = stream or sys.stderr
    several = len(runs) > 1
    for r in runs:
        where = f"cohort {r.cohort}: " if several else ""
        for e in r.effects:
            print(f"sqlmatch: result: {where}{headline(e)}", file=stream)
    for p in pooled or ():
        kind = runs[0].effect(p.outcome).kind
        print(f"sqlmatch: result: pooled over {p.cohorts} cohorts: {figure_line(p.outcome, kind, p.estimate, p.ci_low, p.ci_high)}", file=stream)
        if p.note:
            print(f"sqlmatch: note: pooled {p.outcome}: {p.note}", file=stream)
    failing, warned = [], False
    for r in runs:
        where = f"cohort {r.cohort}: " if several else ""
        for w in r.warnings:
            kind = warning_kind(w) or "other"
            print(f"sqlmatch: warning [{kind}]: {where}{w}", file=stream)
            warned = True
            if kind in fail_on:
                failing.append(kind)
        if r.placebo is not None:
            for e, text in zip(r.placebo.results.effects, r.placebo.readings()):
                missed = e.ci_low is not None and e.ci_high is not None and not e.ci_low <= 0.0 <= e.ci_high
                print(f"sqlmatch: {'warning [placebo]' if missed else 'placebo'}: {where}{text}", file=stream)
                if missed:
                    warned = True
                    if "placebo" in fail_on:
                        failing.append("placebo")
    if not warned:
        print("sqlmatch: no warnings", file=stream)
    if failing:
        counts = ", ".join(f"{failing.count(k)} {k}" for k in sorted(set(failing)))
        print(f"sqlmatch: failing (--fail-on {','.join(sorted(fail_on))}): {counts} warning(s); the results were written.", file=stream)
        return 1
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
