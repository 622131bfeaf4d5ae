"""Coverage of the pooled interval of `--cohorts` on a simulated bike-share with a known effect,
where the never-enrolled controls serve in every month.

Simulation (numpy draws, DuckDB stores; row-level data in Python is fine in a benchmark):
- riders in 3 age bands, all signed up in 2024; each has a latent monthly riding rate
  lambda_i ~ Gamma(shape 1.5, scale 2), the same every month (so a rider's counts in two months,
  and two cohorts' outcome windows, are strongly correlated);
- a monthly pass purchase in January..April 2026 with hazard 0.15 / 0.25 / 0.35 by age band
  (take-up depends on the age band only, so exact matching on it leaves no confounding); the
  others never buy;
- trips per month ~ Poisson(lambda_i + EFFECT x [bought in an earlier month]): a pass adds EFFECT
  trips a month from the month after the purchase.
Study: cohorts 2026-01..2026-04, pre 3 months, post 2, controls never enrolled by the end of the
post window (the default pool), coarsened exact matching on the age band. The effect on every
cohort's enrolled is EFFECT x post = 2.0 trips exactly, so the pooled truth is 2.0 whatever the
weights.

Per replicate: the pooled 95% interval sqlmatch reports now (fixed weights by enrolled count,
covariances between months from per-unit influence terms in SQL) and the one it reported before
(inverse-variance pooling of the months as if independent, estimators/pooling.pool), both from the
same run.

    PYTHONPATH=. python3 benchmarks/cohort_pooling.py --replicates 100 --riders 1500 --out benchmarks/RESULTS_cohort_pooling.md
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import tempfile
import time
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd

EFFECT = 1.0  # extra trips a month with a pass
POST = 2
TRUTH = EFFECT * POST
BANDS = (("18-34", 0.15), ("35-54", 0.25), ("55+", 0.35))  # (age band, monthly purchase hazard)
PURCHASE_MONTHS = pd.date_range("2026-01-01", "2026-04-01", freq="MS")
TRIP_MONTHS = pd.date_range("2025-10-01", "2026-06-01", freq="MS")  # first pre month .. last post month
COHORTS = "2026-01:2026-04"

SPEC = f"""
[study]
name = "pooled_sim"
work_schema = "sqlmatch"
database = "sim.duckdb"

[units]
table = "riders"
key = "rider_id"
enrolled_on = "pass_bought_on"

[events]
table = "trips"
unit_key = "rider_id"
time = "started_at"

[treatment]
cohort = "2026-01"

[windows]
unit = "month"
pre = 3
post = {POST}

[[features]]
name = "pre_trips"
aggregate = "count"

[[features]]
name = "age_band"
aggregate = "attribute"
attribute = "age_band"
type = "categorical"

[[outcomes]]
name = "post_trips"
aggregate = "count"

[matching]
method = "coarsened_exact"
on = ["age_band"]

[report]
min_cell_size = 1
"""


def simulate(riders: int, seed: int) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    band = rng.integers(0, len(BANDS), riders)
    hazard = np.array([h for _, h in BANDS])[band]
    bought = np.full(riders, -1)  # index into PURCHASE_MONTHS, -1: never
    for m in range(len(PURCHASE_MONTHS)):
        buys = (bought < 0) & (rng.random(riders) < hazard)
        bought[buys] = m
    rate = rng.gamma(1.5, 2.0, riders)
    rows = []
    for j, month in enumerate(TRIP_MONTHS):
        # a pass bought in month b adds EFFECT from month b + 1 on
        has_pass = (bought >= 0) & (PURCHASE_MONTHS[np.maximum(bought, 0)] < month)
        counts = rng.poisson(rate + EFFECT * has_pass)
        who = np.repeat(np.arange(riders), counts)
        days = month.days_in_month
        seconds = rng.integers(0, days * 86400, len(who))
        rows.append(pd.DataFrame({"rider_id": who + 1, "started_at": month + pd.to_timedelta(seconds, unit="s")}))
    trips = pd.concat(rows, ignore_index=True)
    trips.insert(0, "trip_id", np.arange(1, len(trips) + 1))
    days = rng.integers(0, 28, riders)
    pass_day = [None if b < 0 else (PURCHASE_MONTHS[b] + pd.Timedelta(days=int(d))).date() for b, d in zip(bought, days)]
    units = pd.DataFrame(
        {
            "rider_id": np.arange(1, riders + 1),
            "age_band": [BANDS[b][0] for b in band],
            "signup_date": pd.Timestamp("2024-01-01").date(),
            "pass_bought_on": pass_day,
        }
    )
    return units, trips


def build(folder: Path, riders: int, seed: int) -> Path:
    units, trips = simulate(riders, seed)
    con = duckdb.connect(str(folder / "sim.duckdb"), config={"threads": 1})
    try:
        con.execute("CREATE TABLE riders AS SELECT rider_id, age_band, CAST(signup_date AS DATE) AS signup_date, CAST(pass_bought_on AS DATE) AS pass_bought_on FROM units")
        con.execute("CREATE TABLE trips AS SELECT trip_id, rider_id, CAST(started_at AS TIMESTAMP) AS started_at FROM trips")
    finally:
        con.close()
    spec = folder / "pooled_sim.toml"
    spec.write_text(SPEC)
    return spec


def replicate(riders: int, seed: int) -> dict:
    from sqlmatch import api
    from sqlmatch.estimators.pooling import pool

    with tempfile.TemporaryDirectory() as tmp:
        spec_path = build(Path(tmp), riders, seed)
        combined = api.run_cohorts(api.load(spec_path), COHORTS, keep_tables=False)
    p = next(x for x in combined.pooled if x.outcome == "post_trips")
    effects = [r.effect("post_trips") for r in combined.cohorts]
    old = pool([e.estimate for e in effects], [e.std_error for e in effects])
    cov = np.asarray(combined.covariances["post_trips"])
    corr = cov / np.sqrt(np.outer(np.diag(cov), np.diag(cov)))
    return {
        "seed": seed,
        "new": [p.estimate, p.std_error, p.ci_low, p.ci_high],
        "old": [old.estimate, old.std_error, old.ci_low, old.ci_high],
        "se_if_independent": p.std_error_if_independent,
        "n_treated": [e.n_treated for e in effects],
        "n_control": [e.n_control for e in effects],
        "mean_corr": float(corr[np.triu_indices(len(effects), 1)].mean()),
        "rows_fetched": combined.rows_fetched,
    }


def summarise(records: list[dict]) -> dict:
    out = {}
    for key in ("new", "old"):
        est = np.array([r[key][0] for r in records])
        se = np.array([r[key][1] for r in records])
        cover = np.array([r[key][2] <= TRUTH <= r[key][3] for r in records])
        n = len(records)
        out[key] = {
            "coverage": float(cover.mean()),
            "coverage_mc_se": float(math.sqrt(cover.mean() * (1 - cover.mean()) / n)),
            "bias": float(est.mean() - TRUTH),
            "bias_mc_se": float(est.std(ddof=1) / math.sqrt(n)),
            "sd": float(est.std(ddof=1)),
            "mean_se": float(se.mean()),
            "se_over_sd": float(se.mean() / est.std(ddof=1)),
        }
    return out


def render(summary: dict, records: list[dict], args, seconds: float, command: str) -> str:
    n = len(records)
    label = {
        "new": "fixed weights (enrolled count), covariances from per-unit influence terms (now)",
        "old": "inverse-variance, months as if independent (before)",
    }
    lines = [
        "# Pooled cohorts: coverage of the 95% interval with shared controls",
        "",
        f"`{command}`: {n} simulated warehouses of {args.riders:,} riders (seeds {args.first_seed}..{args.first_seed + n - 1}), "
        f"cohorts {COHORTS}, true effect {TRUTH} post_trips per enrolled unit in every month (benchmarks/cohort_pooling.py says how "
        f"the data are drawn). {seconds:.0f} s in all.",
        "",
        f"Mean enrolled per month {np.mean([r['n_treated'] for r in records], axis=0).round(0).tolist()}, matched controls "
        f"{np.mean([r['n_control'] for r in records], axis=0).round(0).tolist()}; mean correlation of two months' estimates "
        f"(from the covariances) {np.mean([r['mean_corr'] for r in records]):.2f}; rows fetched per pooled run "
        f"{min(r['rows_fetched'] for r in records)}..{max(r['rows_fetched'] for r in records)}.",
        "",
        "| pooled interval | coverage (MC SE) | bias (MC SE) | SD of estimates | mean SE | SE/SD |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for key in ("new", "old"):
        s = summary[key]
        lines.append(
            f"| {label[key]} | {s['coverage']:.2f} ({s['coverage_mc_se']:.3f}) | {s['bias']:+.4f} ({s['bias_mc_se']:.4f}) | "
            f"{s['sd']:.4f} | {s['mean_se']:.4f} | {s['se_over_sd']:.2f} |"
        )
    lines += [
        "",
        f"Mean SE of the new weights if the months were independent (covariances left out): "
        f"{np.mean([r['se_if_independent'] for r in records]):.4f}.",
        "",
    ]
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--replicates", type=int, default=100)
    ap.add_argument("--riders", type=int, default=1500)
    ap.add_argument("--first-seed", type=int, default=1)
    ap.add_argument("--out", type=Path, default=None, help="write the Markdown table here (and the raw records beside it, .json)")
    args = ap.parse_args(argv)
    start = time.perf_counter()
    records = []
    for i in range(args.replicates):
        records.append(replicate(args.riders, args.first_seed + i))
        if args.out is not None:  # kept as it goes: a stopped run still has its replicates
            args.out.with_suffix(".partial.json").write_text(json.dumps(records) + "\n", encoding="utf-8")
        print(f"replicate {i + 1}/{args.replicates}: new {records[-1]['new'][2]:.3f}..{records[-1]['new'][3]:.3f}, "
              f"old {records[-1]['old'][2]:.3f}..{records[-1]['old'][3]:.3f}", file=sys.stderr, flush=True)
    summary = summarise(records)
    command = "PYTHONPATH=. python3 benchmarks/cohort_pooling.py " + " ".join(argv if argv is not None else sys.argv[1:])
    text = render(summary, records, args, time.perf_counter() - start, command.strip())
    print(text)
    if args.out is not None:
        args.out.write_text(text, encoding="utf-8")
        args.out.with_suffix(".json").write_text(json.dumps({"summary": summary, "records": records}, indent=1) + "\n", encoding="utf-8")
        args.out.with_suffix(".partial.json").unlink(missing_ok=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
