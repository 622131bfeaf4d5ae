"""Diagnostics for the calibration cells that miss (a script, not a test; changes no statistics).

On both simulated processes (see calibration.py) and a few seeds, runs non-default settings that
isolate one cause each, and measures what the default nearest-neighbour run reuses:

  score_bins_20       score_bins with 20 subclasses instead of 5 (residual within-subclass bias?)
  nearest_1to1        nearest without replacement (SE/SD without control reuse)
  coarsened_fine      coarsened_exact with finer cut points (commuter only: residual bias?)
  nearest reuse       for the default nearest run: matched treated n_T, distinct controls, and the
                      effective number of controls (sum w)^2 / sum w^2 from the per-control weights;
                      n_T / n_eff is the factor by which reuse inflates the control mean's variance
                      over what a formula counting each match as a new unit assumes
  truth               demo: true_att; commuter: expected effect over the treated units each run kept
  pair correlation    corr(Y_treated, Y_control) of post_trips over the 1:1 pairs: a positive
                      correlation makes a two-independent-samples variance too large

    python3 benchmarks/calibration_diagnostics.py --replicates 20

prints a Markdown table and writes benchmarks/calibration_diagnostics.json.
"""

from __future__ import annotations

import argparse
import json
import math
import re
import shutil
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

import duckdb  # noqa: E402
from commuter_sim import build_commuter  # noqa: E402

from calibration import _matched_truth  # noqa: E402
from sqlmatch import api  # noqa: E402
from sqlmatch.demo_run import build_demo  # noqa: E402
from sqlmatch.engines.duckdb import DuckDBEngine  # noqa: E402
from sqlmatch.spec import load_spec  # noqa: E402

FINE_CUTS = (
    "[matching.cut_points]\n"
    "pre_trips = [" + ", ".join(str(k) for k in list(range(1, 31)) + [35, 40, 50, 60]) + "]\n"
    "commute_km = [" + ", ".join(f"{x / 2:g}" for x in range(2, 21)) + ", 12, 15, 20]\n"
)


def _variant(spec_text: str, name: str) -> str | None:
    if name == "score_bins_20":
        return spec_text.replace('method = "coarsened_exact"', 'method = "score_bins"\nbins = 20')
    if name == "nearest_1to1":
        return spec_text.replace('method = "coarsened_exact"', 'method = "nearest_neighbour"\nreuse_controls = false')
    if name == "coarsened_fine":
        if "commute_km" not in spec_text:
            return None
        return re.sub(r"\[matching\.cut_points\].*", FINE_CUTS, spec_text, flags=re.S)
    if name == "nearest_neighbour":
        return spec_text.replace('method = "coarsened_exact"', 'method = "nearest_neighbour"')
    raise ValueError(name)


def one(process: str, seed: int, work: Path) -> list[dict]:
    folder = work / f"{process}_{seed}"
    if process == "demo":
        spec_path = build_demo(folder, riders=12_000, seed=seed)
        database = folder / "bikeshare.duckdb"
        con = duckdb.connect(str(database))
        truth = {o: float(t) for o, t in con.execute("SELECT outcome, true_att FROM demo_truth").fetchall()}
    else:
        spec_path, full = build_commuter(folder, units=10_000, seed=seed, threads=1)
        database = folder / "commuter.duckdb"
        con = duckdb.connect(str(database))
        truth = {o: t["expected_att"] for o, t in full.items()}
    con.execute("SET threads = 1")
    text = spec_path.read_text(encoding="utf-8")
    out = []
    try:
        for name in ("score_bins_20", "nearest_1to1", "coarsened_fine", "nearest_neighbour"):
            variant = _variant(text, name)
            if variant is None:
                continue
            path = folder / f"{name}.toml"
            path.write_text(variant, encoding="utf-8")
            spec = load_spec(path)
            try:
                results = api.run(spec, engine=DuckDBEngine(str(database), connection=con), keep_tables=True)
            except Exception as err:
                out.append(dict(process=process, seed=seed, variant=name, error=f"{type(err).__name__}: {err}"))
                continue
            extra = {}
            schema, study = spec.work_schema, spec.name
            if name == "nearest_neighbour":
                n_t, n_c, n_eff = con.execute(
                    f'SELECT (SELECT COUNT(DISTINCT unit_key) FROM "{schema}"."{study}_match_weights" WHERE treated = 1), '
                    f"COUNT(*), SUM(w) * SUM(w) / SUM(w * w) FROM (SELECT unit_key, SUM(weight) AS w "
                    f'FROM "{schema}"."{study}_match_weights" WHERE treated = 0 GROUP BY unit_key) AS c'
                ).fetchone()
                extra = dict(n_treated=n_t, distinct_controls=n_c, n_eff_controls=float(n_eff))
            if name == "nearest_1to1":
                (rho,) = con.execute(
                    f'SELECT CORR(t.post_trips, c.post_trips) FROM "{schema}"."{study}_pairs" AS p '
                    f'JOIN "{schema}"."{study}_weighted_units" AS t ON t.unit_key = p.treated_key '
                    f'JOIN "{schema}"."{study}_weighted_units" AS c ON c.unit_key = p.control_key'
                ).fetchone()
                extra = dict(pair_corr_post_trips=float(rho))
            # commuter: the truth over the treated units this run kept (the effect varies by unit)
            kept = _matched_truth(con, spec) if process == "commuter" else truth
            for e in results.effects:
                out.append(dict(process=process, seed=seed, variant=name, outcome=e.outcome, truth=kept[e.outcome], estimate=e.estimate, se=e.std_error, lo=e.ci_low, hi=e.ci_high, **extra))
    finally:
        con.close()
        shutil.rmtree(folder, ignore_errors=True)
    return out


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=20)
    parser.add_argument("--first-seed", type=int, default=1)
    parser.add_argument("--out", type=Path, default=REPO / "benchmarks" / "calibration_diagnostics.json")
    args = parser.parse_args(argv)
    t0 = time.perf_counter()
    rows: list[dict] = []
    with tempfile.TemporaryDirectory(prefix="sqlmatch_diag_") as work:
        for k in range(args.replicates):
            for process in ("demo", "commuter"):
                rows += one(process, args.first_seed + k, Path(work))
            print(f"diagnostics: seed {args.first_seed + k} done", file=sys.stderr, flush=True)
    groups = defaultdict(list)
    for r in rows:
        if "error" not in r:
            groups[(r["process"], r["variant"], r["outcome"])].append(r)
    lines = ["| process | setting | outcome | n | coverage | bias | bias/SE | SD of estimates | mean SE | SE/SD | extra |", "|---|---|---|---:|---:|---:|---:|---:|---:|---:|---|"]
    for key in sorted(groups):
        rs = groups[key]
        n = len(rs)
        est = [r["estimate"] for r in rs]
        m = sum(est) / n
        sd = math.sqrt(sum((x - m) ** 2 for x in est) / (n - 1)) if n > 1 else math.nan
        se = sum(r["se"] for r in rs) / n
        bias = sum(r["estimate"] - r["truth"] for r in rs) / n
        cov = sum(r["lo"] <= r["truth"] <= r["hi"] for r in rs) / n
        extra = ""
        if "n_eff_controls" in rs[0]:
            extra = "n_T {:.0f}, distinct controls {:.0f}, n_eff {:.0f}, n_T/n_eff {:.2f}".format(
                *(sum(r[k] for r in rs) / n for k in ("n_treated", "distinct_controls", "n_eff_controls")),
                sum(r["n_treated"] / r["n_eff_controls"] for r in rs) / n,
            )
        if "pair_corr_post_trips" in rs[0]:
            extra = f"corr(Y_T, Y_C) post_trips over pairs {sum(r['pair_corr_post_trips'] for r in rs) / n:.2f}"
        lines.append(f"| {key[0]} | {key[1]} | {key[2]} | {n} | {cov:.3f} | {bias:+.4f} | {bias / se:+.2f} | {sd:.4f} | {se:.4f} | {se / sd:.2f} | {extra} |")
    errors = [r for r in rows if "error" in r]
    text = "\n".join(lines) + "".join(f"\n- {r['process']} {r['variant']} seed {r['seed']}: {r['error']}" for r in errors[:10])
    args.out.write_text(json.dumps(dict(seconds=time.perf_counter() - t0, rows=rows), indent=1), encoding="utf-8")
    print(text)
    print(f"\n{time.perf_counter() - t0:.0f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
