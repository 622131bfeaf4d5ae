"""Calibration of sqlmatch's intervals on the simulated bike-share (a script, not a test).

For each of N seeds the demo warehouse is generated afresh (sqlmatch.demo_run.build_demo) and the
demo study is run with every matching method of sqlmatch.matching.METHODS. Each 95% interval is
checked against the simulation's expected effect on the cohort (`demo_truth.true_att`), and the
estimates' bias is averaged. A method that fails on the demo spec is listed with its error and
left out. Also shown: the difference-in-differences of post_trips (twin pre_trips) against the
same truth, and the unmatched (naive) comparison for reference.

    python3 benchmarks/calibration.py --replicates 200 --riders 12000

writes benchmarks/RESULTS_calibration.md (use --out to write elsewhere). Coverage carries Monte
Carlo error: with N intervals at true coverage 0.95 its SD is sqrt(0.95 * 0.05 / N) (0.034 at
N = 40, 0.015 at N = 200).
"""

from __future__ import annotations

import argparse
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

from sqlmatch import api  # noqa: E402
from sqlmatch.demo_run import build_demo, read_truth  # noqa: E402
from sqlmatch.engines.duckdb import DuckDBEngine  # noqa: E402
from sqlmatch.matching import METHODS  # noqa: E402
from sqlmatch.spec import load_spec  # noqa: E402

Z95 = 1.959963984540054


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


def run(replicates: int, riders: int, first_seed: int, methods: list[str], work: Path, log=sys.stderr):
    """Returns (records, failures): one record per (seed, method, row) with the estimate, interval
    and truth; failures maps a method to its first error message."""
    records: list[dict] = []
    failures: dict[str, str] = {}
    for k in range(replicates):
        seed = first_seed + k
        folder = work / f"seed_{seed}"
        spec_path = build_demo(folder, riders=riders, seed=seed)
        with DuckDBEngine(str(folder / "bikeshare.duckdb")) as engine:
            truth = read_truth(engine)
        for method in methods:
            if method in failures:
                continue
            try:
                spec = load_spec(spec_path).with_overrides(method=method)
                results = api.run(spec)
            except Exception as err:  # a method that does not run on the demo is reported, not fatal
                failures[method] = f"{type(err).__name__}: {str(err).splitlines()[0] if str(err) else ''}"
                print(f"calibration: {method} failed on seed {seed}: {failures[method]}", file=log, flush=True)
                continue
            for e in results.effects:
                t = truth[e.outcome]
                records.append(dict(seed=seed, method=method, row=e.outcome, kind=e.kind, truth=t, estimate=e.estimate, se=e.std_error, lo=e.ci_low, hi=e.ci_high))
                records.append(dict(seed=seed, method=method, row=f"{e.outcome} (unmatched)", kind=e.kind, truth=t, estimate=e.naive.estimate, se=e.naive.std_error, lo=e.naive.ci_low, hi=e.naive.ci_high))
                if e.did is not None:
                    records.append(
                        dict(seed=seed, method=method, row=f"{e.outcome} − {e.did_twin} (DiD)", kind=e.kind, truth=t, estimate=e.did.estimate, se=e.did.std_error, lo=e.did.ci_low, hi=e.did.ci_high)
                    )
        shutil.rmtree(folder, ignore_errors=True)
        print(f"calibration: seed {seed} done ({k + 1}/{replicates})", file=log, flush=True)
    return records, failures


def summarise(records: list[dict]) -> list[dict]:
    groups: dict[tuple[str, str], list[dict]] = defaultdict(list)
    order: list[tuple[str, str]] = []
    for r in records:
        key = (r["method"], r["row"])
        if key not in groups:
            order.append(key)
        groups[key].append(r)
    out = []
    for key in order:
        rs = groups[key]
        n = len(rs)
        ok = [r for r in rs if r["lo"] is not None and r["hi"] is not None]
        cover = sum(r["lo"] <= r["truth"] <= r["hi"] for r in ok) / len(ok) if ok else math.nan
        errors = [r["estimate"] - r["truth"] for r in rs]
        bias = sum(errors) / n
        estimates = [r["estimate"] for r in rs]
        mean_est = sum(estimates) / n
        sd = math.sqrt(sum((x - mean_est) ** 2 for x in estimates) / (n - 1)) if n > 1 else math.nan
        ses = [r["se"] for r in rs if r["se"] is not None]
        mean_se = sum(ses) / len(ses) if ses else math.nan
        mean_truth = sum(r["truth"] for r in rs) / n
        out.append(
            dict(
                method=key[0],
                row=key[1],
                kind=rs[0]["kind"],
                n=n,
                coverage=cover,
                mc_se=math.sqrt(cover * (1 - cover) / len(ok)) if ok else math.nan,
                bias=bias,
                bias_se=sd / math.sqrt(n) if n > 1 else math.nan,
                mean_truth=mean_truth,
                sd=sd,
                mean_se=mean_se,
            )
        )
    return out


def render(summary, failures, args, seconds: float, command: str) -> str:
    lines = [
        "# Calibration of the 95% intervals on the simulated bike-share",
        "",
        f"- Date: {dt.date.today().isoformat()}",
        f"- Machine: {_machine()}",
        f"- Command: `{command}`",
        f"- Replicates: {args.replicates} seeds ({args.first_seed} to {args.first_seed + args.replicates - 1}), "
        f"{args.riders:,} riders each; wall time {seconds / 60:.1f} min",
        "- Truth: `demo_truth.true_att`, the effect the simulation builds in, averaged over its trip-level randomness "
        "given the cohort's riders (post_trips: exactly 4.5 extra trips).",
        "",
        "Coverage: share of the 95% intervals that contain the truth (nominal 0.95; Monte Carlo SE in brackets). "
        "Bias: mean of estimate − truth (± its Monte Carlo SE). SD of estimates vs mean SE: an honest standard error "
        "matches the spread of the estimates over replicates.",
        "",
        "| method | estimate | kind | replicates | coverage | bias | mean truth | SD of estimates | mean SE |",
        "|---|---|---|---:|---:|---:|---:|---:|---:|",
    ]
    for s in summary:
        lines.append(
            f"| {s['method']} | {s['row']} | {s['kind']} | {s['n']} | {s['coverage']:.3f} ({s['mc_se']:.3f}) | "
            f"{s['bias']:+.4f} (± {s['bias_se']:.4f}) | {s['mean_truth']:.4f} | {s['sd']:.4f} | {s['mean_se']:.4f} |"
        )
    if failures:
        lines += ["", "Methods left out because they failed on the demo spec:", ""]
        lines += [f"- `{m}`: {msg}" for m, msg in sorted(failures.items())]
    lines += [
        "",
        "Notes:",
        "",
        "- The unmatched rows compare all enrolled with all non-enrolled riders; the simulation makes heavier riders "
        "buy the pass, so they are biased upwards by design and shown only for reference.",
        "- The difference-in-differences row estimates the effect on post_trips − pre_trips against the same truth: "
        "pre_trips counts 6 months and post_trips 3, and the differences are taken as they are.",
        "",
    ]
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=200, help="number of seeds (default 200)")
    parser.add_argument("--riders", type=int, default=12_000, help="riders per simulated warehouse (default 12,000)")
    parser.add_argument("--first-seed", type=int, default=1, help="first seed (default 1)")
    parser.add_argument("--methods", nargs="*", default=None, help="methods to run (default: every method in sqlmatch.matching.METHODS)")
    parser.add_argument("--out", type=Path, default=REPO / "benchmarks" / "RESULTS_calibration.md")
    args = parser.parse_args(argv)
    methods = args.methods or list(METHODS)
    command = "python3 benchmarks/calibration.py " + " ".join(argv if argv is not None else sys.argv[1:])
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="sqlmatch_calibration_") as work:
        records, failures = run(args.replicates, args.riders, args.first_seed, methods, Path(work))
    seconds = time.perf_counter() - t0
    text = render(summarise(records), failures, args, seconds, command.strip())
    args.out.write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
