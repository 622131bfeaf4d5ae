"""The regression behind a ratio outcome's robustness value, on the commuter simulation
(benchmarks/commuter_sim.py): its treatment coefficient beside the headline ratio effect, for the
linearised outcome sqlmatch fits and for each unit's own ratio weighted by its denominator (the
earlier choice, refitted here with statsmodels on the matched rows).

    python3 benchmarks/ratio_regression.py --units 20000 --seeds 1,2,3
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

import duckdb
import statsmodels.api as sm

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from commuter_sim import build_commuter  # noqa: E402
from sqlmatch import api  # noqa: E402


def own_ratio_fit(rows, features, outcome):
    d = rows[rows[f"{outcome}__den"] > 0]
    X = sm.add_constant(d[["treated", *features]].astype(float))
    fit = sm.WLS(d[f"{outcome}__num"] / d[f"{outcome}__den"], X, weights=d.match__weight * d[f"{outcome}__den"]).fit()
    return fit.params["treated"], fit.bse["treated"]


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--units", type=int, default=20000)
    parser.add_argument("--seeds", default="1,2,3")
    args = parser.parse_args()
    for seed in (int(s) for s in args.seeds.split(",")):
        with tempfile.TemporaryDirectory() as tmp:
            out = Path(tmp)
            spec_path, truth = build_commuter(out, units=args.units, seed=seed)
            here = os.getcwd()
            os.chdir(out)
            try:
                spec = api.load(spec_path)
                e = api.run(spec).effect("fare_per_trip")
                with duckdb.connect(str(out / "commuter.duckdb"), read_only=True) as con:
                    rows = con.execute("SELECT * FROM sqlmatch.commuter_pass_weighted_units WHERE NOT match__weight IS NULL").df()
            finally:
                os.chdir(here)
            own, own_se = own_ratio_fit(rows, [f.name for f in spec.numeric_features], "fare_per_trip")
            s = e.sensitivity
            print(
                f"seed {seed}: headline {e.estimate:.4f} (SE {e.std_error:.4f}), sample truth {truth['fare_per_trip']['sample_att']:.4f}; "
                f"linearised regression {s['regression_estimate']:.4f} (SE {s['regression_std_error']:.4f}, RV {s['robustness_value']:.3f}); "
                f"own-ratio regression {own:.4f} (SE {own_se:.4f})"
            )


if __name__ == "__main__":
    main()
