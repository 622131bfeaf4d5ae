"""Nearest neighbours without replacement: the greedy rounds over the sorted candidates (8 controls
each side of an enrolled unit in score order) against the greedy rounds over every candidate pair
(the join of all pairs in adjacent caliper-wide score bins), on the demo warehouse at a few sizes,
both on the scores of one propensity fit.
A script, not a test: it prints a Markdown table of what it measured.

For each size and block setting it reports the pairs each route chose, how many differ, the total
and mean distance of each, the treated units the sorted route counts as cut short
(n_treated_cut_short; 0 means the two must agree), the rounds each needed, and the time of the
matching steps of each route measured in the same process. Both routes run the same plan steps up
to the candidates.

    python3 benchmarks/nearest_greedy.py --riders 30000,100000 --workdir /tmp/nn_greedy
"""

from __future__ import annotations

import argparse
import sys
import time
import tomllib
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

import duckdb  # noqa: E402

from sqlmatch.demo_run import build_demo  # noqa: E402
from sqlmatch.engines.duckdb import DuckDBEngine  # noqa: E402
from sqlmatch.matching import nearest_neighbour  # noqa: E402
from sqlmatch.plan import build_plan  # noqa: E402
from sqlmatch.runner import run_plan  # noqa: E402
from sqlmatch.spec import parse_spec  # noqa: E402

MATCHING_STEPS = ("nearest_neighbour_candidates", "nearest_neighbour_rounds", "pairs")


MODELS = {
    # the demo's numeric features and both categories: few exact ties in the score
    "full": {"features": ["pre_trips", "pre_minutes", "pre_active_days", "age_band", "home_district"], "log1p": ["pre_trips", "pre_minutes"]},
    # one count and one category: every rider with the same count and band has the same score
    "tied": {"features": ["pre_trips", "age_band"]},
    # "tied", with only one never-enrolled rider in 20 kept: the enrolled outnumber the controls at
    # many scores, so some find all controls looked at on a side taken (cut short)
    "scarce": {"features": ["pre_trips", "age_band"]},
}
FILTERS = {"scarce": ["(pass_bought_on IS NOT NULL OR rider_id % 20 = 0)"]}


def spec_for(database: str, study: str, block_on: list[str], model: str):
    raw = tomllib.loads((REPO / "demo_warehouse" / "annual_pass.toml").read_text())
    raw["study"]["database"] = database
    raw["study"]["name"] = study
    raw["matching"] = {"method": "nearest_neighbour", "reuse_controls": False, "block_on": block_on, "max_candidate_pairs": 10**10}
    raw["propensity"] = MODELS[model]
    raw["eligibility"]["filters"] += FILTERS.get(model, [])
    return parse_spec(raw)


def run_route(database: str, route: str, block_on: list[str], model: str, fitted=None) -> dict:
    """One route's run; `fitted`: the propensity model of an earlier run, so both routes match on the
    same scores (a refit adds up in another order and moves near-ties in the last bits)."""
    spec = spec_for(database, f"greedy_{route}", block_on, model)
    original = nearest_neighbour.search_route
    nearest_neighbour.search_route = lambda m: route
    try:
        with DuckDBEngine(database) as engine:
            out = run_plan(build_plan(spec, "duckdb", model=fitted), spec, engine)
    finally:
        nearest_neighbour.search_route = original
    with duckdb.connect(database, read_only=True) as con:
        pairs = con.execute(f"SELECT treated_key, control_key, distance FROM sqlmatch.{spec.name}_pairs").fetchall()
        n_candidates = con.execute(f"SELECT COUNT(*) FROM sqlmatch.{spec.name}_nearest_neighbour_rounds").fetchone()[0]
    summary = out.results["matching_summary"].one()
    return {
        "pairs": {(int(t), int(c)): float(d) for t, c, d in pairs},
        "candidates": n_candidates,
        "seconds": sum(out.timings.get(s, 0.0) for s in MATCHING_STEPS),
        "rounds": out.repeats.get("nearest_neighbour_rounds"),
        "cut_short": int(summary["n_treated_cut_short"]),
        "n_treated": int(summary["n_treated"]),
        "join_pairs": int(out.results["candidate_pairs"].one()["n_candidate_pairs"]),
        "model": out.model or fitted,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--riders", default="30000,100000")
    parser.add_argument("--workdir", default="/tmp/sqlmatch_nearest_greedy")
    parser.add_argument("--seed", type=int, default=20260301)
    parser.add_argument("--models", default="full,tied", help=f"propensity models: {', '.join(MODELS)}")
    args = parser.parse_args(argv)
    print("| riders | model | block_on | enrolled | pairs in the join | candidate rows: all pairs / sorted | pairs chosen: all / sorted "
          "| pairs of the sorted route not in the other | total distance: all / sorted | ratio | cut short | rounds: all / sorted "
          "| matching steps: all / sorted |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|---|", flush=True)
    for riders in [int(x) for x in args.riders.split(",")]:
        folder = Path(args.workdir) / str(riders)
        if not (folder / "bikeshare.duckdb").exists():
            build_demo(folder, riders=riders, seed=args.seed)
        database = str(folder / "bikeshare.duckdb")
        for model, block_on in [(m, b) for m in args.models.split(",") for b in ([], ["age_band"])]:
            t0 = time.perf_counter()
            s = run_route(database, "sorted", block_on, model)
            a = run_route(database, "all_pairs", block_on, model, fitted=s["model"])
            differ = len(set(s["pairs"]) ^ set(a["pairs"])) // 2
            total_s, total_a = sum(s["pairs"].values()), sum(a["pairs"].values())
            print(
                f"| {riders:,} | {model} | {', '.join(block_on) or '(none)'} | {s['n_treated']:,} | {a['join_pairs']:,} | {a['candidates']:,} / {s['candidates']:,} "
                f"| {len(a['pairs']):,} / {len(s['pairs']):,} | {len(set(s['pairs']) - set(a['pairs'])):,} | {total_a:.6f} / {total_s:.6f} "
                f"| {total_s / total_a if total_a else float('nan'):.6f} | {s['cut_short']:,} | {a['rounds']} / {s['rounds']} | {a['seconds']:.2f} s / {s['seconds']:.2f} s |",
                flush=True,
            )
            print(f"{riders} {model} {block_on}: {time.perf_counter() - t0:.0f} s", file=sys.stderr, flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
