"""Commuter process, nearest neighbours: estimate - truth over the treated kept (in SEs) and the balance of log1p(pre_trips), log(commute_km), pre_fare and the districts after matching, for the default model, the model on log1p(pre_trips, commute_km) and no bias correction. Usage: nearest_commuter_balance.py RIDERS SEED,SEED (benchmark-side: reads rows)."""
import dataclasses, sys, shutil, json
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent)); sys.path.insert(0, str(HERE))
import duckdb, numpy as np, pandas as pd
from sqlmatch import api
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.spec import load_spec
from commuter_sim import build_commuter

Path("/tmp/nearest_diagnosis").mkdir(exist_ok=True)
size = int(sys.argv[1]); seeds = [int(s) for s in sys.argv[2].split(",")]
out = []
for seed in seeds:
    folder = Path(f"/tmp/nearest_diagnosis/c{seed}")
    spec_path, truth = build_commuter(folder, units=size, seed=seed, threads=1)
    db = folder / "commuter.duckdb"
    con = duckdb.connect(str(db), config={"threads": 1})
    for variant in ("default", "log1p", "nobc"):
        spec = load_spec(spec_path).with_overrides(method="nearest_neighbour")
        if variant == "log1p":
            spec = dataclasses.replace(spec, propensity=dataclasses.replace(spec.propensity, log1p=("pre_trips", "commute_km")))
        if variant == "nobc":
            spec = dataclasses.replace(spec, matching=dataclasses.replace(spec.matching, bias_correction=False))
        res = api.run(spec, engine=DuckDBEngine(str(db), connection=con))
        w = con.execute(f'SELECT w.*, u.trips1 - u.trips0 AS t_trips, u.fare1 - u.fare0 AS t_fare, u.active1 - u.active0 AS t_active, u.fare1 AS f1, u.trips1 AS tr1, u.fare0 AS f0, u.trips0 AS tr0 FROM sqlmatch.commuter_pass_weighted_units w LEFT JOIN commuter_unit_truth u ON u.rider_id = w.unit_key WHERE w.match__weight IS NOT NULL').df()
        tr = w[w.treated == 1]
        mt = {"post_trips": tr.t_trips.mean(), "post_fare": tr.t_fare.mean(), "fare_per_trip": tr.f1.sum() / tr.tr1.sum() - tr.f0.sum() / tr.tr0.sum(), "active_last_month": tr.t_active.mean()}
        # balance of transformed features (weighted controls vs treated)
        c = w[w.treated == 0]
        def wm(df, col):
            return np.average(df[col], weights=df.match__weight)
        bal = {}
        for col, f in (("pre_trips", lambda x: np.log1p(x)), ("commute_km", np.log), ("pre_fare", lambda x: x)):
            t_, c_ = f(tr[col].astype(float)), f(c[col].astype(float))
            sd = np.sqrt((t_.var() + c_.var()) / 2)
            bal[col] = float((t_.mean() - np.average(c_, weights=c.match__weight)) / sd)
        for lev in sorted(w.home_district.dropna().unique()):
            bal[lev] = float((tr.home_district == lev).mean() - np.average(c.home_district == lev, weights=c.match__weight))
        for e in res.effects:
            out.append(dict(seed=seed, variant=variant, outcome=e.outcome, est=e.estimate, se=e.std_error, truth=mt[e.outcome], z=(e.estimate - mt[e.outcome]) / e.std_error))
        out.append(dict(seed=seed, variant=variant, outcome="balance", **bal, n_t=len(tr), n_c=len(c)))
        print(json.dumps(out[-5:]), flush=True)
    con.close()
    shutil.rmtree(folder, ignore_errors=True)
json.dump(out, open(f"/tmp/nearest_diagnosis/out_{size}_{sys.argv[2]}.json", "w"))
