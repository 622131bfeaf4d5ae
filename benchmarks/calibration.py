"""Calibration of sqlmatch's intervals on two simulated bike-shares (a script, not a test).

Processes: `demo` (the demo warehouse, sqlmatch.demo_run.build_demo, and its study) and `commuter`
(benchmarks/commuter_sim.py and benchmarks/commuter_pass.toml: continuous and categorical
confounders, an effect that grows with pre-period trips, lognormal fares). For each of R seeds
each process is generated afresh and its study run with every matching method of
sqlmatch.matching.METHODS at the method's default settings (the spec's `on` and cut points, the
method replaced). Each 95% interval is checked against the simulation's expected effect on the
cohort given its units (`expected`, the demo's `true_att`), the realised sample ATT (`sample`) and,
for the commuter process, the population ATT. With `--estimand atc` (or `ate`, or several) each
method that offers that estimand (MatchingMethod.estimands) runs with `[matching] estimand` set to
it and is scored against the same truths of that estimand: the effect on the controls (on every
unit of the study) given their latent values (demo: `true_atc`/`true_ate`; the demo has no realised
sample ATC/ATE), the realised one (commuter) and the population's (commuter); methods that do not
offer it are skipped and named in the output. For the commuter process each run is also scored
against the expected effect over the units it kept (`kept`: the treated for the ATT, the controls
for the ATC, both for the ATE, with a weight; a method that drops units estimates the effect on
the ones it kept). A replicate where a method raises counts as failed
for that method (its first message is kept). Replicates run in `--workers` processes, each DuckDB
connection on one thread.

    python3 benchmarks/calibration.py --replicates 200 --workers 2

writes benchmarks/RESULTS_calibration.md and benchmarks/calibration_raw.json (--out, --raw).
Coverage carries Monte Carlo error: with N intervals at true coverage 0.95 its SD is
sqrt(0.95 * 0.05 / N) (0.034 at N = 40, 0.015 at N = 200).
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import multiprocessing
import subprocess
import datetime as dt
import math
import os
import platform
import shutil
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

from sqlmatch import api  # noqa: E402
from sqlmatch.demo_run import build_demo  # noqa: E402
from sqlmatch.engines.duckdb import DuckDBEngine  # noqa: E402
from sqlmatch.matching import METHODS  # noqa: E402
from sqlmatch.spec import load_spec  # noqa: E402

import duckdb  # noqa: E402
from commuter_sim import build_commuter  # noqa: E402

Z95 = 1.959963984540054
BALANCE_VARIANCES = False  # --balance-variances: entropy_balancing balances the variances too (set before the workers fork)


def _machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    import duckdb

    return (
        f"{platform.system()} {platform.release()}, {cpu}, {os.cpu_count()} logical CPUs (shared machine); "
        f"Python {platform.python_version()}, DuckDB {duckdb.__version__}"
    )


PROCESSES = ("demo", "commuter")


def _demo_truth(path: Path) -> dict[str, dict]:
    con = duckdb.connect(str(path), read_only=True)
    try:
        rows = con.execute("SELECT outcome, true_att, sample_att, true_atc, true_ate FROM demo_truth").fetchall()
    finally:
        con.close()
    # the demo draws no pass-world trips for its controls: no realised sample ATC/ATE
    return {
        o: dict(expected_att=float(e), sample_att=float(s), population_att=None, expected_atc=float(c), sample_atc=None, population_atc=None,
                expected_ate=float(a), sample_ate=None, population_ate=None)
        for o, e, s, c, a in rows
    }


# the units an estimand's kept-units truth averages over, by their treated flag
KEPT_UNITS = {"att": "w.treated = 1", "atc": "w.treated = 0", "ate": "TRUE"}


def _matched_truth(con, spec, estimand: str | None = None) -> dict[str, float]:
    """The commuter truth over the units this run kept in the estimand's target group (the
    treated for the ATT, the controls for the ATC, every unit for the ATE; benchmark only: it
    reads the run's kept <study>_weighted_units rows, which sqlmatch itself never pulls)."""
    group = KEPT_UNITS[estimand or spec.matching.estimand]
    row = con.execute(
        f'SELECT AVG(u.trips1 - u.trips0), AVG(u.fare1 - u.fare0), SUM(u.fare1) / SUM(u.trips1) - SUM(u.fare0) / SUM(u.trips0), '
        f'AVG(u.active1 - u.active0) FROM commuter_unit_truth AS u JOIN "{spec.work_schema}"."{spec.name}_weighted_units" AS w '
        f"ON w.unit_key = u.rider_id WHERE {group} AND w.match__weight IS NOT NULL"
    ).fetchone()
    return dict(zip(("post_trips", "post_fare", "fare_per_trip", "active_last_month"), (None if v is None else float(v) for v in row)))


def _normalise(record: dict) -> dict:
    """Records of runs before --estimand (checkpoints, raw files) carry the ATT truths by name."""
    if "estimand" not in record:
        record = dict(record, estimand="att", truth_expected=record.get("expected_att"), truth_sample=record.get("sample_att"),
                      truth_population=record.get("population_att"), truth_matched=record.get("matched_att"))
    return record


def replicate(task) -> tuple[list[dict], list[dict]]:
    """One process at one seed, every method: (records, failures)."""
    process, seed, size, methods, work, log1p, doubly_robust, estimands = task
    folder = Path(work) / f"{process}_{seed}"
    if process == "demo":
        spec_path = build_demo(folder, riders=size, seed=seed)
        database = folder / "bikeshare.duckdb"
        truth = _demo_truth(database)
    else:
        spec_path, truth = build_commuter(folder, units=size, seed=seed, threads=1)
        database = folder / "commuter.duckdb"
    records, failures = [], []
    con = duckdb.connect(str(database), config={"threads": 1})  # two workers on a shared 2-core machine
    try:
        for method, estimand in ((m, e) for m in methods for e in estimands if e in METHODS[m].estimands):
            t0 = time.perf_counter()
            try:
                spec = load_spec(spec_path).with_overrides(method=method)
                spec = dataclasses.replace(spec, matching=dataclasses.replace(spec.matching, estimand=estimand))
                if log1p:
                    # the propensity model on log(1 + x) of these features (where the model has them)
                    chosen = tuple(f for f in log1p if f in spec.propensity.features)
                    spec = dataclasses.replace(spec, propensity=dataclasses.replace(spec.propensity, log1p=chosen))
                if os.environ.get("CALIBRATION_TERMS"):  # --terms, through the environment so worker processes see it
                    spec = dataclasses.replace(spec, propensity=dataclasses.replace(spec.propensity, terms=os.environ["CALIBRATION_TERMS"]))
                if os.environ.get("CALIBRATION_COMPUTED_CUTS") and method == "coarsened_exact":
                    # --computed-cut-points: the method's default, cut points computed in the warehouse
                    spec = dataclasses.replace(spec, matching=dataclasses.replace(spec.matching, cut_points={}))
                if BALANCE_VARIANCES:
                    spec = dataclasses.replace(spec, matching=dataclasses.replace(spec.matching, balance_variances=True))
                if doubly_robust and method == "score_weighting":
                    # one run gives both: the doubly robust headline, the plain weighted difference as `unadjusted`
                    spec = dataclasses.replace(spec, regression_adjustment=True)
                results = api.run(spec, engine=DuckDBEngine(str(database), connection=con))
            except Exception as err:  # a failing method is counted, not fatal
                failures.append(dict(process=process, seed=seed, method=method, estimand=estimand, error=f"{type(err).__name__}: {str(err).splitlines()[0] if str(err) else ''}"))
                continue
            seconds = time.perf_counter() - t0
            matched = _matched_truth(con, spec, estimand) if process == "commuter" else {}
            for e in results.effects:
                tr = truth[e.outcome]
                t = dict(truth_expected=tr[f"expected_{estimand}"], truth_sample=tr[f"sample_{estimand}"], truth_population=tr[f"population_{estimand}"], truth_matched=matched.get(e.outcome))
                base = dict(process=process, seed=seed, method=method, estimand=estimand, kind=e.kind, seconds=seconds, n_treated=e.n_treated, n_control=e.n_control, **t)
                plain = e.unadjusted if method == "score_weighting" and e.unadjusted is not None else e
                records.append(dict(base, row=e.outcome, estimate=plain.estimate, se=plain.std_error, lo=plain.ci_low, hi=plain.ci_high))
                records.append(dict(base, row=f"{e.outcome} (unmatched)", estimate=e.naive.estimate, se=e.naive.std_error, lo=e.naive.ci_low, hi=e.naive.ci_high))
                if method == "score_weighting" and e.unadjusted is not None:
                    # doubly robust run: the plain weighted difference is the row above, the headline goes beside it
                    records.append(dict(base, row=f"{e.outcome} (doubly robust)", estimate=e.estimate, se=e.std_error, lo=e.ci_low, hi=e.ci_high))
                elif e.unadjusted is not None:
                    # the headline is the regression-adjusted effect: keep the plain one beside it
                    a = e.unadjusted
                    records.append(dict(base, row=f"{e.outcome} (unadjusted)", estimate=a.estimate, se=a.std_error, lo=a.ci_low, hi=a.ci_high))
                elif e.adjusted is not None:
                    a = e.adjusted
                    label = "doubly robust" if method == "score_weighting" else "regression-adjusted"
                    records.append(dict(base, row=f"{e.outcome} ({label})", estimate=a.estimate, se=a.std_error, lo=a.ci_low, hi=a.ci_high))
                if e.did is not None:
                    records.append(dict(base, row=f"{e.outcome} − {e.did_twin} (DiD)", estimate=e.did.estimate, se=e.did.std_error, lo=e.did.ci_low, hi=e.did.ci_high))
    finally:
        con.close()
        shutil.rmtree(folder, ignore_errors=True)
    return records, failures


def run(replicates: int, sizes: dict, first_seed: int, methods: list[str], processes: list[str], workers: int, work: Path, log=sys.stderr, checkpoint: Path | None = None, log1p: tuple = (), doubly_robust: bool = True, estimands: tuple = ("att",)):
    """Every (process, seed) in `workers` processes; each finished replicate is appended to
    `checkpoint` (JSON lines) so an interrupted run can still be summarised (--from-checkpoint)."""
    tasks = [(p, first_seed + k, sizes[p], methods, str(work), tuple(log1p), doubly_robust, tuple(estimands)) for k in range(replicates) for p in processes]
    records: list[dict] = []
    failures: list[dict] = []
    sink = checkpoint.open("w", encoding="utf-8") if checkpoint else None
    with multiprocessing.get_context("fork").Pool(workers) as pool:
        for i, (recs, fails) in enumerate(pool.imap_unordered(replicate, tasks), 1):
            records += recs
            failures += fails
            if sink:
                sink.write(json.dumps(dict(records=recs, failures=fails)) + "\n")
                sink.flush()
            for f in fails:
                print(f"calibration: {f['method']} ({f.get('estimand', 'att')}) failed on {f['process']} seed {f['seed']}: {f['error']}", file=log, flush=True)
            if i % 10 == 0 or i == len(tasks):
                print(f"calibration: {i}/{len(tasks)} replicates done", file=log, flush=True)
    if sink:
        sink.close()
    return records, failures


def _cover(rs, key):
    ok = [r for r in rs if r["lo"] is not None and r["hi"] is not None and r.get(key) is not None]
    if not ok:
        return math.nan, math.nan
    c = sum(r["lo"] <= r[key] <= r["hi"] for r in ok) / len(ok)
    return c, math.sqrt(c * (1 - c) / len(ok))


ESTIMANDS = ("att", "atc", "ate")


def summarise(records: list[dict], failures: list[dict]) -> list[dict]:
    groups: dict[tuple, list[dict]] = defaultdict(list)
    for r in map(_normalise, records):
        groups[(r["process"], r["method"], r["estimand"], r["row"])].append(r)
    failed = defaultdict(int)
    for f in failures:
        failed[(f["process"], f["method"], f.get("estimand", "att"))] += 1
    out = []
    for key in sorted(groups, key=lambda k: (PROCESSES.index(k[0]), k[1], ESTIMANDS.index(k[2]), k[3])):
        rs = sorted(groups[key], key=lambda r: r["seed"])
        n = len(rs)
        errors = [r["estimate"] - r["truth_expected"] for r in rs]
        bias = sum(errors) / n
        estimates = [r["estimate"] for r in rs]
        mean_est = sum(estimates) / n
        sd = math.sqrt(sum((x - mean_est) ** 2 for x in estimates) / (n - 1)) if n > 1 else math.nan
        # the truth moves with each replicate's cohort: an honest SE matches the spread of the errors
        err_mean = sum(errors) / n
        sd_err = math.sqrt(sum((x - err_mean) ** 2 for x in errors) / (n - 1)) if n > 1 else math.nan
        ses = [r["se"] for r in rs if r["se"] is not None]
        mean_se = sum(ses) / len(ses) if ses else math.nan
        cov, mc = _cover(rs, "truth_expected")
        cov_s, _ = _cover(rs, "truth_sample")
        cov_p, _ = _cover(rs, "truth_population")
        cov_m, _ = _cover(rs, "truth_matched")
        with_m = [r for r in rs if r.get("truth_matched") is not None]
        bias_m = sum(r["estimate"] - r["truth_matched"] for r in with_m) / len(with_m) if with_m else math.nan
        out.append(
            dict(
                process=key[0], method=key[1], estimand=key[2], row=key[3], kind=rs[0]["kind"], n=n, failed=failed[(key[0], key[1], key[2])],
                coverage=cov, mc_se=mc, coverage_sample=cov_s, coverage_population=cov_p, coverage_matched=cov_m, bias_matched=bias_m,
                bias=bias, bias_se=sd / math.sqrt(n) if n > 1 else math.nan,
                bias_over_se=bias / mean_se if mean_se else math.nan,
                mean_truth=sum(r["truth_expected"] for r in rs) / n, sd=sd, mean_se=mean_se,
                sd_error=sd_err, se_over_sd=mean_se / sd_err if sd_err else math.nan,
                seconds=sum(r["seconds"] for r in rs) / n,
            )
        )
    return out


def _f(x, fmt):
    return "n/a" if x is None or (isinstance(x, float) and math.isnan(x)) else format(x, fmt)


def _commit() -> str:
    try:
        sha = subprocess.run(["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"], capture_output=True, text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", str(REPO), "status", "--porcelain", "--untracked-files=no"], capture_output=True, text=True).stdout.strip()
        return sha + (" (with uncommitted changes)" if dirty else "")
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


def render(summary, failures, args, seconds: float, command: str, skipped: dict | None = None) -> str:
    skipped = skipped or {}
    lines = [
        "# Calibration of the 95% intervals on two simulated bike-shares",
        "",
        f"- Date: {dt.date.today().isoformat()}; commit {_commit()}",
        f"- Machine: {_machine()}; {args.workers} worker processes, DuckDB on 1 thread each",
        f"- Command: `{command}`",
        f"- Replicates: {args.replicates} seeds per process ({args.first_seed} to {args.first_seed + args.replicates - 1}); "
        f"demo {args.riders:,} riders, commuter {args.units:,} riders; wall time {seconds / 60:.1f} min"
        + (" (summarised from the checkpoint of an interrupted run: see the `ok` column for the replicates per cell)" if args.from_checkpoint else ""),
        "- Methods at their default settings: coarsened_exact with each spec's cut points; score_bins with subclasses "
        "chosen from the data (split until the score and the model's numeric features are balanced, |t| <= 1.96 per subclass and pooled), common "
        "support, propensity on `matching.on`; nearest_neighbour 1:1 with replacement, logit distance, caliper 0.2 SD, "
        "Abadie-Imbens (2006) variance and (2011) bias correction. score_weighting with odds weights, common support, no trimming or truncation. "
        "entropy_balancing on the means of `matching.on`" + (" and of the terms the propensity model's stepwise search adds" if (args.terms or "stepwise") == "stepwise" else "") + (" and the variances of its numeric features (--balance-variances)" if args.balance_variances else "") + ". "
        "Count, sum and 0/1 outcomes of coarsened_exact and score_bins: the headline row is regression-adjusted within strata "
        "(the default since this run's commit; `(unadjusted)` rows hold the plain stratified comparison), ratio outcomes are not adjusted."
        + (f" Propensity terms: {args.terms} (--terms)." if args.terms else "")
        + (" coarsened_exact with cut points computed in the warehouse, not the specs' (--computed-cut-points)." if args.computed_cut_points else "")
        + (f" Propensity model on log(1 + x) of {', '.join(args.log1p)} (--log1p)." if args.log1p else "")
        + (
            " score_weighting run with effect.regression_adjustment = true: its `(doubly robust)` rows are the weighted regression "
            "adjustment (the outcome regressed on the score model's columns in each group with the weights, predictions averaged "
            "over the target units), the plain rows the weighted difference of the same run."
            if args.doubly_robust and "score_weighting" in (args.methods or list(METHODS))
            else ""
        ),
        f"- Estimands (`[matching] estimand`): {', '.join(e.upper() for e in args.estimand)}."
        + ("".join(f" Skipped for the {e.upper()} (the method does not offer it): {', '.join(ms)}." for e, ms in skipped.items() if ms)),
        "- Truths, each of the row's estimand (ATT: over the cohort; ATC: over the study's controls; ATE: over both). "
        "`expected`: the effect on the target units given their latent values, averaged over the post-window "
        "randomness (the demo's `true_att`, `true_atc`, `true_ate`; what the per-stratum variance formula targets). `sample`: the realised mean of "
        "Y(1) − Y(0) over the target units from both simulated potential outcomes (the demo has it for the ATT only). `population`: the effect over a 1,000,000-rider "
        "population (commuter only; the demo records none). `kept`: the expected effect over only the target "
        "units the run kept (commuter only; the treated for the ATT, the controls for the ATC, all for the ATE): with a heterogeneous effect a method that drops units estimates "
        "the effect on the ones it kept, as the report says. Ratio outcomes: the ratio of the sums over the target units in each world, then the difference.",
        "",
        "Coverage: share of the 95% intervals that contain the truth (target 0.93–0.97; Monte Carlo SE in brackets). "
        "Bias: mean of estimate − expected truth (± its Monte Carlo SE); bias/SE divides it by the mean SE. "
        "SD of errors: SD of estimate − expected truth across replicates (the truth moves with each cohort); SE/SD: mean SE "
        "over the SD of errors (1 = honest). "
        "Failed: replicates where the method raised (no estimate).",
        "",
        "| process | method | estimand | estimate | kind | ok | failed | coverage (expected) | coverage (sample) | coverage (population) | coverage (kept) | bias | bias vs kept | bias/SE | mean truth | SD of estimates | SD of errors | mean SE | SE/SD |",
        "|---|---|---|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    flagged = []
    for s in summary:
        if "(unmatched)" in s["row"]:
            continue
        lines.append(
            f"| {s['process']} | {s['method']} | {s['estimand'].upper()} | {s['row']} | {s['kind']} | {s['n']} | {s['failed']} | {_f(s['coverage'], '.3f')} ({_f(s['mc_se'], '.3f')}) | "
            f"{_f(s['coverage_sample'], '.3f')} | {_f(s['coverage_population'], '.3f')} | {_f(s['coverage_matched'], '.3f')} | {s['bias']:+.4f} (± {_f(s['bias_se'], '.4f')}) | {_f(s['bias_matched'], '+.4f')} | {_f(s['bias_over_se'], '+.2f')} | "
            f"{s['mean_truth']:.4f} | {_f(s['sd'], '.4f')} | {_f(s['sd_error'], '.4f')} | {_f(s['mean_se'], '.4f')} | {_f(s['se_over_sd'], '.2f')} |"
        )
        if not 0.93 <= s["coverage"] <= 0.97:
            flagged.append(s)
    failed_cells = sorted({(f["process"], f["method"], f.get("estimand", "att")) for f in failures})
    if failed_cells:
        lines += ["", "Failures (first message per cell):", ""]
        for cell in failed_cells:
            fs = [f for f in failures if (f["process"], f["method"], f.get("estimand", "att")) == cell]
            lines.append(f"- {cell[0]} / `{cell[1]}` / {cell[2].upper()}: {len(fs)} of {args.replicates} replicates; {fs[0]['error']}")
    lines += ["", "Cells outside 0.93–0.97 (coverage of the expected truth):", ""]
    lines += [f"- {s['process']} / {s['method']} / {s['estimand'].upper()} / {s['row']}: {s['coverage']:.3f}" for s in flagged] or ["- none"]
    # the SE against the spread of the errors, in both directions (0.9-1.1: our band, about the
    # Monte Carlo error of an SD from 100-200 replicates)
    narrow = [s for s in summary if "(unmatched)" not in s["row"] and s["se_over_sd"] < 0.9]
    wide = [s for s in summary if "(unmatched)" not in s["row"] and s["se_over_sd"] > 1.1]
    lines += ["", "Mean SE against the SD of the errors (SE/SD; band 0.9–1.1, about the Monte Carlo error of an SD at these replicate counts):", ""]
    lines += ["- too narrow (SE/SD < 0.9): " + (", ".join(f"{s['process']} / {s['method']} / {s['estimand'].upper()} / {s['row']} {s['se_over_sd']:.2f}" for s in narrow) or "none")]
    lines += ["- too wide (SE/SD > 1.1): " + (", ".join(f"{s['process']} / {s['method']} / {s['estimand'].upper()} / {s['row']} {s['se_over_sd']:.2f}" for s in wide) or "none")]
    lines += ["", "Unmatched (naive) comparisons, for reference (biased by design):", "",
              "| process | estimand | estimate | coverage (expected) | bias |", "|---|---|---|---:|---:|"]
    seen = set()
    for s in summary:
        if "(unmatched)" in s["row"] and (s["process"], s["estimand"], s["row"]) not in seen:
            seen.add((s["process"], s["estimand"], s["row"]))
            lines.append(f"| {s['process']} | {s['estimand'].upper()} | {s['row']} | {_f(s['coverage'], '.3f')} | {s['bias']:+.4f} |")
    lines += [""]
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=200, help="seeds per process (default 200)")
    parser.add_argument("--riders", type=int, default=12_000, help="riders per demo warehouse (default 12,000)")
    parser.add_argument("--units", type=int, default=10_000, help="riders per commuter warehouse (default 10,000)")
    parser.add_argument("--first-seed", type=int, default=1, help="first seed (default 1)")
    parser.add_argument("--methods", nargs="*", default=None, help="methods to run (default: every method in sqlmatch.matching.METHODS)")
    parser.add_argument("--processes", nargs="*", default=list(PROCESSES), choices=PROCESSES)
    parser.add_argument("--terms", choices=["linear", "stepwise"], default=None, help="propensity.terms for every study (default: the specs' own)")
    parser.add_argument("--computed-cut-points", action="store_true", help="coarsened_exact without the specs' cut points: equal-count cut points computed in the warehouse (the method's default)")
    parser.add_argument("--log1p", nargs="*", default=[], help="fit the propensity model on log(1 + x) of these features (default: the specs' own model)")
    parser.add_argument("--balance-variances", action="store_true", help="entropy_balancing: balance the numeric features' variances too")
    parser.add_argument("--no-doubly-robust", dest="doubly_robust", action="store_false", help="score_weighting without its doubly robust rows (they are on by default)")
    parser.add_argument("--estimand", nargs="+", default=["att"], choices=ESTIMANDS, help="[matching] estimand of every run (several: each in turn on the same data; default att)")
    parser.add_argument("--workers", type=int, default=2, help="worker processes (default 2; the machine is shared)")
    parser.add_argument("--out", type=Path, default=REPO / "benchmarks" / "RESULTS_calibration.md")
    parser.add_argument("--raw", type=Path, default=REPO / "benchmarks" / "calibration_raw.json")
    parser.add_argument("--checkpoint", type=Path, default=Path(tempfile.gettempdir()) / "sqlmatch_calibration.jsonl", help="JSON lines, one per finished replicate")
    parser.add_argument("--from-checkpoint", action="store_true", help="summarise the checkpoint of an interrupted run instead of running (--replicates: the count it was started with)")
    args = parser.parse_args(argv)
    if args.terms:
        os.environ["CALIBRATION_TERMS"] = args.terms
    if args.computed_cut_points:
        os.environ["CALIBRATION_COMPUTED_CUTS"] = "1"
    global BALANCE_VARIANCES
    BALANCE_VARIANCES = args.balance_variances
    methods = args.methods or list(METHODS)
    skipped = {e: [m for m in methods if e not in METHODS[m].estimands] for e in args.estimand}
    for e, ms in skipped.items():
        if ms:
            print(f"calibration: skipping {', '.join(ms)} for the {e.upper()} (not among the method's estimands)", file=sys.stderr, flush=True)
    command = "python3 benchmarks/calibration.py " + " ".join(argv if argv is not None else sys.argv[1:])
    t0 = time.perf_counter()
    if args.from_checkpoint:
        records, failures = [], []
        for line in args.checkpoint.read_text(encoding="utf-8").splitlines():
            part = json.loads(line)
            records += part["records"]
            failures += part["failures"]
        seconds = math.nan
    else:
        with tempfile.TemporaryDirectory(prefix="sqlmatch_calibration_") as work:
            records, failures = run(args.replicates, {"demo": args.riders, "commuter": args.units}, args.first_seed, methods, args.processes, args.workers, Path(work), checkpoint=args.checkpoint, log1p=args.log1p, doubly_robust=args.doubly_robust, estimands=tuple(args.estimand))
        seconds = time.perf_counter() - t0
    summary = summarise(records, failures)
    text = render(summary, failures, args, seconds, command.strip(), skipped)
    args.out.write_text(text, encoding="utf-8")
    args.raw.write_text(json.dumps(dict(command=command.strip(), commit=_commit(), machine=_machine(), seconds=seconds, summary=summary, failures=failures, records=records), separators=(",", ":"), default=str), encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
