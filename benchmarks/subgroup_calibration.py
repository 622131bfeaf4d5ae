"""Coverage of the per-subgroup intervals on the commuter simulation (benchmarks/commuter_sim.py),
whose effect varies between riders (it grows with pre-period trips), so subgroups have effects of
their own.

Per seed: a fresh commuter warehouse, the calibration spec (benchmarks/commuter_pass.toml) with
two [[subgroups]] (the categorical confounder home_district, and the condition pre_trips >= 8,
which splits riders by the feature the effect grows with), run with each method at its defaults.
Each level's truth is the per-unit expected effect averaged over the enrolled units of that level
the run kept (commuter_unit_truth; fare_per_trip: ratio of the level's expected sums in each
world, minus), so a method that drops enrolled units is scored on those it kept. A benchmark reads
rows; sqlmatch never does.

    python3 benchmarks/subgroup_calibration.py --seeds 1-60 --methods entropy_balancing score_weighting \
        --out benchmarks/RESULTS_calibration_subgroups.md --raw /tmp/subgroups.jsonl
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import duckdb

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

from commuter_sim import build_commuter  # noqa: E402

from sqlmatch import api  # noqa: E402
from sqlmatch.engines.duckdb import DuckDBEngine  # noqa: E402

SUBGROUPS = '''
[[subgroups]]
feature = "home_district"

[[subgroups]]
name = "frequent_riders"
where = "pre_trips >= 8"
'''
LEVEL_SQL = {"home_district": "COALESCE(w.home_district, '(missing)')", "frequent_riders": "CASE WHEN w.pre_trips >= 8 THEN 'yes' ELSE 'no' END"}


def level_truth(con, spec, subgroup: str) -> dict:
    """level -> outcome -> the expected effect over the kept enrolled units of that level."""
    rows = con.execute(
        f"SELECT {LEVEL_SQL[subgroup]} AS level, AVG(u.trips1 - u.trips0), AVG(u.fare1 - u.fare0), "
        "SUM(u.fare1) / SUM(u.trips1) - SUM(u.fare0) / SUM(u.trips0), AVG(u.active1 - u.active0) "
        f'FROM commuter_unit_truth AS u JOIN "{spec.work_schema}"."{spec.name}_weighted_units" AS w ON w.unit_key = u.rider_id '
        "WHERE w.treated = 1 AND w.match__weight IS NOT NULL GROUP BY 1"
    ).fetchall()
    names = ("post_trips", "post_fare", "fare_per_trip", "active_last_month")
    return {str(r[0]): dict(zip(names, map(float, r[1:]))) for r in rows}


def replicate(seed: int, units: int, methods: list[str], work: Path) -> list[dict]:
    folder = work / f"seed_{seed}"
    spec_path, _ = build_commuter(folder, units=units, seed=seed, threads=1)
    spec_path.write_text(spec_path.read_text() + SUBGROUPS)
    out = []
    con = duckdb.connect(str(folder / "commuter.duckdb"), config={"threads": 1})
    try:
        for method in methods:
            t0 = time.perf_counter()
            try:
                spec = api.load(spec_path).with_overrides(method=method)
                results = api.run(spec, engine=DuckDBEngine(str(folder / "commuter.duckdb"), connection=con), keep_tables=True)
            except Exception as err:  # counted, not fatal
                out.append(dict(seed=seed, method=method, error=f"{type(err).__name__}: {str(err).splitlines()[0] if str(err) else ''}"))
                continue
            seconds = time.perf_counter() - t0
            for sub in results.subgroups:
                truth = level_truth(con, spec, sub.subgroup)
                for lv in sub.levels:
                    e = lv.effect
                    if lv.withheld or e.estimate is None or e.std_error is None:
                        continue
                    out.append(dict(seed=seed, method=method, subgroup=sub.subgroup, level=lv.level, outcome=sub.outcome, estimate=e.estimate, se=e.std_error,
                                    lo=e.ci_low, hi=e.ci_high, truth=truth[lv.level][sub.outcome], n_treated=lv.n_treated, seconds=seconds, q_p=sub.p_value))
    finally:
        con.close()
        shutil.rmtree(folder, ignore_errors=True)
    return out


def summarise(records: list[dict]) -> list[dict]:
    cells: dict[tuple, list[dict]] = {}
    for r in records:
        if "error" in r:
            continue
        cells.setdefault((r["method"], r["outcome"], r["subgroup"], r["level"]), []).append(r)
        cells.setdefault((r["method"], r["outcome"], r["subgroup"], "(all levels)"), []).append(r)
    out = []
    for (method, outcome, subgroup, level), rs in sorted(cells.items()):
        n = len(rs)
        err = [r["estimate"] - r["truth"] for r in rs]
        mean_err = sum(err) / n
        sd = math.sqrt(sum((x - mean_err) ** 2 for x in err) / (n - 1)) if n > 1 else math.nan
        mean_se = sum(r["se"] for r in rs) / n
        cover = sum(r["lo"] <= r["truth"] <= r["hi"] for r in rs) / n
        out.append(dict(method=method, outcome=outcome, subgroup=subgroup, level=level, n=n, coverage=cover, mc_se=math.sqrt(cover * (1 - cover) / n),
                        bias=mean_err, bias_se=mean_err / mean_se if mean_se else math.nan, se_sd=mean_se / sd if sd and sd > 0 else math.nan,
                        mean_truth=sum(r["truth"] for r in rs) / n))
    return out


def render(rows: list[dict], meta: dict) -> str:
    lines = [
        "# Coverage of the per-subgroup intervals (commuter simulation)",
        "",
        f"- Date: {meta['date']}; code of commit {meta['commit']}; load average at the start {meta['load']}",
        f"- Command: `{meta['command']}`",
        f"- Seeds: {meta['seeds']}; {meta['units']:,} riders per warehouse; wall time {meta['minutes']:.1f} min; failed runs: {meta['failed']}",
        "- Subgroups: home_district (5 levels, a confounder) and pre_trips >= 8 (yes / no: the effect grows with pre_trips).",
        "  Truth per level: the expected effect over the level's enrolled units the run kept (`commuter_unit_truth`).",
        "- Coverage: share of 95% intervals containing the level's truth (Monte Carlo SE in brackets); bias/SE: mean error over",
        "  the mean SE; SE/SD: mean SE over the SD of the errors (1 = honest). Target 0.93-0.97 (common practice for 95% intervals",
        "  checked by simulation). `(all levels)` pools every level's interval of that subgroup.",
        "",
        "| method | outcome | subgroup | level | runs | coverage | bias/SE | SE/SD | mean truth |",
        "|---|---|---|---|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        lines.append(f"| {r['method']} | {r['outcome']} | {r['subgroup']} | {r['level']} | {r['n']} | {r['coverage']:.3f} ({r['mc_se']:.3f}) | {r['bias_se']:+.2f} | {r['se_sd']:.2f} | {r['mean_truth']:.4f} |")
    outside = [r for r in rows if not 0.93 <= r["coverage"] <= 0.97]
    lines += ["", "Cells outside 0.93-0.97:", ""]
    lines += [f"- {r['method']} / {r['outcome']} / {r['subgroup']} = {r['level']}: {r['coverage']:.3f} ({r['n']} runs)" for r in outside] or ["- none"]
    return "\n".join(lines) + "\n"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", default="1-60", help="first-last (default 1-60)")
    ap.add_argument("--units", type=int, default=10_000)
    ap.add_argument("--methods", nargs="+", default=["entropy_balancing", "score_weighting"])
    ap.add_argument("--out", type=Path, default=REPO / "benchmarks" / "RESULTS_calibration_subgroups.md")
    ap.add_argument("--raw", type=Path, default=Path(tempfile.gettempdir()) / "sqlmatch_subgroups.jsonl", help="JSON lines, one per level and outcome")
    ap.add_argument("--from-raw", action="store_true", help="summarise --raw instead of running")
    args = ap.parse_args(argv)
    first, last = (int(x) for x in args.seeds.split("-"))
    t0 = time.perf_counter()
    if args.from_raw:
        records = [json.loads(line) for line in args.raw.read_text().splitlines() if line.strip()]
    else:
        records = []
        with tempfile.TemporaryDirectory(prefix="sqlmatch_subgroups_") as work, args.raw.open("w") as sink:
            for seed in range(first, last + 1):
                rs = replicate(seed, args.units, args.methods, Path(work))
                for r in rs:
                    sink.write(json.dumps(r) + "\n")
                sink.flush()
                records += rs
                print(f"seed {seed}: {len(rs)} rows, {time.perf_counter() - t0:.0f} s", file=sys.stderr)
    try:
        commit = subprocess.run(["git", "-C", str(REPO), "rev-parse", "--short", "HEAD"], capture_output=True, text=True, check=True).stdout.strip()
    except Exception:
        commit = "unknown"
    meta = dict(date=dt.date.today().isoformat(), commit=commit, load=open("/proc/loadavg").read().split()[0], command="python3 " + " ".join(sys.argv),
                seeds=f"{first}-{last}", units=args.units, minutes=(time.perf_counter() - t0) / 60, failed=sum("error" in r for r in records))
    args.out.write_text(render(summarise(records), meta))
    print(args.out)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
