"""Report step against the SQL of the same run: how long rendering results.json, report.md,
report.html and balance.svg takes next to the study's SQL, on the demo warehouse.

A script, not a test: it measures, it never asserts on time. In one process it builds the demo
warehouse (--riders, default 200,000), runs the study once per --methods (the SQL, through
api.run), then writes the reports --repeats times and prints, per method, the SQL seconds, the
median report seconds and their ratio.

    PYTHONPATH=$PWD python3 benchmarks/report_render.py --riders 200000 --workdir /tmp/render
"""

from __future__ import annotations

import argparse
import statistics
import time
from pathlib import Path

from sqlmatch import api
from sqlmatch.demo_run import DEMO_DATABASE, build_demo, read_truth
from sqlmatch.engines.duckdb import DuckDBEngine


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--riders", type=int, default=200_000)
    p.add_argument("--workdir", required=True)
    p.add_argument("--methods", default="coarsened_exact,score_bins", help="comma-separated (nearest_neighbour refuses the candidate join above ~50,000 riders at its defaults)")
    p.add_argument("--repeats", type=int, default=5)
    args = p.parse_args()
    work = Path(args.workdir)
    spec_path = build_demo(work, args.riders, 20260301)
    print(f"demo warehouse: {args.riders:,} riders in {work / DEMO_DATABASE}")
    print(f"{'method':<20} {'SQL s':>8} {'report s (median)':>18} {'report / SQL':>13}")
    for method in args.methods.split(","):
        spec = api.load(spec_path).with_overrides(method=method)
        t0 = time.perf_counter()
        results = api.run(spec, database=str(work / DEMO_DATABASE), keep_tables=False)
        sql = time.perf_counter() - t0
        with DuckDBEngine(str(work / DEMO_DATABASE)) as engine:
            results.demo_truth = read_truth(engine)
        times = []
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            api.write_results(results, work / f"out_{method}")
            times.append(time.perf_counter() - t0)
        report = statistics.median(times)
        print(f"{method:<20} {sql:8.2f} {report:18.3f} {report / sql:13.3f}")


if __name__ == "__main__":
    main()
