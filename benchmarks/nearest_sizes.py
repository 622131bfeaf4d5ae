"""Nearest-neighbour matching on the demo warehouse at one size: the score distance (sorted search)
and the Mahalanobis distances (join of all pairs in adjacent score bins, blocked on age band and
home district), each run once through the runner on DuckDB. Prints per run the pairs the join
compares (or would), the time of the whole run and of its slowest steps, rows fetched, and the
enrolled units matched. A script, not a test.

    python3 benchmarks/nearest_sizes.py 100000 score,greedy,maha,rank --workdir /tmp/nn_sizes
"""

from __future__ import annotations

import argparse
import sys
import time
import tomllib
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from sqlmatch.demo_run import build_demo  # noqa: E402
from sqlmatch.engines.duckdb import DuckDBEngine  # noqa: E402
from sqlmatch.plan import build_plan  # noqa: E402
from sqlmatch.runner import run_plan  # noqa: E402
from sqlmatch.spec import parse_spec  # noqa: E402

CONFIGS = {
    "score": {},
    "greedy": {"reuse_controls": False},
    "maha": {"distance": "mahalanobis", "block_on": ["age_band", "home_district"], "max_candidate_pairs": 10**10},
    "rank": {"distance": "rank_mahalanobis", "block_on": ["age_band", "home_district"], "max_candidate_pairs": 10**10},
}
MODEL = {"features": ["pre_trips", "pre_minutes", "pre_active_days", "age_band", "home_district"], "log1p": ["pre_trips", "pre_minutes"]}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("riders", type=int)
    parser.add_argument("configs", help=f"comma-separated: {', '.join(CONFIGS)}")
    parser.add_argument("--workdir", default="/tmp/sqlmatch_nearest_sizes")
    parser.add_argument("--seed", type=int, default=20260301)
    args = parser.parse_args(argv)
    folder = Path(args.workdir) / str(args.riders)
    if not (folder / "bikeshare.duckdb").exists():
        build_demo(folder, riders=args.riders, seed=args.seed)
    for name in args.configs.split(","):
        raw = tomllib.loads((REPO / "demo_warehouse" / "annual_pass.toml").read_text())
        raw["study"]["database"] = str(folder / "bikeshare.duckdb")
        raw["study"]["name"] = f"sizes_{name}"
        raw["matching"] = {"method": "nearest_neighbour", **CONFIGS[name]}
        if name in ("maha", "rank"):
            raw["propensity"] = MODEL
        spec = parse_spec(raw)
        t0 = time.perf_counter()
        with DuckDBEngine(raw["study"]["database"]) as engine:
            out = run_plan(build_plan(spec, "duckdb"), spec, engine, keep_tables=False)
        s = out.results["matching_summary"].one()
        slowest = {k: round(v, 2) for k, v in sorted(out.timings.items(), key=lambda x: -x[1])[:4]}
        print(
            f"{args.riders} {name}: {time.perf_counter() - t0:.1f} s, pairs {out.results['candidate_pairs'].one()['n_candidate_pairs']:,}, "
            f"rows_fetched {out.rows_fetched}, matched {s['n_treated_matched']:,} / {s['n_treated']:,}, cut short "
            f"{s['n_treated_cut_short']}, rounds {out.repeats.get('nearest_neighbour_rounds', '-')}, slowest steps {slowest}",
            flush=True,
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
